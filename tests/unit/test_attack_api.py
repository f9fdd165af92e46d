"""Python API under attack: bad arguments, diverged and oversized runs, unstable loops.

Each test reproduces a defect found by attacking the API (issue 11) and checks
the contract that replaces it: a plain error naming what was wrong (TypeError,
ValueError, ScenarioError or SimulationError), or a run whose ``status`` and
``message`` say what happened. External references: the independent solver
``tests/references/analog_solver.py`` (solve_ivp + event location, Newton shooting
after Aprille & Trick, Proc. IEEE 60(1), 1972) for the Floquet multipliers of
an unstable loop; IEEE 754 double precision (largest finite value 1.8e308,
so a square overflows above 1.34e154) for the state range.
"""

import dataclasses

import numpy as np
import pytest

import bucksim
import bucksim.simulation
from bucksim.errors import ScenarioError, SimulationError
from bucksim.model.parts import (
    Capacitor,
    Control,
    Diode,
    Inductor,
    Load,
    Mosfet,
    RunSettings,
    Scenario,
    Supply,
    Switching,
)
from bucksim.model.scenario import replace_key
from bucksim.model.stage import Stage
from bucksim.steady.result import periodic_scenario
from tests.references.analog_solver import reference_loop

CORE = "scenarios/core_rail_1v0.toml"
TELEMETRY = "scenarios/telemetry_rail_1v8_analog.toml"
PI = {"gain": 2000.0, "zeros": [2000.0]}


def rail(control, cycles=200, start="rest"):
    """Invented 12 V -> 3.3 V, 5 A rail at 500 kHz (the closed-loop tests' rail)."""
    hs = Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    return Scenario("api test rail (invented)", Supply(12.0),
                    Switching(500e3, "forced-pwm", (20e-9, 20e-9)), Inductor(4.7e-6, 0.01),
                    Capacitor(47e-6, 0.005), hs, ls, Load(0.66), control,
                    RunSettings(cycles=cycles, start=start))


def short(path=CORE, cycles=50):
    sc = bucksim.load_scenario(path)
    return dataclasses.replace(sc, run=dataclasses.replace(sc.run, cycles=cycles, duration=None))


def without_node(sc):
    """The scenario with no switch-node capacitance (state ``[iL, vC]``, no ``vn``)."""
    return replace_key(replace_key(sc, "high_side.coss", 0.0), "low_side.coss", 0.0)


# ----------------------------------------------------------------------------- item 4: keys

@pytest.mark.parametrize("key", [123, None, 1.5, ("inductor", "inductance")])
def test_replace_key_refuses_a_key_that_is_not_a_string(key):
    sc = short()
    with pytest.raises(ScenarioError) as err:
        replace_key(sc, key, 1e-6)
    assert repr(key) in str(err.value) and "dotted" in str(err.value)


# ----------------------------------------------------------------------------- wrong objects

@pytest.mark.parametrize("call", ["simulate", "estimate", "crosscheck", "steady_state"])
@pytest.mark.parametrize("arg", [CORE, None, 3.0])
def test_functions_taking_a_scenario_refuse_anything_else_with_a_type_error(call, arg):
    with pytest.raises(TypeError) as err:
        getattr(bucksim, call)(arg)
    msg = str(err.value)
    assert call in msg and "Scenario" in msg and "load_scenario" in msg
    if isinstance(arg, str):
        assert f"load_scenario({arg!r})" in msg     # tells how to read the file


# ----------------------------------------------------------------------------- Run.at / sample

@pytest.fixture(scope="module")
def run():
    return bucksim.simulate(short())


