"""The pieces written once and shared: the shooting core, the zero-current rule and the
evaluation of a run inside its segments.

Sources, beside each check:

* Newton's method: exact in one step on an affine map; quadratic convergence near a
  simple root, ``e_{k+1} ~ f''/(2 f') e_k^2`` (Heron's square root is Newton on
  ``x^2 - 2``); the full step diverges on ``arctan`` from ``|x0| > 1.39`` and a
  backtracking line search cures it (Dennis & Schnabel, *Numerical Methods for
  Unconstrained Optimization and Nonlinear Equations*, SIAM 1996, ch. 2 and 6).
* The fixed-point iteration of a contraction with constant ``q`` converges, and
  ``|x_k - x*| <= q / (1 - q) |x_k - x_{k-1}|`` (Banach's fixed-point theorem, a
  posteriori bound); the fixed point of ``x = 0.5 cos x`` from scipy's ``brentq``.
* Which conduction states end at zero current: a diode conducts one way only; diode
  emulation turns the low-side channel off at zero current, forced PWM lets it carry
  current both ways (common practice). Checked against the rule and against the
  engine's cycle loop, which writes the rule out on its own.
* The state inside a segment is ``expm(M tau) z0`` (``scipy.linalg.expm``).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.optimize import brentq

import bucksim
from bucksim.analysis.segments import segment_states, segment_values
from bucksim.model.parts import STRATEGIES
from bucksim.model.stage import (
    HIGH,
    HIGH_DIODE,
    IDLE,
    LOW,
    LOW_DIODE,
    clamp_current,
    zero_current_states,
)
from bucksim.steady.newton import settle, shoot
from bucksim.steady.result import STEADY_FAILED, STEADY_FALLBACK, STEADY_OK
from tests.references.stage_solver import buck_scenario

# ----------------------------------------------------------------------------- the shooting core


class Recorded:
    """A map ``P(x) = x + F(x)`` that records every point it is evaluated at."""

    def __init__(self, residual_fn):
        self.F = residual_fn
        self.points = []

    def __call__(self, x):
        self.points.append(np.array(x, dtype=float))
        return x + self.F(x), None


def _unit_scale(x, x1, aux):
    return np.ones_like(x)


def test_affine_map_is_solved_by_one_newton_update():
    """Newton is exact on an affine map (textbook): P(x) = A x + b, x* = (I - A)^-1 b."""
    A = np.array([[0.3, 0.2], [-0.1, 0.6]])
    b = np.array([1.0, -2.0])
    x_star = np.linalg.solve(np.eye(2) - A, b)
    shot = shoot(lambda x: (A @ x + b, None), [10.0, 10.0],
                 jacobian=lambda x, x1, aux, s: A, scale=_unit_scale, tol=1e-12,
                 max_iter=5, max_halvings=30)
    assert shot.status == STEADY_OK and shot.method == "newton", shot.message
    assert shot.iterations == 1
    np.testing.assert_allclose(shot.x, x_star, rtol=0, atol=1e-13)
    assert shot.residual <= 1e-12


def test_heron_square_root_converges_quadratically():
    """P(x) = x + x^2 - 2: Newton's update is Heron's x <- (x + 2/x)/2, whose error
    obeys e_{k+1} = e_k^2 / (2 x_k) (quadratic convergence, textbook)."""
    pm = Recorded(lambda x: x * x - 2.0)
    shot = shoot(pm, [3.0], jacobian=lambda x, x1, aux, s: np.diag(1.0 + 2.0 * x),
                 scale=_unit_scale, tol=1e-15, max_iter=20, max_halvings=30)
    assert shot.success and shot.method == "newton", shot.message
    assert shot.x[0] == pytest.approx(math.sqrt(2.0), rel=0, abs=4e-16)
    xs = [p[0] for p in pm.points]          # accepted iterates: no step was halved
    errs = [x - math.sqrt(2.0) for x in xs]
    for k in range(len(errs) - 1):
        if abs(errs[k + 1]) < 1e-12:
            break
        assert errs[k + 1] == pytest.approx(errs[k] ** 2 / (2.0 * xs[k]), rel=1e-6)
    assert shot.iterations <= 6


def test_two_dimensional_nonlinear_map():
    """F = (x^2 + y^2 - 4, x - y): fixed point (sqrt 2, sqrt 2), Jacobian by hand."""
    def F(v):
        x, y = v
        return np.array([x * x + y * y - 4.0, x - y])

    def jac(v, v1, aux, s):
        x, y = v
        return np.eye(2) + np.array([[2 * x, 2 * y], [1.0, -1.0]])

    shot = shoot(Recorded(F), [2.0, 1.0], jacobian=jac, scale=_unit_scale, tol=1e-14,
                 max_iter=20, max_halvings=30)
    assert shot.status == STEADY_OK, shot.message
    np.testing.assert_allclose(shot.x, [math.sqrt(2.0)] * 2, rtol=0, atol=1e-14)


def test_damping_rescues_newton_on_arctan():
    """F = arctan x from x0 = 3: the full Newton step diverges (|x| grows each step,
    Dennis & Schnabel ch. 6); halving the step converges to 0, reported as a fallback."""
    x = 3.0
    x = x - math.atan(x) * (1.0 + x * x)    # one undamped Newton step
    assert abs(x) > 3.0                     # the premise: the full step overshoots
    shot = shoot(Recorded(np.arctan), [3.0],
                 jacobian=lambda x, x1, aux, s: np.diag(1.0 + 1.0 / (1.0 + x * x)),
                 scale=_unit_scale, tol=1e-14, max_iter=30, max_halvings=30)
    assert shot.method == "damped-newton" and shot.status == STEADY_FALLBACK, shot.message
    assert abs(shot.x[0]) <= 1e-14


def test_settling_fallback_on_a_contraction():
    """x = 0.5 cos x: a contraction (q = 0.5). A Jacobian that makes J - I singular
    stops Newton at once; settling converges, within Banach's a posteriori bound."""
    x_star = brentq(lambda x: x - 0.5 * math.cos(x), 0.0, 1.0, xtol=1e-15)
    pm = Recorded(lambda x: 0.5 * np.cos(x) - x)
    shot = shoot(pm, [1.0], jacobian=lambda x, x1, aux, s: np.eye(1), scale=_unit_scale,
                 tol=1e-13, max_iter=10, max_halvings=30, max_brute_cycles=1000)
    assert shot.method == "brute-force" and shot.status == STEADY_FALLBACK, shot.message
    assert shot.iterations == 0 and "brute-force settling converged" in shot.message
    q = 0.5
    assert abs(shot.x[0] - x_star) <= q / (1 - q) * 1e-13 + 1e-16
    # linear convergence at rate |P'(x*)| = 0.5 sin x*: about log(1e-13)/log(rate) periods
    rate = 0.5 * math.sin(x_star)
    assert len(pm.points) <= 2 + math.ceil(math.log(1e-13) / math.log(rate)) + 2


