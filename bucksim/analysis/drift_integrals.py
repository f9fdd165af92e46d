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

#: Largest ``||N h||_1`` of the base step.
THETA = 0.5
#: Taylor order of the base step.
ORDER = 18


@njit(cache=True)
def _matmul(a, b, out):
    k = a.shape[0]
    for i in range(k):
        for j in range(k):
            out[i, j] = 0.0
        for q in range(k):
            aiq = a[i, q]
            if aiq != 0.0:
                for j in range(k):
                    out[i, j] += aiq * b[q, j]


@njit(cache=True)
def _lyap(N, Y, out):
    """out <- N Y + Y N^T."""
    k = N.shape[0]
    for i in range(k):
        for j in range(k):
            acc = 0.0
            for q in range(k):
                acc += N[i, q] * Y[q, j] + Y[i, q] * N[j, q]
            out[i, j] = acc


@njit(cache=True)
def _base(N, h, Q, P, G, X, w1, w2):
    """Phi, G, X at the base step h, by Horner's rule on their Taylor series."""
    k = N.shape[0]
    for i in range(k):
        for j in range(k):
            P[i, j] = 0.0
            G[i, j] = 0.0
            X[i, j] = Q[i, j]
        P[i, i] = 1.0
        G[i, i] = 1.0
    for r in range(ORDER, 0, -1):
        # P <- I + N h / r P;  G <- I + N h / (r + 1) G;  X <- Q + h / (r + 1) L(X)
        _matmul(N, P, w1)
        for i in range(k):
            for j in range(k):
                P[i, j] = (1.0 if i == j else 0.0) + w1[i, j] * (h / r)
        _matmul(N, G, w1)
        _lyap(N, X, w2)
        for i in range(k):
            for j in range(k):
                G[i, j] = (1.0 if i == j else 0.0) + w1[i, j] * (h / (r + 1))
                X[i, j] = Q[i, j] + w2[i, j] * (h / (r + 1))
    for i in range(k):
        for j in range(k):
            G[i, j] *= h
            X[i, j] *= h


@njit(cache=True)
def drift_integrals(Ns, systems, lengths, Qs, G_out, X_out):
    """``G`` and ``X`` (module docstring) of ``Ns[systems[g]]`` over ``lengths[g]`` with
    ``Qs[g]``, into ``G_out[g]`` and ``X_out[g]``, for every group ``g``."""
    k = Ns.shape[1]
    P = np.empty((k, k))
    G = np.empty((k, k))
    X = np.empty((k, k))
    w1 = np.empty((k, k))
    w2 = np.empty((k, k))
    w3 = np.empty((k, k))
    for g in range(systems.shape[0]):
        N = Ns[systems[g]]
        d = lengths[g]
        norm = 0.0
        for j in range(k):
            col = 0.0
            for i in range(k):
                col += abs(N[i, j])
            norm = max(norm, col)
        h, n_sq = d, 0
        while h * norm > THETA:
            h *= 0.5
            n_sq += 1
        _base(N, h, Qs[g], P, G, X, w1, w2)
        for _ in range(n_sq):
            _matmul(P, G, w1)                   # G <- G + P G
            for i in range(k):
                for j in range(k):
                    G[i, j] += w1[i, j]
            _matmul(P, X, w1)                   # X <- X + P X P^T
            for i in range(k):
                for j in range(k):
                    acc = 0.0
                    for q in range(k):
                        acc += w1[i, q] * P[j, q]
                    w2[i, j] = acc
            for i in range(k):
                for j in range(k):
                    X[i, j] += w2[i, j]
            _matmul(P, P, w3)                   # P <- P P
            for i in range(k):
                for j in range(k):
                    P[i, j] = w3[i, j]
        for i in range(k):
            for j in range(k):
                G_out[g, i, j] = G[i, j]
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
