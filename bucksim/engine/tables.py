"""Exact transition tables handed to the kernels.

For each system ``M_s`` (augmented, ``z' = M_s z``) the engine keeps
``E[s, k] = expm(M_s T 2**-k)`` for ``k = 0 .. K-1``. Any interval is then a
product of table entries (its binary digits) and a remainder shorter than
``h_{K-1}``, which the kernels propagate with the Taylor series of
:data:`TAYLOR_ORDER`; ``K`` is the first level with
``h_{K-1} ||A||_inf <= TAYLOR_REACH``, so the series is exact to rounding
there (its first omitted term is below ``0.05**9 / 9! ~ 5e-18`` relative)
and an interval costs about ``K / 2`` table products plus the series instead
of one product per binary digit down to ``T 2**-47``. The table entries
themselves come from a scaling-and-squaring exponential [1]_
(:func:`bucksim.engine.small_expm.expm_many`, one compiled call for the whole table).

References
----------
.. [1] C. Moler and C. Van Loan, "Nineteen dubious ways to compute the
   exponential of a matrix, twenty-five years later", SIAM Review 45(1),
   2003 (scaling and squaring; why a table of exact exponentials beats
   re-squaring for accuracy).
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass, field

import numpy as np

from bucksim.engine.small_expm import expm_many

#: Deepest table: h = T 2**-47 ~ 7e-15 T (used only when ||A|| T is enormous).
TABLE_DEPTH = 48

#: Order of the Taylor series that finishes an interval (mirrors kernels.TAYLOR_ORDER).
TAYLOR_ORDER = 8

#: Largest ||A||_inf h of the series' step: (0.05)**9 / 9! ~ 5e-18.
TAYLOR_REACH = 0.05

#: Tables and phase exponentials kept for reuse, most recent last: a shooting and the
#: run from its periodic state, or neighbouring sweep points at one duty, build the
#: same systems (the same matrices to the bit give the same table to the bit).
CACHE_ENTRIES = 16
_cache: OrderedDict = OrderedDict()
_cache_lock = threading.Lock()


def _cached(key, build):
    """``build()`` once per ``key`` among the last :data:`CACHE_ENTRIES` keys."""
    with _cache_lock:
        hit = _cache.get(key)
        if hit is not None:
            _cache.move_to_end(key)
            return hit
    value = build()
    with _cache_lock:
        _cache[key] = value
        while len(_cache) > CACHE_ENTRIES:
            _cache.popitem(last=False)
    return value


@dataclass(frozen=True)
class TransitionTable:
    """Matrices and steps the kernels read.

    Attributes
    ----------
    matrices : ndarray, shape (n_sys, m, m)
        Augmented system matrices ``M_s``.
    exponentials : ndarray, shape (n_sys, K, m, m)
        ``expm(M_s h_k)``.
    steps : ndarray, shape (K,)
        ``h_k = period 2**-k`` [s].
    guard : float
        Longest interval [s] searched for a zero crossing in one piece:
        a quarter of the fastest time constant ``1/max|eig(M_s)|``.
    taylor_gap : float
        The shortest step ``h_{K-1}`` [s]: remainders and zero brackets below
        it are finished on the Taylor series (``<= TAYLOR_REACH / max_s
        ||A_s||_inf``).
    """

    matrices: np.ndarray
    exponentials: np.ndarray
    steps: np.ndarray
    guard: float
    taylor_gap: float = 0.0
    #: Per system: a quarter of its own fastest time constant [s] (:func:`system_guards`);
    #: derived from ``matrices`` and ``guard``, so not stored with a run.
    guards: np.ndarray | None = field(default=None, compare=False, repr=False)

    def __post_init__(self):
        if self.guards is None:   # a table read back from a file: derive them again
            object.__setattr__(self, "guards",
                               _guards_from(_spectral_radii(self.matrices), self.guard))


def build_table(matrices: np.ndarray, period: float, depth: int = TABLE_DEPTH) -> TransitionTable:
    """Exact exponentials of each system at the binary fractions of ``period``.

    The table stops at the first level whose step is within the Taylor
    series' reach (see the module notes), at ``depth`` levels at most. A table of
    the same matrices, period and depth built recently is returned again (its
    arrays are read only by every caller).
    """
    matrices = np.ascontiguousarray(matrices, dtype=float)
    key = ("table", matrices.shape, matrices.tobytes(), float(period), int(depth))
    return _cached(key, lambda: _build_table(matrices, period, depth))


def _build_table(matrices: np.ndarray, period: float, depth: int) -> TransitionTable:
    n_sys, m, _ = matrices.shape
    norm = max(float(np.max(np.sum(np.abs(M[:-1, :-1]), axis=1))) for M in matrices)
    levels = depth
    if norm > 0:
        # h_k = T 2**-k <= TAYLOR_REACH / norm
        need = int(np.ceil(np.log2(max(period * norm / TAYLOR_REACH, 1.0)))) + 1
        levels = min(depth, max(need, 1))
    steps = period * 2.0 ** -np.arange(levels, dtype=float)
    exps = np.empty((n_sys, levels, m, m))
    rho = _spectral_radii(matrices)
    first = _first_copies(matrices)
    unique = np.flatnonzero(first == np.arange(n_sys))
    exps[unique] = expm_many(np.repeat(matrices[unique], levels, axis=0),
                             np.tile(steps, unique.size)).reshape(unique.size, levels, m, m)
    exps[:] = exps[first]    # a copy (e.g. a conduction state in another band)
    _exact_constant_row(exps)
    top = float(np.max(rho)) if n_sys else 0.0
    guard = float(min(0.25 / top if top > 0 else np.inf, 1e300))
    return TransitionTable(matrices, exps, steps, guard, float(steps[-1]),
                           _guards_from(rho, guard))


def _first_copies(matrices: np.ndarray) -> np.ndarray:
    """Per system, the first system with an identical matrix (itself when unique)."""
    flat = matrices.reshape(matrices.shape[0], -1)
    _, first, inverse = np.unique(flat, axis=0, return_index=True, return_inverse=True)
    return first[inverse.ravel()]


def _spectral_radii(matrices: np.ndarray) -> np.ndarray:
    return np.array([float(np.max(np.abs(np.linalg.eigvals(M)))) for M in matrices])


def _guards_from(rho: np.ndarray, guard: float) -> np.ndarray:
    out = np.where(rho > 0, 0.25 / np.where(rho > 0, rho, 1.0), 1e300)
    return np.ascontiguousarray(np.maximum(np.minimum(out, 1e300), guard), dtype=float)


def system_guards(table: TransitionTable) -> np.ndarray:
    """Per system: a quarter of its fastest time constant, ``0.25 / max|eig(M_s)|`` [s]
    (never below the table's ``guard``, the same quantity for the fastest system), so
    that a fast node ring does not shorten the searches of the other systems."""
    return table.guards


def phase_exponentials(matrices: np.ndarray, durations) -> np.ndarray:
    """``expm(M_s d_p)`` for each system and each nominal phase duration ``d_p``
    (returned again for the same matrices and durations, like :func:`build_table`)."""
    matrices = np.ascontiguousarray(matrices, dtype=float)
    key = ("phases", matrices.shape, matrices.tobytes(), tuple(float(d) for d in durations))
    return _cached(key, lambda: _phase_exponentials(matrices, durations))


def _phase_exponentials(matrices: np.ndarray, durations) -> np.ndarray:
    n_sys, m, _ = matrices.shape
    out = np.empty((n_sys, len(durations), m, m))
    first = _first_copies(matrices)
    unique = np.flatnonzero(first == np.arange(n_sys))
    d = np.array([float(x) for x in durations])
    n_p = d.size
    exps = expm_many(np.repeat(matrices[unique], n_p, axis=0),
                     np.tile(np.maximum(d, 0.0), unique.size))
    out[unique] = exps.reshape(unique.size, n_p, m, m)
    out[:] = out[first]
    _exact_constant_row(out)
    return out


def _exact_constant_row(exps):
    """Set the last row of each augmented exponential to exactly [0, ..., 0, 1].

    The augmented state ends in the constant 1 (``M``'s last row is zero, so
    this row is exact in theory); ``expm`` leaves rounding of ~1e-13 there
    in stiff stages, and since every source term is scaled by that entry the
    error would grow linearly with the number of periods.
    """
    exps[..., -1, :] = 0.0
    exps[..., -1, -1] = 1.0
