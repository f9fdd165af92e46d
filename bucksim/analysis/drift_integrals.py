r"""The segment moments' matrix integrals, compiled: scaling and squaring on the integrals.

For a square ``N``, a length ``d >= 0`` and a symmetric ``Q``,

.. math::

    \Phi(d) = e^{N d}, \qquad G(d) = \int_0^d e^{N s}\,ds, \qquad
    X(d) = \int_0^d e^{N s} Q\, e^{N^T s}\,ds,

obey the doubling rules ``Phi(2h) = Phi(h)^2``, ``G(2h) = G(h) + Phi(h) G(h)`` and
``X(2h) = X(h) + Phi(h) X(h) Phi(h)^T`` (split the integral at ``h``). At a base step
``h = d / 2^j`` with ``||N h||_1 <= THETA`` each is its Taylor series,
``X(h) = sum_k h^(k+1) / (k+1)! L^k(Q)`` with ``L(Y) = N Y + Y N^T``, truncated at
order :data:`ORDER`: the first omitted term is below ``(2 THETA)^(ORDER+1) / (ORDER+2)!
~ 4e-19`` of the kept ones, so the base step is exact to rounding.

The moments' ``N = [[A, I], [0, 0]]`` and ``Q = [[0, 0], [0, Qf]]`` (the drive enters
through the derivative at the segment's start only) give ``Phi = [[E, F], [0, I]]``,
``G = [[F, H], [0, d I]]`` and ``X = [[X_yy, H Qf], [Qf H^T, d Qf]]``, with ``E =
e^{A d}``, ``F = int_0^d e^{A s} ds``, ``H = int_0^d F(s) ds`` and ``X_yy = int_0^d
F(s) Qf F(s)^T ds``; :func:`drift_integrals` carries only these ``n x n`` blocks
through the doubling, ten products a squaring where the whole ``2n`` system takes 32.

Why not Van Loan's block exponential (Van Loan [1]_): for ``X`` it is the exponential
either of the Kronecker sum ``N (+) N`` (a ``2 k^2`` square block, cost ``O(k^6)``: 392
rows for the 14 drift states of a rail with an input filter and a type III loop, 20 ms
a block and 78 s for the summary of a 10,000-segment closed-loop run) or of
``[[-N, Q], [0, N^T]]``, whose ``e^{-N d}`` overflows on a stiff decaying mode. The
doubling costs ``O(k^3)`` a squaring, every factor is a forward exponential (no
growth a decaying mode does not have), and ``X`` accumulates positive semidefinite
terms for ``Q >= 0``, so no cancellation.

References
----------
.. [1] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Automatic Control 23(3), 395-404, 1978.
.. [2] N. J. Higham, *Functions of Matrices*, SIAM 2008, ch. 10 (scaling and squaring).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.small_expm import norm_1

#: Largest ``||N h||_1`` of the base step.
THETA = 0.5
#: Taylor order of the base step.
ORDER = 18


@njit(cache=True)
def _mm(a, b, out, trans_b=False):
    """out <- a @ b (``b^T`` with ``trans_b``)."""
    k = a.shape[0]
    for i in range(k):
        for j in range(k):
            acc = 0.0
            if trans_b:
                for q in range(k):
                    acc += a[i, q] * b[j, q]
            else:
                for q in range(k):
                    acc += a[i, q] * b[q, j]
            out[i, j] = acc


@njit(cache=True)
def _base(A, h, Qf, E, F, H, X, Y, w1, w2):
    """``E, F, H, X_yy`` and ``X_yf`` (``Y``) at the base step ``h`` by Horner's rule
    on their Taylor series: ``E = sum (Ah)^k / k!``, ``F = h sum (Ah)^k / (k+1)!``,
    ``H = h^2 sum (Ah)^k / (k+2)!`` and ``X = sum h^(j+1) / (j+1)! L^j(Q)`` in blocks,
    ``L(X)_yy = A X_yy + X_yy A^T + X_yf + X_yf^T``, ``L(X)_yf = A X_yf + X_ff``,
    ``L(X)_ff = 0`` (``X_ff = Qf``)."""
    n = A.shape[0]
    for i in range(n):
        for j in range(n):
            E[i, j] = 0.0
            F[i, j] = 0.0
            H[i, j] = 0.0
            X[i, j] = 0.0
            Y[i, j] = 0.0
        E[i, i] = 1.0
        F[i, i] = 1.0
        H[i, i] = 1.0
    for r in range(ORDER, 0, -1):
        c, c1, c2 = h / r, h / (r + 1), h / (r + 2)
        _mm(A, E, w1)
        for i in range(n):
            for j in range(n):
                E[i, j] = (1.0 if i == j else 0.0) + c * w1[i, j]
        _mm(A, F, w1)
        for i in range(n):
            for j in range(n):
                F[i, j] = (1.0 if i == j else 0.0) + c1 * w1[i, j]
        _mm(A, H, w1)
        for i in range(n):
            for j in range(n):
                H[i, j] = (1.0 if i == j else 0.0) + c2 * w1[i, j]
        # X <- Q + h / (r + 1) L(X), the yy block from the old yf block
        _mm(A, X, w1)
        _mm(A, Y, w2)
        for i in range(n):
            for j in range(n):
                X[i, j] = c1 * (w1[i, j] + w1[j, i] + Y[i, j] + Y[j, i])
        for i in range(n):
            for j in range(n):
                Y[i, j] = c1 * (w2[i, j] + Qf[i, j])
    for i in range(n):
        for j in range(n):
            F[i, j] *= h
            H[i, j] *= 0.5 * h * h
            X[i, j] *= h


@njit(cache=True)
def drift_integrals(As, systems, lengths, Qfs, H_out, X_out):
    """``H = int_0^d int_0^s e^{A u} du ds`` and ``X_yy = int_0^d F(s) Qf F(s)^T ds``
    (``F(s) = int_0^s e^{A u} du``) of ``As[systems[g]]`` over ``lengths[g]`` with
    ``Qfs[g]``, into ``H_out[g]`` and ``X_out[g]``, for every group ``g``: the blocks of
    ``G`` and ``X`` (module docstring) of ``N = [[A, I], [0, 0]]`` and ``Q = [[0, 0],
    [0, Qf]]`` that the moments read, ``G = [[F, H], [0, d I]]``, ``X_yy``.

    Doubling the step ``h`` (``E = e^{A h}``; split each integral at ``h``)::

        E <- E E,  F <- F + E F,  H <- H + h F + E H,
        X <- X + E X E^T + W + W^T + h F Qf F^T,  W = E H Qf F^T

    (the right-hand sides at the old values): ten ``n x n`` products a squaring, where
    the ``2n`` system takes four of ``2n x 2n`` (32 of ``n x n``).
    """
    n = As.shape[1]
    E, F, H, X, Y = (np.empty((n, n)), np.empty((n, n)), np.empty((n, n)),
                     np.empty((n, n)), np.empty((n, n)))
    w1, w2, w3, w4 = np.empty((n, n)), np.empty((n, n)), np.empty((n, n)), np.empty((n, n))
    for g in range(systems.shape[0]):
        A = As[systems[g]]
        Qf = Qfs[g]
        d = lengths[g]
        # ||N||_1 of N = [[A, I], [0, 0]]: A's largest column sum, or the identity's 1
        norm = max(norm_1(A), 1.0)
        h, n_sq = d, 0
        while h * norm > THETA:
            h *= 0.5
            n_sq += 1
        _base(A, h, Qf, E, F, H, X, Y, w1, w2)
        for _ in range(n_sq):
            _mm(E, X, w1)
            _mm(w1, E, w4, True)                # w4 = E X E^T
            _mm(F, Qf, w2)
            _mm(w2, F, w3, True)                # w3 = F Qf F^T
            for i in range(n):
                for j in range(n):
                    X[i, j] += w4[i, j] + h * w3[i, j]
            _mm(E, H, w1)                       # w1 = E H
            _mm(w1, Qf, w2)
            _mm(w2, F, w3, True)                # w3 = W = E H Qf F^T
            for i in range(n):
                for j in range(n):
                    X[i, j] += w3[i, j] + w3[j, i]
                    H[i, j] += h * F[i, j] + w1[i, j]
            _mm(E, F, w1)
            for i in range(n):
                for j in range(n):
                    F[i, j] += w1[i, j]
            _mm(E, E, w1)
            for i in range(n):
                for j in range(n):
                    E[i, j] = w1[i, j]
            h *= 2.0
        for i in range(n):
            for j in range(n):
                H_out[g, i, j] = H[i, j]
                X_out[g, i, j] = 0.5 * (X[i, j] + X[j, i])


def drift_integrals_reference(N: np.ndarray, d: float, Q: np.ndarray):
    """NumPy/SciPy reference of :func:`drift_integrals` for one group: Van Loan's
    block exponentials (``G`` from ``[[N, I], [0, 0]]``, ``X`` from the Kronecker sum),
    by ``scipy.linalg.expm``. ``O(k^6)``: for tests."""
    from scipy.linalg import expm

    k = N.shape[0]
    big = np.zeros((2 * k, 2 * k))
    big[:k, :k] = N
    big[:k, k:] = np.eye(k)
    G = expm(big * d)[:k, k:]
    eye = np.eye(k)
    ks = np.kron(N, eye) + np.kron(eye, N)
    kk = k * k
    big2 = np.zeros((2 * kk, 2 * kk))
    big2[:kk, :kk] = ks
    big2[:kk, kk:] = np.eye(kk)
    X = (expm(big2 * d)[:kk, kk:] @ Q.ravel()).reshape(k, k)
    return G, X


__all__ = ["drift_integrals", "drift_integrals_reference", "THETA", "ORDER"]
