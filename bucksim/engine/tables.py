"""Exact transition tables handed to the kernels.

For each system ``M_s`` (augmented, ``z' = M_s z``) the engine keeps
``E[s, k] = expm(M_s T 2**-k)`` for ``k = 0 .. K-1``. Any interval is then a
product of table entries (its binary digits), and any zero crossing can be
bisected to ``T 2**-(K-1)`` without a new matrix exponential.

References
----------
.. [1] C. Moler and C. Van Loan, "Nineteen dubious ways to compute the
   exponential of a matrix, twenty-five years later", SIAM Review 45(1),
   2003 (scaling and squaring; why a table of exact exponentials beats
   re-squaring for accuracy).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import expm

#: Table depth: h_{K-1} = T 2**-47 ~ 7e-15 T, well inside the 1e-12 T event target.
TABLE_DEPTH = 48


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
        Bracket width [s] below which a zero is finished by Newton steps on
        a fourth-order Taylor series: ``1e-3 / max_s ||A_s||_inf``.
    """

    matrices: np.ndarray
    exponentials: np.ndarray
    steps: np.ndarray
    guard: float
    taylor_gap: float = 0.0


def build_table(matrices: np.ndarray, period: float, depth: int = TABLE_DEPTH) -> TransitionTable:
    """Exact exponentials of each system at the binary fractions of ``period``."""
    matrices = np.ascontiguousarray(matrices, dtype=float)
    steps = period * 2.0 ** -np.arange(depth, dtype=float)
    n_sys, m, _ = matrices.shape
    exps = np.empty((n_sys, depth, m, m))
    rho = 0.0
    for s in range(n_sys):
        for k, hk in enumerate(steps):
            exps[s, k] = expm(matrices[s] * hk)
        rho = max(rho, float(np.max(np.abs(np.linalg.eigvals(matrices[s])))))
    _exact_constant_row(exps)
    guard = 0.25 / rho if rho > 0 else np.inf
    norm = max(float(np.max(np.sum(np.abs(M[:-1, :-1]), axis=1))) for M in matrices)
    taylor_gap = 1e-3 / norm if norm > 0 else 0.0
    return TransitionTable(matrices, exps, steps, float(min(guard, 1e300)), float(taylor_gap))


def phase_exponentials(matrices: np.ndarray, durations) -> np.ndarray:
    """``expm(M_s d_p)`` for each system and each nominal phase duration ``d_p``."""
    n_sys, m, _ = matrices.shape
    out = np.empty((n_sys, len(durations), m, m))
    for s in range(n_sys):
        for p, d in enumerate(durations):
            out[s, p] = expm(matrices[s] * d) if d > 0 else np.eye(m)
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
