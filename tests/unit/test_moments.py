"""Exact segment moments against independent quadrature, one segment and many at once.

Reference: ``int_0^d z z^T dt`` with ``z(t) = expm(M t) z0`` by adaptive
quadrature of the matrix exponential (``scipy.integrate.quad_vec`` on
``scipy.linalg.expm``), a route that shares nothing with the Van Loan blocks.
"""

from __future__ import annotations

import numpy as np
from scipy.integrate import quad_vec
from scipy.linalg import expm

from bucksim.analysis.moments import SegmentMoments


def _systems():
    """Two damped LC-like augmented systems (z = [iL, vC, 1]), numbers our own."""
    L, C, R = 4.7e-6, 100e-6, 5.0
    out = []
    for vin, rds in ((12.0, 0.01), (0.0, 0.02)):
        A = np.array([[-rds / L, -1 / L], [1 / C, -1 / (R * C)]])
        M = np.zeros((3, 3))
        M[:2, :2] = A
        M[0, 2] = vin / L
        out.append(M)
    return np.array(out)


def _quad(M, z0, d):
    val, _ = quad_vec(lambda t: np.outer(expm(M * t) @ z0, expm(M * t) @ z0), 0.0, d,
                      epsabs=0.0, epsrel=1e-13)
    return val


def test_one_segment_against_quadrature():
    Ms = _systems()
    mom = SegmentMoments(Ms)
    z0 = np.array([1.3, 3.2, 1.0])
    for s, d in ((0, 6e-7), (1, 1.4e-6)):
        got = mom.second(s, z0, d)
        ref = _quad(Ms[s], z0, d)
        assert np.allclose(got, ref, rtol=1e-11, atol=1e-13 * np.abs(ref).max())


def test_many_segments_at_once_equal_the_sum_of_each():
    rng = np.random.default_rng(7)
    Ms = _systems()
    mom = SegmentMoments(Ms)
    n = 40
    systems = rng.integers(0, 2, n)
    lengths = np.where(systems == 0, 6e-7, 1.4e-6)
    # lengths that differ by one spacing of doubles share their blocks
    lengths[::3] = np.nextafter(lengths[::3], 1.0)
    z0s = np.column_stack((rng.uniform(0.5, 2.0, n), rng.uniform(3.0, 3.4, n), np.ones(n)))
    S = mom.second_sums(systems, z0s, lengths, 2, time_scale=4e-5)
    ref = np.zeros_like(S)
    for s, z0, d in zip(systems, z0s, lengths, strict=True):
        ref[s] += _quad(Ms[s], z0, d)
    assert np.allclose(S, ref, rtol=1e-11, atol=1e-13 * np.abs(ref).max())
    assert mom.last_groups == 2           # one block per system: the ulp apart merged
    assert mom.second_sums(systems[:0], z0s[:0], lengths[:0], 2).shape == (2, 3, 3)


def test_a_stage_with_its_node_against_quadrature():
    """Four states (iL, vC, the node's voltage and an input cell's), a stiff node pole
    beside the LC ring and a constant drive; numbers our own."""
    A = np.array([[-1e4, -3e6, 3e6, 0.0],
                  [1.1e3, -20.0, 0.0, 0.0],
                  [-6e8, 0.0, -5e7, 5e7],
                  [0.0, 0.0, 2e5, -4e5]])
    M = np.zeros((5, 5))
    M[:4, :4] = A
    M[3, 4] = 4e5 * 12.0
    mom = SegmentMoments(M[None])
    z0 = np.array([2.0, 3.3, 0.4, 11.9, 1.0])
    for d in (3e-8, 1.3e-6):
        got = mom.second(0, z0, d)
        ref = _quad(M, z0, d)
        assert np.allclose(got, ref, rtol=1e-10, atol=1e-12 * np.abs(ref).max())
        S = mom.second_sums(np.zeros(3, dtype=np.int64), np.array([z0, 0.5 * z0 + 0.5, z0]),
                            np.full(3, d), 1)
        ref3 = 2 * ref + _quad(M, 0.5 * z0 + 0.5, d)
        assert np.allclose(S[0], ref3, rtol=1e-10, atol=1e-12 * np.abs(ref3).max())