def test_settling_failures_are_reported():
    """No fallback: failed, naming max_iter; a map that leaves the finite numbers
    ends the settling with residual inf; a slow contraction runs out of periods."""
    singular = dict(jacobian=lambda x, x1, aux, s: np.eye(1), scale=_unit_scale,
                    tol=1e-12, max_iter=3, max_halvings=5)
    shot = shoot(Recorded(lambda x: 0.5 * np.cos(x) - x), [1.0], **singular)
    assert shot.status == STEADY_FAILED and "max_iter = 3" in shot.message
    blow = shoot(lambda x: (np.full_like(x, np.inf), None), [1.0], max_brute_cycles=10,
                 **singular)
    assert blow.status == STEADY_FAILED and blow.residual == np.inf
    slow = shoot(Recorded(lambda x: -1e-3 * x), [1.0], max_brute_cycles=5,
                 hint=": check the map", **singular)
    assert slow.status == STEADY_FAILED
    assert slow.message.endswith("did not converge in 5 periods "
                                 f"(residual {slow.residual:.2e}): check the map")


def test_frozen_scale_is_taken_once_and_sizes_the_residual():
    calls = []

    def scale(x, x1, aux):
        calls.append(1)
        return np.full_like(x, 10.0)

    shot = shoot(Recorded(lambda x: x * x - 2.0), [3.0],
                 jacobian=lambda x, x1, aux, s: np.diag(1.0 + 2.0 * x), scale=scale,
                 tol=1e-15, max_iter=20, max_halvings=30, frozen_scale=True)
    assert len(calls) == 1 and shot.success
    np.testing.assert_array_equal(shot.scale, [10.0])
    x, aux, s, resid, done = settle(lambda x: (0.5 * x, None), lambda *a: np.ones(1),
                                    np.array([1.0]), 1e-3, 100)
    # the change per period equals the image: 2^-9 > 1e-3 >= 2^-10, the tenth period
    assert done and resid <= 1e-3 and x[0] == 0.5 ** 10


