"""Every numba kernel of the engine against a plain NumPy/SciPy reference, in one table.

Each row names a kernel, a reference written plainly with NumPy and SciPy
(``scipy.linalg.expm`` for the exact solution, ``scipy.optimize.brentq`` for
zeros, ``numpy.roots`` for polynomial roots), an argument builder and the
tolerance of the comparison, in the manner of numbagg's table-driven kernel
tests. The systems are textbook circuits (series RLC, an LC tank, a
critically damped RLC with a repeated eigenvalue, a nilpotent idle state:
circuit theory), so the exact answers are known independently of the engine.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.optimize import brentq

from bucksim.engine import kernels, propagation
from bucksim.engine.tables import TAYLOR_ORDER, build_table

T = 2e-6


def rlc(L=4.7e-6, C=47e-6, R=0.825, r=0.01, vsw=5.0):
    """Augmented series RLC driven by ``vsw``: z = [iL, vC, 1] (circuit theory)."""
    return np.array([[-r / L, -1 / L, vsw / L], [1 / C, -1 / (R * C), 0.0], [0.0, 0.0, 0.0]])


def lc_tank(L=1e-6, C=1e-6):
    return np.array([[0.0, -1 / L, 0.0], [1 / C, 0.0, 0.0], [0.0, 0.0, 0.0]])


def critically_damped(L=1e-6, C=1e-6):
    # R = 0.5 sqrt(L/C) across C, no series loss: a repeated eigenvalue
    return rlc(L, C, R=0.5 * np.sqrt(L / C), r=0.0, vsw=1.0)


def nilpotent():
    # idle with a current-sink load: M^2 = 0, expm(M t) = I + M t
    return np.array([[0.0, 0.0, 0.0], [0.0, 0.0, -1.0 / 47e-6], [0.0, 0.0, 0.0]])


SYSTEMS = {"rlc": rlc(), "tank": lc_tank(), "critical": critically_damped(),
           "nilpotent": nilpotent()}
Z0 = np.array([0.8, 3.3, 1.0])


def table_of(M, period=T):
    return build_table(M[None], period)


# ----------------------------------------------------------------------------- references

def ref_advance(M, z, d):
    """The exact solution: expm(M d) z (scipy)."""
    return expm(M * d) @ z


def ref_taylor(M, z, u):
    """The truncated series sum_{j <= TAYLOR_ORDER} (M u)^j / j! z, term by term."""
    out = np.zeros_like(z)
    term = z.copy()
    for j in range(TAYLOR_ORDER + 1):
        out = out + term
        term = (M * u) @ term / (j + 1)
    return out


def ref_first_zero(M, z, c, level, ramp, t_ref, a, b):
    """First zero of c . expm(M t) z + ramp (t - t_ref) - level in (a, b]: brentq on a
    bracket found by a fine scan of the exact solution."""
    def g(t):
        return c @ (expm(M * (t - a)) @ z) + ramp * (t - t_ref) - level

    ts = np.linspace(a, b, 801)
    vals = np.array([g(t) for t in ts])
    start = np.sign(vals[0])
    k = int(np.argmax(np.sign(vals) != start))
    assert k > 0, "reference: no crossing in the interval"
    return brentq(g, ts[k - 1], ts[k], xtol=1e-22, rtol=1e-15)


def ref_polynomial_zero(g, gap):
    """Smallest real root of sum_j g[j] u^j in [0, gap] (numpy.roots on the reversed
    coefficients)."""
    roots = np.roots(g[::-1])
    real = roots[np.abs(roots.imag) <= 1e-9 * max(gap, 1e-300)].real
    inside = real[(real >= 0.0) & (real <= gap)]
    return float(np.min(inside))


# ----------------------------------------------------------------------------- the table

@dataclass
class Row:
    """One kernel, its reference, the arguments of a case, the tolerance."""

    name: str
    kernel: Callable       # args -> value
    reference: Callable    # args -> value
    cases: Callable        # () -> list of (case id, args)
    rtol: float
    atol_scale: float      # atol = atol_scale * max|reference|

    def compare(self, got, want):
        got, want = np.asarray(got, float), np.asarray(want, float)
        atol = self.atol_scale * max(float(np.max(np.abs(want))), 1e-300)
        np.testing.assert_allclose(got, want, rtol=self.rtol, atol=atol,
                                   err_msg=f"{self.name} against its reference")


def run_advance(args):
    M, z, d = args
    tab = table_of(M)
    out = z.copy()
    propagation.advance(tab.matrices, tab.exponentials, tab.steps, 0, out, d, np.empty(6))
    return out


def cases_advance():
    return [(f"{name}-{d:.3g}", (M, Z0, d)) for name, M in SYSTEMS.items()
            for d in (0.0, 1e-12, 3.3e-7, T, 2.7 * T)]


def run_taylor(args):
    M, z, u = args
    out = z.copy()
    propagation.taylor_step(M[None], 0, out, u, np.empty(6))
    return out


def run_taylor3(args):
    M, z, u = args
    out = z.copy()
    propagation.taylor_step3(M[None], 0, out, u)
    return out


def cases_taylor():
    # steps inside the series' reach (h ||A|| <= 0.05) and beyond it (the series
    # itself, not the exponential, is the reference)
    out = []
    for name, M in SYSTEMS.items():
        norm = max(np.max(np.sum(np.abs(M[:-1, :-1]), axis=1)), 1.0 / T)
        for x in (0.01, 0.05, 0.5):
            out.append((f"{name}-{x}", (M, Z0, x / norm)))
    return out


def run_apply(args):
    M, z, k = args
    tab = table_of(M)
    out = z.copy()
    propagation.apply(tab.exponentials, 0, k, out, np.empty(6))
    return out


def ref_apply(args):
    M, z, k = args
    return expm(M * T * 2.0 ** -k) @ z


def cases_apply():
    # the first, a middle and the last level of each system's table
    out = []
    for name, M in SYSTEMS.items():
        K = table_of(M).steps.shape[0]
        out += [(f"{name}-k{k}", (M, Z0, k)) for k in sorted({0, K // 2, K - 1})]
    return out


def zero_cases():
    """Crossings of general rows: zero current through a diode-like state, a
    peak-current comparator with a ramp, an analog comparator on a state mix, the
    tank's first zero after a touch-and-return shape."""
    diode = rlc(vsw=-0.5)
    on = rlc(vsw=5.0)
    e_il = np.array([1.0, 0.0, 0.0])
    mix = np.array([-0.5, 2.0, 0.0])
    tank = lc_tank()
    period = 2 * np.pi * np.sqrt(1e-6 * 1e-6)
    return [
        ("zero-current", (diode, Z0, e_il, 0.0, 0.0, 0.0, 0.0, T, 1.0, T)),
        ("peak-comparator", (on, np.array([3.0, 3.3, 1.0]), e_il, 3.4, 2e5, 0.0, 0.0, T, -1.0, T)),
        ("analog-comparator", (on, np.array([1.0, 3.0, 1.0]), mix, 6.0, 4e6, 0.0, 0.0, T, -1.0,
                               T)),
        ("tank-ringing", (tank, np.array([1.0, 0.0, 1.0]), e_il, 0.0, 0.0, 0.0, 0.0,
                          0.95 * period, 1.0, period)),
    ]


