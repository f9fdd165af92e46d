"""Exact first and second moments of a linear segment, ``int z dt`` and ``int z z^T dt``.

Within a segment of system ``M = [[A, b], [0, 0]]`` the augmented state
``z = [x, 1]`` follows ``z(t) = expm(M t) z0``. Where ``A`` is invertible the
state is written about its equilibrium ``x_eq = -A^{-1} b`` as
``x = x_eq + w`` with ``w(t) = expm(A t) w0``, and

.. math::

    \\int_0^d x\\,dt = x_{eq} d + G w_0, \\qquad
    \\int_0^d x x^T dt = x_{eq} x_{eq}^T d + x_{eq} (G w_0)^T + (G w_0) x_{eq}^T
    + \\mathrm{unvec}\\big(Q\\,(w_0 \\otimes w_0)\\big),

with ``G = int_0^d expm(A t) dt`` and ``Q = int_0^d expm((A (+) A) t) dt``,
each the upper-right block of one block exponential (Van Loan [1]_).

Why the deviation form: the moments of ``z`` itself come from one block
exponential of ``M (+) M`` whose entries couple the large constant drive
(``Vin / L`` with a nanohenry inductor is ~1e9 A/s) into every product. An
unloaded stage resting at ``vC = Vin`` then gets its ``int iL^2`` as the
difference of terms of size ``(Vin/R)^2 d``: rounding of those reads as an
RMS current of tens of microamperes, a negative loss, or a mean outside the
extrema. In the deviation form every term is homogeneous in ``w0`` or
carries ``x_eq`` explicitly, so a stage at its equilibrium reports the
equilibrium exactly, and the rounding of each moment is relative to that
moment's own size. The two-state equilibrium is taken by Cramer's rule,
which keeps structural zeros (an unloaded stage's equilibrium current is
exactly 0). A singular ``A`` (the idle state, a pure integrator) keeps the
plain block exponential of ``M``.

References
----------
.. [1] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Automatic Control 23(3), 395-404, 1978.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import expm

#: Largest condition number of ``A`` for which the equilibrium form is used
#: (beyond it ``A^{-1} b`` carries more rounding than the plain form).
_MAX_COND = 1e10


def _van_loan(A: np.ndarray, d: float) -> np.ndarray:
    """``int_0^d expm(A t) dt``: upper-right block of ``expm([[A, I], [0, 0]] d)``."""
    k = A.shape[0]
    big = np.zeros((2 * k, 2 * k))
    big[:k, :k] = A
    big[:k, k:] = np.eye(k)
    return expm(big * d)[:k, k:]


def _kron_sum(A: np.ndarray) -> np.ndarray:
    eye = np.eye(A.shape[0])
    return np.kron(A, eye) + np.kron(eye, A)


def equilibrium(M: np.ndarray) -> np.ndarray | None:
    """``x_eq`` with ``A x_eq + b = 0`` for ``M = [[A, b], [0, 0]]``, or None if ``A``
    is singular or ill-conditioned."""
    A, b = M[:-1, :-1], M[:-1, -1]
    n = A.shape[0]
    if n == 0:
        return None
    if n == 2:
        (p, q), (r, s) = A.tolist()
        det = p * s - q * r
        scale = max(abs(p * s), abs(q * r))
        if det == 0.0 or not np.isfinite(det) or abs(det) < scale / _MAX_COND:
            return None
        b0, b1 = float(b[0]), float(b[1])
        # Cramer's rule: a zero in A and b stays an exact zero in x_eq
        return np.array([(q * b1 - s * b0) / det, (r * b0 - p * b1) / det])
    if not np.all(np.isfinite(A)) or np.linalg.cond(A) > _MAX_COND:
        return None
    return np.linalg.solve(A, -b)


class SegmentMoments:
    """Memoised exact moments of segments of the systems ``matrices`` (shape ``(n_sys, m, m)``)."""

    def __init__(self, matrices: np.ndarray):
        self.matrices = matrices
        self.m = matrices.shape[1]
        self._eq: dict[int, np.ndarray | None] = {}
        self._first: dict[tuple[int, float], np.ndarray] = {}
        self._second: dict[tuple[int, float], np.ndarray] = {}

    def _equilibrium(self, s: int):
        if s not in self._eq:
            self._eq[s] = equilibrium(self.matrices[s])
        return self._eq[s]

    def _blocks_first(self, s, d, eq):
        key = (s, d)
        hit = self._first.get(key)
        if hit is None:
            M = self.matrices[s]
            hit = _van_loan(M[:-1, :-1] if eq is not None else M, d)
            self._first[key] = hit
        return hit

    def _blocks_second(self, s, d, eq):
        key = (s, d)
        hit = self._second.get(key)
        if hit is None:
            M = self.matrices[s]
            hit = _van_loan(_kron_sum(M[:-1, :-1] if eq is not None else M), d)
            self._second[key] = hit
        return hit

    def first(self, s: int, z0: np.ndarray, d: float) -> np.ndarray:
        """``int_0^d z dt`` over a segment of system ``s`` starting at ``z0`` (ends in 1)."""
        s, d = int(s), float(d)
        eq = self._equilibrium(s)
        G = self._blocks_first(s, d, eq)
        if eq is None:
            return G @ z0
        out = np.empty(self.m)
        out[:-1] = eq * d + G @ (z0[:-1] - eq)
        out[-1] = d
        return out

    def second(self, s: int, z0: np.ndarray, d: float) -> np.ndarray:
        """``int_0^d z z^T dt`` over a segment of system ``s`` starting at ``z0``."""
        s, d = int(s), float(d)
        m = self.m
        eq = self._equilibrium(s)
        Q = self._blocks_second(s, d, eq)
        if eq is None:
            return (Q @ np.kron(z0, z0)).reshape(m, m)
        w0 = z0[:-1] - eq
        iw = self._blocks_first(s, d, eq) @ w0
        ww = (Q @ np.kron(w0, w0)).reshape(m - 1, m - 1)
        ix = eq * d + iw
        out = np.empty((m, m))
        out[:-1, :-1] = d * np.outer(eq, eq) + np.outer(eq, iw) + np.outer(iw, eq) + ww
        out[:-1, -1] = ix
        out[-1, :-1] = ix
        out[-1, -1] = d
        return out