def test_at_accepts_any_shape_and_gives_the_same_values_as_a_flat_array(run):
    # the core rail has node capacitance and both channels' ramps (states iL, vC, vn, ihs,
    # khs, ils, kls); the same rail without node capacitance has two
    for r in (run, bucksim.simulate(without_node(short()))):
        n = len(r.stage.state_names)
        assert n == (7 if r.stage.node else 2)
        t = np.linspace(0.1, 0.9, 12).reshape(3, 4) * r.t_end
        x = r.at(t)
        assert x.shape == (3, 4, n)
        assert np.array_equal(x.reshape(12, n), r.at(t.ravel()))
        vo = r.at(t, "vo")
        assert vo.shape == (3, 4) and np.array_equal(vo.ravel(), r.at(t.ravel(), "vo"))
        assert r.at(0.5 * r.t_end).shape == (1, n)      # a scalar counts as one element
    assert run.stage.node


@pytest.mark.parametrize("bad", [np.nan, -1e-9, 1.0, np.inf])
def test_at_refuses_nan_and_times_outside_the_run_naming_the_value(run, bad):
    with pytest.raises(ValueError) as err:
        run.at([0.5 * run.t_end, bad])
    assert repr(float(bad)) in str(err.value) and "index 1" in str(err.value)
    with pytest.raises(ValueError):
        run.at([bad], "vo")


def test_sample_refuses_start_after_stop(run):
    with pytest.raises(ValueError, match="start must not be after stop"):
        run.sample(10, start=0.5 * run.t_end, stop=0.25 * run.t_end)
    s = run.sample(10, start=0.25 * run.t_end, stop=0.5 * run.t_end)
    assert np.all(np.diff(s["t"]) > 0)
    with pytest.raises(ValueError, match="n must be"):
        run.sample(0)


# ----------------------------------------------------------------------------- size guards

@pytest.mark.parametrize("path,key,value", [(CORE, "run.cycles", 10**12),
                                            (TELEMETRY, "run.duration", "1e6 s")])
@pytest.mark.parametrize("start", ["rest", "steady-state"])
def test_a_run_that_would_not_fit_in_memory_is_refused_up_front(path, key, value, start):
    # 1e12 cycles (or 6e11 at 600 kHz) of >= 3 rows of >= 37 B are > 100 TB:
    # more than any machine this runs on. Refused before the steady state or
    # the engine starts, at the key's line in the file.
    sc = replace_key(replace_key(bucksim.load_scenario(path), "run.start", start), key, value)
    sc = dataclasses.replace(sc, text=bucksim.load_scenario(path).text)
    with pytest.raises(ScenarioError) as err:
        bucksim.simulate(sc)
    msg = str(err.value)
    assert key in msg and "TB" in msg and "would need" in msg
    assert err.value.file == path and err.value.line is not None


def test_segment_buffer_growth_is_capped_by_the_memory_budget(monkeypatch):
    """Reserve one row a period so every chunk fills and its buffer doubles: with a
    normal budget the run is the same as without the squeeze; with a budget the
    doubled buffer exceeds, a SimulationError names the memory it would need."""
    from bucksim.engine import driver as engine
    from bucksim.engine import limits

    sc = short(cycles=400)
    ref = bucksim.simulate(sc)
    monkeypatch.setitem(engine.ROWS_PER_PERIOD, "synchronous", 1)
    squeezed = bucksim.simulate(sc)
    assert squeezed.success
    assert np.array_equal(squeezed.segments.x0, ref.segments.x0)
    # the first buffer (~400 rows of 37 B) fits in 40 kB, the doubled one does not
    # (the up-front estimate, tested above, is set aside to reach the engine)
    monkeypatch.setattr(limits, "memory_budget", lambda: 40_000)
    monkeypatch.setattr(bucksim.simulation, "check_run_fits", lambda *a, **k: None)
    with pytest.raises(SimulationError) as err:
        bucksim.simulate(sc)
    msg = str(err.value)
    assert "would need about" in msg and "kB" in msg and "40 kB" in msg


# ----------------------------------------------------------------------------- diverged runs

def test_a_run_that_diverges_says_so_and_its_summary_is_refused_plainly():
    run = bucksim.simulate(replace_key(short(), "output_capacitor.capacitance", 1e-300))
    assert run.status == 1 and not run.success and "diverged" in run.message
    with pytest.raises(SimulationError, match="diverged"):
        run.summary()