def run_find_zero(args):
    M, z, c, level, ramp, t_ref, a, b, sign0, period = args
    tab = table_of(M, period)
    za = z.copy()
    zb = expm(M * (b - a)) @ z
    tz = kernels.find_zero(tab.matrices, tab.exponentials, tab.steps, 0, za, zb, a, b, sign0,
                           tab.guard, np.empty(6), np.empty(3), np.empty(3), c, level, ramp,
                           t_ref, False, tab.taylor_gap)
    return [tz, *za]


def ref_find_zero(args):
    M, z, c, level, ramp, t_ref, a, b, _, _ = args
    tz = ref_first_zero(M, z, c, level, ramp, t_ref, a, b)
    return [tz, *(expm(M * (tz - a)) @ z)]


def taylor_zero_cases():
    """Brackets below the table's last step, where the Taylor polynomial finishes."""
    out = []
    for case, args in zero_cases()[:3]:
        M, z, c, level, ramp, t_ref, a, b, sign0, period = args
        tz = ref_first_zero(M, z, c, level, ramp, t_ref, a, b)
        gap = table_of(M, period).taylor_gap
        start = tz - 0.4 * gap
        out.append((case, (M, expm(M * (start - a)) @ z, c, level, ramp, t_ref, start, gap,
                           sign0)))
    return out


def run_taylor_zero(args):
    M, z, c, level, ramp, t_ref, t, gap, sign0 = args
    out = z.copy()
    tz = kernels.taylor_zero(M[None], 0, out, t, gap, c, level, ramp, t_ref, False,
                             np.empty(6), np.empty((kernels.TAYLOR_ORDER + 1, out.size + 1)),
                             sign0)
    return [tz, *out]


def ref_taylor_zero(args):
    M, z, c, level, ramp, t_ref, t, gap, _ = args
    tz = ref_first_zero(M, z, c, level, ramp, t_ref, t, t + gap)
    return [tz, *(expm(M * (tz - t)) @ z)]


def polynomial_cases():
    rng = np.random.default_rng(12)
    out = []
    for i in range(4):
        roots = np.sort(rng.uniform(0.1, 3.0, size=3))
        g = np.zeros(TAYLOR_ORDER + 1)
        g[:4] = np.polynomial.polynomial.polyfromroots(roots) * (1.0 if i % 2 else -2.0)
        g[4:] = 1e-6 * rng.standard_normal(TAYLOR_ORDER - 3)   # small higher terms
        gap = 0.5 * (roots[0] + roots[1])                      # one root inside
        out.append((f"cubic-{i}", (g, gap)))
    return out


