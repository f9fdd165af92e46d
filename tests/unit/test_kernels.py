"""Kernel-level checks of propagation and event location against scipy (expm, brentq).

The cases here are the hard shapes: repeated and zero eigenvalues, a
crossing pair inside one long interval, the Taylor finish below the table's
last step (the 8th-order series), a function that starts on zero with zero
slope. The one table comparing every kernel with its plain NumPy/SciPy
reference is ``tests/unit/test_kernel_references.py``.
"""

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.optimize import brentq

from bucksim.engine.kernels import advance, find_zero
from bucksim.engine.tables import build_table

T = 2e-6
E_IL = np.array([1.0, 0.0, 0.0])   # event on iL


def lc_matrix(L=4.7e-6, C=47e-6, R=1.0, r=0.01, vin=12.0):
    """Augmented series RLC driven by vin: z = [iL, vC, 1]."""
    return np.array([[-r / L, -1 / L, vin / L],
                     [1 / C, -1 / (R * C), 0.0],
                     [0.0, 0.0, 0.0]])


def critically_damped():
    # Repeated eigenvalue: R = 0.5 sqrt(L/C) with no series loss (circuit theory)
    L, C = 1e-6, 1e-6
    return lc_matrix(L, C, R=0.5 * np.sqrt(L / C), r=0.0)


def nilpotent():
    # Idle state with a current-sink load only: M is nilpotent, expm(M t) = I + M t
    return np.array([[0.0, 0.0, 0.0], [0.0, 0.0, -1.0 / 47e-6], [0.0, 0.0, 0.0]])


@pytest.mark.parametrize("M", [lc_matrix(), critically_damped(), nilpotent()],
                         ids=["underdamped", "critically-damped", "nilpotent"])
@pytest.mark.parametrize("d", [0.0, 1e-12, 3.3e-7, T, 2.7 * T])
def test_advance_matches_expm(M, d):
    """Binary-digit propagation equals a fresh scipy expm to ~1e-13 relative."""
    table = build_table(M[None], T)
    z = np.array([0.3, 1.7, 1.0])
    got = z.copy()
    advance(table.matrices, table.exponentials, table.steps, 0, got, d, np.empty(3))
    want = expm(M * d) @ z
    assert np.allclose(got, want, rtol=1e-13, atol=1e-13 * np.abs(want).max())


def test_find_zero_locates_first_crossing_to_1e12_of_period():
    """Zero of iL on the analytic solution vs brentq on expm (scipy)."""
    # falling current through a diode-like state: vsw = -0.5 V
    L, C = 4.7e-6, 47e-6
    M = np.array([[-0.01 / L, -1 / L, -0.5 / L], [1 / C, -1 / (2.0 * C), 0], [0, 0, 0]])
    table = build_table(M[None], T)
    za = np.array([0.8, 3.3, 1.0])
    zb = expm(M * T) @ za
    tz = find_zero(table.matrices, table.exponentials, table.steps, 0, za.copy(), zb, 0.0, T,
                   1.0, table.guard, np.empty(3), np.empty(3), np.empty(3), E_IL)
    ref = brentq(lambda t: (expm(M * t) @ za)[0], 0, T, xtol=1e-22, rtol=1e-15)
    assert abs(tz - ref) < 1e-12 * T


def test_find_zero_catches_touch_and_return():
    """A crossing pair inside one long interval is not stepped over.

    Undamped LC ringing (circuit theory): iL = I0 cos(w t) - ... crosses zero
    twice within one period of the resonance, ending positive again.
    """
    L, C = 1e-6, 1e-6
    w = 1 / np.sqrt(L * C)
    M = np.array([[0, -1 / L, 0], [1 / C, 0, 0], [0, 0, 0]])
    period = 2 * np.pi / w
    table = build_table(M[None], period)
    za = np.array([1.0, 0.0, 1.0])
    b = 0.95 * period  # iL = cos(w t) is positive again here
    zb = expm(M * b) @ za
    assert zb[0] > 0
    tz = find_zero(table.matrices, table.exponentials, table.steps, 0, za.copy(), zb, 0.0, b,
                   1.0, table.guard, np.empty(3), np.empty(3), np.empty(3), E_IL)
    assert tz == pytest.approx(0.25 * period, rel=1e-12)