def test_states_too_large_to_square_make_a_diverged_run_not_a_summary_of_nan():
    from bucksim.simulation import STATE_RANGE

    # IEEE 754: the largest double is 1.8e308, so x**2 overflows for |x| > 1.34e154
    assert STATE_RANGE == pytest.approx(np.sqrt(1.7976931348623157e308))
    run = bucksim.simulate(replace_key(short(), "run.initial_current", 1e300))
    assert run.status == 1 and "diverged" in run.message and "1e+300" in run.message
    with pytest.raises(SimulationError, match="diverged"):
        run.summary()


def test_a_summary_with_a_non_finite_metric_marks_the_run_diverged():
    # 1e150 A squares to 1e300: in range, but the energy terms (times L, C and
    # the Van Loan weights) overflow, so some metric is not finite
    run = bucksim.simulate(replace_key(short(), "run.initial_current", 1e150))
    assert run.status == 0
    with pytest.raises(SimulationError, match="out of range"):
        run.summary()
    assert run.status == 1 and "diverged" in run.message


def test_state_range_verdict():
    from bucksim.simulation import STATE_RANGE, state_range_verdict

    assert state_range_verdict(np.array([[1.0, 2.0]]), 0) == (0, None)
    for bad in (np.nan, np.inf, -2 * STATE_RANGE):
        status, msg = state_range_verdict(np.array([[1.0, bad]]), 0)
        assert status == 1 and "diverged" in msg
    assert state_range_verdict(np.array([np.nan]), 3) == (3, None)   # judged once only


# ----------------------------------------------------------------------------- item 3: steady state

def closed_loop():
    return rail(Control(mode="voltage-mode", reference=3.3, compensator=PI))


@pytest.fixture(scope="module")
def settled():
    ss = bucksim.steady_state(closed_loop())
    assert ss.success and ss.stable and ss.residual < 1e-11
    return ss


def test_closed_loop_steady_state_starts_from_x0_and_controller(settled):
    sc = closed_loop()
    x0 = settled.x[:2] * np.array([1.05, 0.98])
    # no update allowed: the result is the start itself, reported as not converged
    ss = bucksim.steady_state(sc, x0=x0, controller=settled.controller, max_iter=0,
                              max_brute_cycles=0)
    assert ss.status == 2 and not ss.success and "max_iter = 0" in ss.message
    assert np.array_equal(ss.x[:2], x0)
    assert np.array_equal(ss.controller.w, settled.controller.w)
    # from there Newton converges to the same periodic state
    ss = bucksim.steady_state(sc, x0=x0, controller=settled.controller)
    assert ss.success and np.allclose(ss.x, settled.x, rtol=1e-9, atol=1e-12)
    # the controller may be given as its vector, or left out (its equilibrium)
    ss = bucksim.steady_state(sc, x0=x0, controller=settled.controller.vector())
    assert ss.success and np.allclose(ss.x, settled.x, rtol=1e-9, atol=1e-12)
    assert bucksim.steady_state(sc, x0=x0).success


def test_closed_loop_max_iter_and_tol_are_honoured(settled):
    sc = closed_loop()
    x0 = settled.x[:2] * np.array([1.3, 0.8])
    one = bucksim.steady_state(sc, x0=x0, max_iter=1, max_brute_cycles=0)
    assert one.status == 2 and one.iterations <= 1 and "max_iter = 1" in one.message
    tight = bucksim.steady_state(sc, x0=x0)
    loose = bucksim.steady_state(sc, x0=x0, tol=1e-3)
    assert tight.residual <= 1e-11 and loose.residual <= 1e-3
    assert loose.iterations < tight.iterations and loose.residual > tight.residual