def run_polynomial_zero(args):
    g, gap = args
    return kernels.polynomial_zero(g, gap, 1.0 if g[0] > 0 else -1.0)


def ref_polynomial(args):
    return ref_polynomial_zero(*args)


def evaluate_cases():
    M = np.array([rlc(vsw=5.0), rlc(vsw=-0.5)])
    x0 = np.array([[0.2, 3.0], [1.1, 3.4], [0.6, 3.3]])
    systems = np.array([0, 1, 0], dtype=np.int32)
    index = np.array([0, 0, 1, 2, 2], dtype=np.int64)
    tau = np.array([0.0, 0.3 * T, T, 1e-12, 2.5 * T])
    return [("three-segments", (M, systems, x0, index, tau))]


def run_evaluate(args):
    M, systems, x0, index, tau = args
    tab = build_table(M, T)
    out = np.empty((index.shape[0], 3))
    kernels.evaluate(tab.matrices, tab.exponentials, tab.steps, systems, x0, index, tau, out)
    return out


def ref_evaluate(args):
    M, systems, x0, index, tau = args
    return np.array([expm(M[systems[k]] * u) @ np.append(x0[k], 1.0)
                     for k, u in zip(index, tau, strict=True)])


def crossing_cases():
    M = rlc()
    z = np.array([0.7, 3.1, 1.0])
    return [("value", (M, z, np.array([-0.5, 2.0, 0.0]), 1.5e-6, 6.0, 4e6, 0.2e-6))]


def run_crossing(args):
    M, z, c, t, level, ramp, t_ref = args
    return [kernels.crossing_value(c, z, t, level, ramp, t_ref),
            kernels.crossing_slope(M[None], 0, c, z, ramp)]


def ref_crossing(args):
    M, z, c, t, level, ramp, t_ref = args
    return [c @ z + ramp * (t - t_ref) - level, c @ (M @ z) + ramp]


TABLE = [
    Row("advance", run_advance, lambda a: ref_advance(*a), cases_advance, 1e-13, 1e-13),
    Row("taylor_step", run_taylor, lambda a: ref_taylor(*a), cases_taylor, 1e-14, 1e-15),
    Row("taylor_step3", run_taylor3, lambda a: ref_taylor(*a), cases_taylor, 1e-14, 1e-15),
    Row("apply", run_apply, ref_apply, cases_apply, 1e-13, 1e-13),
    Row("find_zero", run_find_zero, ref_find_zero, zero_cases, 1e-11, 1e-12),
    Row("taylor_zero", run_taylor_zero, ref_taylor_zero, taylor_zero_cases, 1e-12, 1e-12),
    Row("polynomial_zero", run_polynomial_zero, ref_polynomial, polynomial_cases, 1e-12, 1e-14),
    Row("evaluate", run_evaluate, ref_evaluate, evaluate_cases, 1e-13, 1e-13),
    Row("crossing_value/slope", run_crossing, ref_crossing, crossing_cases, 1e-14, 1e-15),
]

PARAMS = [pytest.param(row, args, id=f"{row.name}:{case}")
          for row in TABLE for case, args in row.cases()]


@pytest.mark.parametrize("row, args", PARAMS)
def test_kernel_matches_its_reference(row, args):
    row.compare(row.kernel(args), row.reference(args))


def test_every_kernel_has_a_row():
    """The table covers the engine's numerical kernels (a new kernel needs a row)."""
    named = {row.name for row in TABLE}
    for kernel in ("advance", "taylor_step", "taylor_step3", "apply", "find_zero",
                   "taylor_zero", "polynomial_zero", "evaluate"):
        assert kernel in named


def test_the_comparison_catches_a_kernel_off_by_one_part_in_a_billion():
    """The harness can fail: a kernel whose result is 1e-9 off (relative) is refused."""
    row = TABLE[0]
    args = cases_advance()[3][1]
    want = row.reference(args)
    with pytest.raises(AssertionError):
        row.compare(want * (1.0 + 1e-9), want)


def test_taylor_reference_is_the_exponential_inside_its_reach():
    """Inside the series' reach (h ||A|| <= 0.05) the truncated series is the
    exponential to rounding: the first omitted term is 0.05**9 / 9! ~ 5e-18 relative."""
    assert 0.05 ** (TAYLOR_ORDER + 1) / math.factorial(TAYLOR_ORDER + 1) < 1e-17
    M = rlc()
    u = 0.05 / np.max(np.sum(np.abs(M[:-1, :-1]), axis=1))
    np.testing.assert_allclose(ref_taylor(M, Z0, u), expm(M * u) @ Z0, rtol=1e-15, atol=1e-15)