# ----------------------------------------------------------------------------- zero-current states

def test_zero_current_states_follow_the_strategy_rules():
    """Diodes conduct one way: both diode states always end at zero current; the
    low-side channel too in diode emulation only (common practice)."""
    for strategy in STRATEGIES:
        got = zero_current_states(strategy)
        assert {LOW_DIODE, HIGH_DIODE} <= got
        assert HIGH not in got and IDLE not in got
        assert (LOW in got) == (strategy == "diode-emulation")
    with pytest.raises(ValueError, match="switching.strategy.*'burst'"):
        zero_current_states("burst")


def _light_load(strategy):
    sync = strategy != "asynchronous"
    return buck_scenario(vin=12.0, duty=0.3, frequency=500e3, inductance=4.7e-6,
                         capacitance=47e-6, dcr=0.01, esr=0.005, rds_hs=0.01, rds_ls=0.005,
                         vf_hs=0.7, r_hs=0.01, vf_ls=0.7, r_ls=0.01, strategy=strategy,
                         resistance=20.0, dead_time=(20e-9, 25e-9) if sync else (0.0, 0.0),
                         cycles=300)


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_zero_current_states_agree_with_the_engine(strategy):
    """At light load every state the cycle loop ends into idle is one of
    zero_current_states and ends at iL = 0; in forced PWM the low side carries the
    current negative instead (the engine's inline rule, an independent copy)."""
    run = bucksim.simulate(_light_load(strategy))
    seg = run.segments
    cond = seg.conduction
    k = np.nonzero((cond[:-1] != IDLE) & (cond[1:] == IDLE))[0]
    assert k.shape[0] > 0
    assert set(cond[k].tolist()) <= zero_current_states(strategy)
    i_end = segment_values(run, "iL", k, seg.dt[k])
    scale = np.abs(seg.x0[:, 0]).max()
    assert np.all(np.abs(i_end) <= 1e-9 * scale)
    low = np.nonzero(cond == LOW)[0]
    if strategy == "forced-pwm":
        assert np.min(segment_values(run, "iL", low, seg.dt[low])) < -0.01 * scale
    if strategy == "diode-emulation":
        assert LOW in set(cond[k].tolist())


def test_clamp_current_fixes_the_sign_of_zero_current_states():
    il = np.array([-1e-12, 1e-12, -1e-12, 1e-12, -2.0, 2.0])
    cond = np.array([LOW_DIODE, HIGH_DIODE, LOW, LOW, HIGH, HIGH])
    np.testing.assert_array_equal(clamp_current(il, cond, "diode-emulation"),
                                  [0.0, 0.0, 0.0, 1e-12, -2.0, 2.0])
    np.testing.assert_array_equal(clamp_current(il, cond, "forced-pwm"),
                                  [0.0, 0.0, -1e-12, 1e-12, -2.0, 2.0])


# ----------------------------------------------------------------------------- segment states

@pytest.mark.parametrize("strategy", ["forced-pwm", "diode-emulation"])
def test_segment_states_equal_expm_at_random_offsets(strategy):
    """z(t0 + tau) = expm(M_s tau) [x0, 1] (scipy expm) at random (segment, offset)."""
    run = bucksim.simulate(_light_load(strategy))
    seg, mats = run.segments, run.table.matrices
    rng = np.random.default_rng(12)
    k = rng.integers(0, len(seg), 200)
    frac = rng.random(200)
    frac[:10] = 0.0
    frac[10:20] = 1.0                          # left limits at the segment ends
    tau = frac * seg.dt[k]
    z = segment_states(run, k, tau)
    n = run.stage.n
    for j in range(k.shape[0]):
        z0 = np.append(seg.x0[k[j]], 1.0)
        ref = expm(mats[seg.system[k[j]]] * tau[j]) @ z0
        scale = np.abs(ref).max()
        np.testing.assert_allclose(z[j], ref, rtol=0, atol=1e-12 * scale)
        assert z[j, n] == 1.0
    vo = segment_values(run, "vo", k, tau)
    rows = run.signal_table("vo")[seg.system[k]]
    np.testing.assert_array_equal(vo, np.einsum("ij,ij->i", rows, z))
