"""The compiled small-matrix exponential against 40-digit arithmetic and scipy.

References: ``mpmath.expm`` at 40 significant digits (mpmath is sympy's numeric
library) as the arbiter, and ``scipy.linalg.expm``. Matrices: random ones of
sizes 3 to 32 over norms 1e-3 to 3e2, and augmented buck-stage systems (numbers
our own) over the table's steps.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from scipy.linalg import expm

from bucksim.engine.small_expm import expm_many


def _exact(A):
    with mpmath.workdps(40):
        return np.array(mpmath.expm(mpmath.matrix(A.tolist())).tolist(), dtype=float)


@pytest.mark.parametrize("n", [3, 4, 6, 16])
@pytest.mark.parametrize("scale", [1e-3, 0.3, 3.0, 30.0, 300.0])
def test_random_matrices_against_forty_digits(n, scale):
    rng = np.random.default_rng(n * 1000 + int(scale * 10))
    A = rng.standard_normal((3, n, n)) * scale / np.sqrt(n)
    got = expm_many(A)
    for a, g in zip(A, got, strict=True):
        ref = _exact(a)
        err = np.abs(g - ref).max() / np.abs(ref).max()
        # rounding grows with the squarings (one per doubling of the norm past 5.4)
        assert err < 64 * np.finfo(float).eps * max(1.0, scale), (n, scale, err)


def test_stage_systems_over_the_table_steps_agree_with_scipy():
    L, C, R, vin = 2.2e-6, 47e-6, 1.2, 12.0
    M = np.zeros((3, 3))
    M[:2, :2] = [[-0.01 / L, -1 / L], [1 / C, -1 / (R * C)]]
    M[0, 2] = vin / L
    steps = 2e-6 * 2.0 ** -np.arange(12)
    got = expm_many(np.repeat(M[None], steps.size, axis=0), steps)
    for h, g in zip(steps, got, strict=True):
        ref = expm(M * h)
        assert np.allclose(g, ref, rtol=1e-13, atol=1e-13 * np.abs(ref).max())


def test_refuses_what_it_cannot_take():
    with pytest.raises(ValueError, match="square"):
        expm_many(np.zeros((2, 3, 4)))
    with pytest.raises(ValueError, match="finite"):
        expm_many(np.full((1, 2, 2), np.nan))
    assert expm_many(np.zeros((0, 3, 3))).shape == (0, 3, 3)


def test_large_matrices_go_to_scipy():
    from bucksim.engine.small_expm import LARGEST
    A = np.random.default_rng(3).standard_normal((2, LARGEST + 1, LARGEST + 1)) * 0.2
    got = expm_many(A, [1.0, 0.5])
    assert np.array_equal(got[0], expm(A[0])) and np.array_equal(got[1], expm(A[1] * 0.5))


def test_a_wild_norm_goes_to_scipy():
    # a capacitance of 1e-300 F in a stage matrix: far past any physical stage
    A = np.array([[[-1e3, -1e5], [1e300, -1e300]]])
    with np.errstate(all="ignore"):
        ref = expm(A[0] * 1e-6)
        got = expm_many(A, 1e-6)[0]
    assert np.array_equal(np.isfinite(got), np.isfinite(ref))
    assert np.array_equal(got[np.isfinite(got)], ref[np.isfinite(ref)])


def test_a_badly_scaled_open_node_entry_by_entry():
    # the open switch node (z = [iL, vC, vn, 1]; L = 2.2 uH, C = 47 uF, Cn = 300 pF,
    # 2 ohm load, 5 ohm node resistance): entries from 1/RC ~ 1e4 to 1/Cn ~ 3e9, so a
    # norm-wise accurate exponential can still miss the small couplings; the balancing
    # keeps every entry to 1e-12 of 40-digit arithmetic
    L, C, Cn, R, Rn = 2.2e-6, 47e-6, 300e-12, 2.0, 5.0
    M = np.zeros((4, 4))
    M[0, :3] = [-Rn / L, -1 / L, 1 / L]
    M[1, :2] = [1 / C, -1 / (R * C)]
    M[2, 0] = -1 / Cn
    for h in (2e-6, 2e-6 / 8, 2e-6 / 1024):
        ref = _exact(M * h)
        got = expm_many(M[None], h)[0]
        big = np.abs(ref) > 1e-300
        assert np.all(np.abs(got - ref)[big] <= 1e-12 * np.abs(ref)[big]), h
