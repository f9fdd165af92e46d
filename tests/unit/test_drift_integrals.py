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


def _compiled(A, d, Qf):
    """(H, X_yy) by the kernel for N = _drift(A), Q = [[0, 0], [0, Qf]]."""
    H, X = np.empty((1,) + A.shape), np.empty((1,) + A.shape)
    drift_integrals(A[None], np.zeros(1, dtype=np.int64), np.array([d]), Qf[None], H, X)
    return H[0], X[0]


def _reference(A, d, Qf):
    """(H, X_yy) from Van Loan's blocks of the whole drift system."""
    n = A.shape[0]
    Q = np.zeros((2 * n, 2 * n))
    Q[n:, n:] = Qf
    G, X = drift_integrals_reference(_drift(A), d, Q)
    return G[:n, n:], X[:n, :n]


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
    rng = np.random.default_rng(3)
    F = rng.normal(size=(5, A.shape[0]))
    Qf = F.T @ F
    H, X = _compiled(A, d, Qf)
    H_ref, X_ref = _reference(A, d, Qf)
    assert np.allclose(H, H_ref, rtol=1e-10, atol=1e-12 * np.abs(H_ref).max())
    assert np.allclose(X, X_ref, rtol=1e-10, atol=1e-11 * np.abs(X_ref).max())


@pytest.mark.parametrize("name", ["lc over a period", "stiff pole", "unstable"])
def test_against_quadrature(name):
    A, d = CASES[name]
    n = A.shape[0]
    N = _drift(A)
    f0 = np.linspace(1.0, 2.0, n)
    v0 = np.concatenate((np.zeros(n), f0))
    _, X = _compiled(A, d, np.outer(f0, f0))

    def integrand(t):
        y = (expm(N * t) @ v0)[:n]
        return np.outer(y, y)

    ref, _ = quad_vec(integrand, 0.0, d, epsabs=0.0, epsrel=1e-12, limit=2000)
    assert np.allclose(X, ref, rtol=1e-9, atol=1e-11 * np.abs(ref).max())


def test_zero_drive_and_zero_length_are_exact():
    A = _lc_stage()
    H, X = _compiled(A, 1e-6, np.zeros_like(A))
    assert np.all(X == 0.0)
    H, X = _compiled(A, 0.0, np.eye(2))
    assert np.all(H == 0.0) and np.all(X == 0.0)


def test_many_groups_equal_each_alone():
    As = np.array([_lc_stage(), _lc_stage(R=0.5)])
    systems = np.array([0, 1, 0, 1], dtype=np.int64)
    lengths = np.array([1e-6, 2e-6, 3e-7, 0.0])
    rng = np.random.default_rng(11)
    Qs = np.array([(lambda f: f.T @ f)(rng.normal(size=(3, 2))) for _ in range(4)])
    H, X = np.empty_like(Qs), np.empty_like(Qs)
    drift_integrals(As, systems, lengths, Qs, H, X)
    for g in range(4):
        Hg, Xg = _compiled(As[systems[g]], lengths[g], Qs[g])
        assert np.array_equal(H[g], Hg) and np.array_equal(X[g], Xg)
