"""Matrix exponentials of many small matrices in one compiled call.

The transition tables, the phase exponentials, the steady state's monodromy and the
recovery charge's blocks of a steady-state point are some 80 exponentials of 3 x 3
to 32 x 32 matrices; ``scipy.linalg.expm`` spends about 30 us of Python around each (a 3 x 3 takes
a few microseconds of arithmetic). :func:`expm_many` computes a whole stack in
one numba call by the scaling-and-squaring method with the [13/13] Padé
approximant [1]_: ``A`` is scaled by ``2^-s`` until its 1-norm is at most
``theta_13 = 5.37`` (the bound below which the approximant's backward error is
within the unit roundoff, Higham 2005, Table 2.3, from memory; the tests check
the result against ``scipy.linalg.expm``), ``r_13(A 2^-s)`` is found from
``(V - U) X = V + U`` by Gaussian elimination with partial pivoting, and
``X`` is squared ``s`` times. Plain loops over arrays, no BLAS: for these
sizes a call is cheaper than the library's dispatch.

References
----------
.. [1] N. J. Higham, "The scaling and squaring method for the matrix exponential
   revisited", SIAM J. Matrix Anal. Appl. 26(4), 1179-1193, 2005.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

#: 1-norm bound of the scaled matrix for the [13/13] approximant (Higham 2005).
THETA_13 = 5.371920351148152
#: Above this size the plain loops lose to BLAS: ``scipy.linalg.expm`` takes those.
LARGEST = 32
#: Past this many squarings (a 1-norm above 5.4 x 2^64 ~ 1e20: no physical stage over one
#: period; a capacitance of 1e-300 F is one) the matrix goes to ``scipy.linalg.expm`` too,
#: which the engine has always used there (its overflow is what flags such a run).
MOST_SQUARINGS = 64


def _pade_coefficients(m: int) -> np.ndarray:
    """``b_j`` of the [m/m] Padé approximant of ``exp``:
    ``b_j = (2m - j)! m! / ((2m)! j! (m - j)!)``, scaled so that ``b_m = 1``."""
    b = [math.factorial(2 * m - j) * math.factorial(m)
         / (math.factorial(2 * m) * math.factorial(j) * math.factorial(m - j))
         for j in range(m + 1)]
    return np.array(b) / b[m]


_B13 = _pade_coefficients(13)


@njit(cache=True)
def _matmul(a, b, out):
    n = a.shape[0]
    for i in range(n):
        for j in range(n):
            acc = 0.0
            for k in range(n):
                acc += a[i, k] * b[k, j]
            out[i, j] = acc


@njit(cache=True)
def _solve_in_place(a, b):
    """``b <- a^-1 b`` by Gaussian elimination with partial pivoting (``a`` destroyed)."""
    n = a.shape[0]
    for c in range(n):
        p = c
        big = abs(a[c, c])
        for r in range(c + 1, n):
            if abs(a[r, c]) > big:
                big, p = abs(a[r, c]), r
        if p != c:
            for j in range(n):
                a[c, j], a[p, j] = a[p, j], a[c, j]
                b[c, j], b[p, j] = b[p, j], b[c, j]
        piv = a[c, c]
        for r in range(c + 1, n):
            f = a[r, c] / piv
            if f != 0.0:
                for j in range(c, n):
                    a[r, j] -= f * a[c, j]
                for j in range(n):
                    b[r, j] -= f * b[c, j]
    for c in range(n - 1, -1, -1):
        for j in range(n):
            acc = b[c, j]
            for k in range(c + 1, n):
                acc -= a[c, k] * b[k, j]
            b[c, j] = acc / a[c, c]


@njit(cache=True)
def _powers(out, base, keep, a6, a4, a2, c6, c4, c2, c0):
    """``out <- c6 a6 + c4 a4 + c2 a2 + c0 I``, plus ``base`` where ``keep`` (``out`` may be
    ``base``; without ``keep`` it is not read: work space holds anything)."""
    n = out.shape[0]
    for i in range(n):
        for j in range(n):
            x = c6 * a6[i, j] + c4 * a4[i, j] + c2 * a2[i, j] + (c0 if i == j else 0.0)
            out[i, j] = base[i, j] + x if keep else x


@njit(cache=True, inline="always")
def norm_1(A):
    """The 1-norm of a square matrix: its largest column sum of magnitudes."""
    n = A.shape[0]
    norm = 0.0
    for j in range(n):
        col = 0.0
        for i in range(n):
            col += abs(A[i, j])
        norm = max(norm, col)
    return norm


@njit(cache=True)
def _expm_one(A, coef, out, w):
    """``out <- expm(A)``; ``w``: work space of shape ``(8, n, n)``."""
    n = A.shape[0]
    norm = norm_1(A)
    s = 0
    if norm > THETA_13:
        s = int(math.ceil(math.log2(norm / THETA_13)))
    scale = 2.0 ** -s
    a, a2, a4, a6, u, v, t = w[0], w[1], w[2], w[3], w[4], w[5], w[6]
    for i in range(n):
        for j in range(n):
            a[i, j] = A[i, j] * scale
    _matmul(a, a, a2)
    _matmul(a2, a2, a4)
    _matmul(a4, a2, a6)
    b = coef
    # U = A [A6 (b13 A6 + b11 A4 + b9 A2) + b7 A6 + b5 A4 + b3 A2 + b1 I]
    # V = A6 (b12 A6 + b10 A4 + b8 A2) + b6 A6 + b4 A4 + b2 A2 + b0 I
    _powers(t, t, False, a6, a4, a2, b[13], b[11], b[9], 0.0)
    _matmul(a6, t, u)
    _powers(t, u, True, a6, a4, a2, b[7], b[5], b[3], b[1])
    _matmul(a, t, u)
    _powers(t, t, False, a6, a4, a2, b[12], b[10], b[8], 0.0)
    _matmul(a6, t, v)
    _powers(v, v, True, a6, a4, a2, b[6], b[4], b[2], b[0])
    # (V - U) X = V + U
    for i in range(n):
        for j in range(n):
            t[i, j] = v[i, j] - u[i, j]
            out[i, j] = v[i, j] + u[i, j]
    _solve_in_place(t, out)
    sq = w[7]
    for _ in range(s):
        _matmul(out, out, sq)
        for i in range(n):
            for j in range(n):
                out[i, j] = sq[i, j]


@njit(cache=True)
def _balance(a, d):
    """Balance ``a`` in place by a diagonal similarity of powers of two, ``a <- D^-1 a D``
    (``d`` the diagonal), so that each row and column off the diagonal have about
    the same 1-norm (Parlett and Reinsch; LAPACK's ``gebal`` without its
    permutations). Powers of two make the scaling exact; a row or column with
    nothing off the diagonal (the augmented state's constant row) is left alone."""
    n = a.shape[0]
    for i in range(n):
        d[i] = 1.0
    for _ in range(64):
        done = True
        for i in range(n):
            c = 0.0
            r = 0.0
            for j in range(n):
                if j != i:
                    c += abs(a[j, i])
                    r += abs(a[i, j])
            if c == 0.0 or r == 0.0:
                continue
            f = 1.0
            s = c + r
            while c < r / 2.0:
                c *= 2.0
                r /= 2.0
                f *= 2.0
            while c >= r * 2.0:
                c /= 2.0
                r *= 2.0
                f /= 2.0
            if c + r < 0.95 * s:
                done = False
                d[i] *= f
                for j in range(n):
                    a[i, j] /= f
                    a[j, i] *= f
        if done:
            break


@njit(cache=True)
def _expm_stack(mats, scales, coef, out):
    n = mats.shape[1]
    w = np.empty((8, n, n))
    a = np.empty((n, n))
    d = np.empty(n)
    for k in range(mats.shape[0]):
        for i in range(n):
            for j in range(n):
                a[i, j] = mats[k, i, j] * scales[k]
        _balance(a, d)
        e = out[k]
        _expm_one(a, coef, e, w)
        # exp(A) = D exp(D^-1 A D) D^-1
        for i in range(n):
            for j in range(n):
                e[i, j] = e[i, j] * d[i] / d[j]


def expm_many(mats, scales=None) -> np.ndarray:
    """``expm(mats[k] * scales[k])`` for a stack ``mats`` of shape ``(N, n, n)``
    (``scales`` default 1), in one compiled call; shape ``(N, n, n)``. Matrices
    larger than :data:`LARGEST`, or whose norm needs more than
    :data:`MOST_SQUARINGS` squarings, go to ``scipy.linalg.expm`` one by one.

    Agrees with ``scipy.linalg.expm`` to a few units of rounding relative to the
    result's norm (``tests/unit/test_small_expm.py``).
    """
    mats = np.ascontiguousarray(mats, dtype=float)
    if mats.ndim != 3 or mats.shape[1] != mats.shape[2]:
        raise ValueError(f"expected a stack of square matrices, got shape {mats.shape}")
    n_mat = mats.shape[0]
    scales = (np.ones(n_mat) if scales is None
              else np.ascontiguousarray(np.broadcast_to(scales, (n_mat,)), dtype=float))
    if not (np.all(np.isfinite(mats)) and np.all(np.isfinite(scales))):
        raise ValueError("expm_many: the matrices and scales must be finite")
    out = np.empty_like(mats)
    norms = np.abs(mats).sum(axis=1).max(axis=1) * np.abs(scales) if n_mat else np.zeros(0)
    wild = norms > THETA_13 * 2.0 ** MOST_SQUARINGS
    if mats.shape[1] > LARGEST:
        wild[:] = True
    tame = np.flatnonzero(~wild)
    if tame.size:
        part = np.empty((tame.size,) + mats.shape[1:])
        _expm_stack(np.ascontiguousarray(mats[tame]), np.ascontiguousarray(scales[tame]),
                    _B13, part)
        out[tame] = part
    if np.any(wild):
        from scipy.linalg import expm
        for k in np.flatnonzero(wild):
            out[k] = expm(mats[k] * scales[k])
    return out


__all__ = ["expm_many", "norm_1", "THETA_13"]