def test_open_loop_x0_max_iter_and_tol_are_honoured():
    sc = short()
    stage = Stage(sc)
    # the core rail has node capacitance, and both channels ramp (forced PWM)
    assert stage.state_names == ("iL", "vC", "vn", "ihs", "khs", "ils", "kls")
    x0 = np.array([1.0, 0.5])
    ss = bucksim.steady_state(sc, x0=x0, max_iter=0, max_brute_cycles=0)
    assert ss.status == 2 and "max_iter = 0" in ss.message
    assert ss.x.shape == (stage.n,) and np.array_equal(ss.x[:2], x0)
    # a period starts with the high side on, which sets the node when it closes at once
    # (no rise time): the map of [iL, vC] never reads a start value of vn, and the state
    # carries the node voltage the period from x0 ends with
    instant = dataclasses.replace(sc, high_side=dataclasses.replace(sc.high_side,
                                                                   rise_time=0.0))
    ss0 = bucksim.steady_state(instant, x0=x0, max_iter=0, max_brute_cycles=0)
    node = bucksim.steady_state(instant, x0=[1.0, 0.5, 5.0], max_iter=0, max_brute_cycles=0)
    assert np.array_equal(node.x, ss0.x) and node.residual == ss0.residual
    one = bucksim.simulate(periodic_scenario(instant),
                           x0=np.concatenate([x0, [5.0], np.zeros(4)]))
    assert ss0.x[stage.i_node] == pytest.approx(one.x_end[stage.i_node], rel=1e-12, abs=1e-12)
    # with its rise time the channel's current ramps while the node is still open: the
    # map reads vn, and the start value is kept
    ramped = bucksim.steady_state(sc, x0=[1.0, 0.5, 5.0], max_iter=0, max_brute_cycles=0)
    assert ramped.x[stage.i_node] == 5.0 and ramped.residual != ss.residual
    ss = bucksim.steady_state(sc, x0=x0)
    assert ss.success and ss.residual <= 1e-12
    # a tolerance the start already meets: no update at all
    lazy = bucksim.steady_state(sc, x0=x0, tol=10.0)
    assert lazy.iterations == 0 and np.array_equal(lazy.x[:2], x0)
    with pytest.raises(ValueError, match="controller"):
        bucksim.steady_state(sc, controller=[0.0])


@pytest.mark.parametrize("kw", [{"tol": 0.0}, {"tol": np.nan}, {"max_iter": -1},
                                {"max_iter": 1.5}, {"max_brute_cycles": True}])
def test_meaningless_solver_settings_are_refused(kw):
    with pytest.raises(ValueError, match=next(iter(kw))):
        bucksim.steady_state(short(), **kw)


def test_closed_loop_x0_of_the_wrong_length_is_refused():
    with pytest.raises(ValueError, match="x0 must hold 2"):
        bucksim.steady_state(closed_loop(), x0=[1.0, 2.0, 3.0])


# ----------------------------------------------------------------------------- unstable loop

def unstable_telemetry(start="steady-state"):
    # the demo's type III integrator gain 20000 1/s raised 15x: the analog loop
    # crosses over far too high and its periodic state is unstable
    sc = replace_key(bucksim.load_scenario(TELEMETRY), "control.compensator.gain", 3e5)
    return replace_key(replace_key(sc, "load.steps", []), "run.start", start)


def test_unstable_periodic_state_is_found_flagged_and_matches_the_reference():
    sc = without_node(unstable_telemetry())  # the reference has no switch-node capacitance
    ss = bucksim.steady_state(sc)
    _, mu_ref, res = reference_loop(sc).steady_state()
    assert res < 1e-10
    assert np.max(np.abs(mu_ref)) > 1.0                  # the independent solver agrees
    assert np.max(np.abs(ss.floquet)) == pytest.approx(np.max(np.abs(mu_ref)), rel=1e-5)
    assert not ss.stable and "unstable" in ss.message


def test_start_in_an_unstable_steady_state_is_a_plain_simulation_error():
    with pytest.raises(SimulationError) as err:
        bucksim.simulate(unstable_telemetry())
    msg = str(err.value)
    assert "unstable" in msg and "Floquet" in msg and TELEMETRY in msg
    assert "control.compensator" in msg


def test_crosscheck_refuses_an_unstable_operating_point():
    with pytest.raises(SimulationError, match="unstable"):
        bucksim.crosscheck(unstable_telemetry("rest"))
