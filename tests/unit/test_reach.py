"""The proven reach of the third-derivative bound against the cubic's roots.

``reach3(f, s1, s2, B3)`` is the distance over which ``p(u) = f + s1 u + s2 u^2 / 2 -
B3 u^3 / 6`` stays positive (Taylor's theorem with ``|f'''| <= B3``): it must never
pass the first positive root of ``p`` (a proof needs a lower bound) and should lie
just below it. Reference: the roots of the same cubic by ``numpy.roots`` (companion
matrix eigenvalues), a route that shares nothing with the bracketing in the kernel.
"""

from __future__ import annotations

import numpy as np
import pytest

from bucksim.engine.bounds import REACH_RTOL, reach3


def _first_root(f, s1, s2, B3):
    """The first positive real root of p, or inf (numpy.roots on the cubic)."""
    coef = [-B3 / 6.0, s2 / 2.0, s1, f]
    while coef and coef[0] == 0.0:
        coef = coef[1:]
    roots = np.roots(coef) if len(coef) > 1 else np.array([])
    real = roots[np.abs(roots.imag) <= 1e-9 * np.abs(roots)].real
    pos = real[real > 0.0]
    return float(pos.min()) if pos.size else np.inf


NAMED = [
        # (f, s1, s2, B3) on the scales of an event function in a switching period:
        # volts or amperes, per ns and per ns^2
        (0.7, -3e8, 1e16, 4e25),       # a node slewing towards its clamp
        (0.7, 3e8, -1e17, 4e25),       # heading away, curving back
        (1e-9, -1.0, 0.0, 1e20),       # just above zero, heading down
        (2.0, 0.0, 0.0, 1e24),         # an extremum: the cubic term alone
        (3.3, 5.0, 1e9, 0.0),          # no bound on the third derivative needed
        (1.0, -2.0, 0.0, 0.0),         # a straight line down
        (1.0, 0.0, -4.0, 0.0),         # a parabola down
]


def _check(f, s1, s2, B3):
    got = reach3(f, s1, s2, B3)
    want = _first_root(f, s1, s2, B3)
    if not np.isfinite(want):
        assert got > 0.0
        return
    # never past the root (to numpy.roots' own rounding), and close below it
    assert got <= want * (1.0 + 1e-9)
    assert got >= want * (1.0 - 1e3 * REACH_RTOL)
    u = got * (1.0 - 1e-12)
    assert f + u * (s1 + u * (0.5 * s2 - u * B3 / 6.0)) > -1e-12 * f


@pytest.mark.parametrize("case", NAMED)
def test_reach_is_a_lower_bound_just_below_the_first_root(case):
    _check(*case)


def test_reach_on_random_cubics():
    # 500 cubics over the scales above (seeded: the same cases on every machine)
    rng = np.random.default_rng(2026)
    for _ in range(500):
        _check(10 ** rng.uniform(-9, 1), rng.choice([-1, 1]) * 10 ** rng.uniform(0, 9),
               rng.choice([-1, 1]) * 10 ** rng.uniform(8, 17), 10 ** rng.uniform(18, 27))


def test_no_bound_means_no_reach():
    assert reach3(1.0, -1.0, 0.0, np.inf) == 0.0
