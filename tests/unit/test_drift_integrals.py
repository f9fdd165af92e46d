"""The moments' compiled integrals against Van Loan's block exponentials and quadrature.

References: C. F. Van Loan, "Computing integrals involving the matrix exponential",
IEEE Trans. Automatic Control 23(3), 1978 (``G`` and ``X`` as blocks of one
exponential, by ``scipy.linalg.expm``); ``scipy.integrate.quad_vec`` on
``scipy.linalg.expm`` for a route that shares nothing with either.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad_vec
from scipy.linalg import expm

from bucksim.analysis.drift_integrals import drift_integrals, drift_integrals_reference


def _drift(A):
    """N = [[A, I], [0, 0]], the moments' drift system."""
    n = A.shape[0]
    N = np.zeros((2 * n, 2 * n))
    N[:n, :n] = A
    N[:n, n:] = np.eye(n)
    return N


def _compiled(N, d, Q):
    G, X = np.empty((1,) + N.shape), np.empty((1,) + N.shape)
    drift_integrals(N[None], np.zeros(1, dtype=np.int64), np.array([d]), Q[None], G, X)
    return G[0], X[0]


def _lc_stage(L=330e-9, C=880e-6, R=0.05, r=3e-3):
    """iL, vC of a buck's output filter into a resistor (numbers our own)."""
    return np.array([[-r / L, -1 / L], [1 / C, -1 / (R * C)]])


CASES = {
    # length [s]: one switching period, and a long stretch of many ring periods
    "lc over a period": (_lc_stage(), 1e-6),
    "lc over 200 periods": (_lc_stage(), 2e-4),
    # a stiff pole (1e10 /s) beside the LC ring over a period: e^{-N d} would be e^4343
    "stiff pole": (np.array([[-3e3, -3e6, 0.0], [1.1e3, -20.0, 0.0], [0.0, 1e9, -1e10]]),
                   1e-6),
    # an undamped ring and an integrator (eigenvalue 0): no inverse anywhere
    "lossless ring with integrator": (np.array([[0.0, -1e6, 0.0], [1e6, 0.0, 0.0],
                                                [0.0, 1.0, 0.0]]), 3e-5),
    # a growing mode (a negative resistance behind a filter)
    "unstable": (np.array([[2e4, -1e5], [1e5, 1e3]]), 5e-5),
}


@pytest.mark.parametrize("name", list(CASES))
def test_against_van_loan_blocks(name):
    A, d = CASES[name]
    N = _drift(A)
    rng = np.random.default_rng(3)
    F = rng.normal(size=(5, N.shape[0]))
    Q = F.T @ F
    G, X = _compiled(N, d, Q)
    G_ref, X_ref = drift_integrals_reference(N, d, Q)
    assert np.allclose(G, G_ref, rtol=1e-10, atol=1e-12 * np.abs(G_ref).max())
    assert np.allclose(X, X_ref, rtol=1e-10, atol=1e-11 * np.abs(X_ref).max())


@pytest.mark.parametrize("name", ["lc over a period", "stiff pole", "unstable"])
def test_against_quadrature(name):
    A, d = CASES[name]
    N = _drift(A)
    v = np.linspace(1.0, 2.0, N.shape[0])
    Q = np.outer(v, v)
    _, X = _compiled(N, d, Q)

    def integrand(t):
        e = expm(N * t) @ v
        return np.outer(e, e)

    ref, _ = quad_vec(integrand, 0.0, d, epsabs=0.0, epsrel=1e-12, limit=2000)
    assert np.allclose(X, ref, rtol=1e-9, atol=1e-11 * np.abs(ref).max())


def test_zero_drive_and_zero_length_are_exact():
    N = _drift(_lc_stage())
    G, X = _compiled(N, 1e-6, np.zeros_like(N))
    assert np.all(X == 0.0)
    G, X = _compiled(N, 0.0, np.eye(N.shape[0]))
    assert np.all(G == 0.0) and np.all(X == 0.0)


def test_many_groups_equal_each_alone():
    N1, N2 = _drift(_lc_stage()), _drift(_lc_stage(R=0.5))
    Ns = np.array([N1, N2])
    systems = np.array([0, 1, 0, 1], dtype=np.int64)
    lengths = np.array([1e-6, 2e-6, 3e-7, 0.0])
    rng = np.random.default_rng(11)
    Qs = np.array([(lambda f: f.T @ f)(rng.normal(size=(3, 4))) for _ in range(4)])
    G, X = np.empty_like(Qs), np.empty_like(Qs)
    drift_integrals(Ns, systems, lengths, Qs, G, X)
    for g in range(4):
        Gg, Xg = _compiled(Ns[systems[g]], lengths[g], Qs[g])
        assert np.array_equal(G[g], Gg) and np.array_equal(X[g], Xg)