@pytest.mark.parametrize("level, ramp", [(0.0, 0.0), (3.3, 0.0), (3.4, 2e5)])
def test_taylor_finish_matches_brentq(level, ramp):
    """Bisection finished by Newton on the 8th-order Taylor series (taylor_gap > 0) lands on
    the same zero as brentq on scipy's expm, to 1e-12 of the period; with a ramp,
    the event is a peak-current comparator iL + ramp t = level."""
    L, C = 4.7e-6, 47e-6
    M = np.array([[-0.01 / L, -1 / L, 5.0 / L], [1 / C, -1 / (0.825 * C), 0], [0, 0, 0]])
    if level == 0.0:
        M[0, 2] = -0.5 / L     # falling current through a diode-like state
        za, sign0 = np.array([0.8, 3.3, 1.0]), 1.0
    else:
        za, sign0 = np.array([3.0, 3.3, 1.0]), -1.0
    table = build_table(M[None], T)
    assert table.taylor_gap > 0
    zb = expm(M * T) @ za

    def g(t):
        return (expm(M * t) @ za)[0] + ramp * t - level

    ref = brentq(g, 0, T, xtol=1e-22, rtol=1e-15)
    z = za.copy()
    tz = find_zero(table.matrices, table.exponentials, table.steps, 0, z, zb, 0.0, T, sign0,
                   table.guard, np.empty(3), np.empty(3), np.empty(3), E_IL, level, ramp, 0.0,
                   level == 0.0, table.taylor_gap)
    assert abs(tz - ref) < 1e-12 * T
    assert np.allclose(z, expm(M * ref) @ za, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("taylor", [False, True])
def test_general_event_row_matches_brentq(taylor):
    """An event on a combination of states (an analog comparator: a ramp crossing
    a weighted sum of the states, here 2 vC - 0.5 iL) lands on brentq's zero on
    scipy's expm to 1e-12 of the period, with and without the Taylor finish."""
    L, C = 4.7e-6, 47e-6
    M = np.array([[-0.01 / L, -1 / L, 5.0 / L], [1 / C, -1 / (0.825 * C), 0], [0, 0, 0]])
    za = np.array([1.0, 3.0, 1.0])
    c = np.array([-0.5, 2.0, 0.0])
    ramp, level = 4e6, 6.0
    table = build_table(M[None], T)
    zb = expm(M * T) @ za

    def g(t):
        return c @ (expm(M * t) @ za) + ramp * t - level

    assert g(0.0) < 0 < g(T)
    ref = brentq(g, 0, T, xtol=1e-22, rtol=1e-15)
    z = za.copy()
    tz = find_zero(table.matrices, table.exponentials, table.steps, 0, z, zb, 0.0, T, -1.0,
                   table.guard, np.empty(3), np.empty(3), np.empty(3), c, level, ramp, 0.0,
                   False, table.taylor_gap if taylor else 0.0)
    assert abs(tz - ref) < 1e-12 * T
    assert np.allclose(z, expm(M * ref) @ za, rtol=1e-12, atol=1e-12)


def test_event_already_at_zero_with_flat_start_is_found_at_the_start():
    """An event function that starts exactly at zero with zero slope and then
    leaves its side (here vC of an LC tank released with iL = 0: vC' = 0, vC'' < 0,
    circuit theory) has its first zero at the start: the search must not run on to
    the end of the bracket, which is where a stale integrator limit came from."""
    L, C = 1e-6, 1e-6
    M = np.array([[0, -1 / L, 0], [1 / C, 0, 0], [0, 0, 0]])
    table = build_table(M[None], T)
    za = np.array([0.0, 1.0, 1.0])
    b = 0.05 * T
    zb = expm(M * b) @ za
    assert zb[1] < 1.0
    c = np.array([0.0, 1.0, 0.0])
    for gap in (0.0, table.taylor_gap):
        z = za.copy()
        tz = find_zero(table.matrices, table.exponentials, table.steps, 0, z, zb, 0.0, b, 1.0,
                       table.guard, np.empty(6), np.empty(3), np.empty(3), c, 1.0, 0.0, 0.0,
                       False, gap)
        assert tz == 0.0 and np.array_equal(z, za)
