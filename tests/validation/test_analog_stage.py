"""The analog compensator as states of the stage: realisation, rows, files, demo.

Sources: scipy.signal (general reference library) for the transfer function
of the compensator and of its state space; Erickson & Maksimovic,
Fundamentals of Power Electronics, 3rd ed. (2020), ch. 9 (PI, type II and
type III compensators as written in Hz); circuit theory for the error
amplifier's equations. The waveform-level checks against an independent
event-driven solver are in ``test_analog_loop.py``.
"""

import dataclasses
from pathlib import Path

import numpy as np
import pytest
from scipy import signal
from scipy.linalg import expm

import bucksim
from bucksim.errors import ScenarioError
from bucksim.model.compensator import analog_realization
from bucksim.model.parts import Control
from bucksim.model.stage import IDLE, LOW, N_CONDUCTION, OPEN, Stage

SPECS = [
    {"gain": 2000.0, "zeros": [2000.0]},                                       # PI
    {"gain": 9000.0, "zeros": [3000.0], "poles": [90000.0]},                   # type II
    {"gain": 17750.0, "zeros": [5e3, 5e3], "poles": [3e5, 3e5]},              # type III
    {"gain": 4.0, "integrator": False, "zeros": [1e3], "poles": [1e4, 5e4]},   # lead-lag, no 1/s
    {"gain": 1000.0},                                                          # integrator
]
DEMO = str(Path(__file__).resolve().parents[2] / "scenarios" / "telemetry_rail_1v8_analog.toml")
#: The demo as written (switch-node capacitance: the node ``vn`` is a state before
#: the compensator's) and without node capacitance (``[iL, vC, w.., vref]``).
NODE_CASES = pytest.mark.parametrize("node", [True, False], ids=["node", "no-node"])


def demo(node=True):
    """The analog demo scenario, with or without switch-node capacitance."""
    sc = bucksim.load_scenario(DEMO)
    if node:
        return sc
    return dataclasses.replace(sc, high_side=dataclasses.replace(sc.high_side, coss=0.0),
                               low_side=dataclasses.replace(sc.low_side, coss=0.0))


@pytest.mark.filterwarnings("ignore::scipy.signal.BadCoefficients")  # tiny leading terms
@pytest.mark.parametrize("spec", SPECS)
def test_realization_has_the_transfer_function_written_in_hz(spec):
    """Cascade state space vs the transfer function built independently here from
    the factors (1 + s / 2 pi f), compared with scipy.signal.freqs / freqresp."""
    r = analog_realization(spec)
    num = np.array([spec["gain"]])
    den = np.array([1.0, 0.0]) if spec.get("integrator", True) else np.array([1.0])
    for f in spec.get("zeros", []):
        num = np.polymul(num, [1 / (2 * np.pi * f), 1.0])
    for f in spec.get("poles", []):
        den = np.polymul(den, [1 / (2 * np.pi * f), 1.0])
    w = 2 * np.pi * np.logspace(1, 7, 61)
    _, want = signal.freqs(num, den, w)
    ss = signal.StateSpace(r.A, r.B[:, None], r.C[None, :], [[r.D]])
    _, got = signal.freqresp(ss, w)
    assert np.max(np.abs(got - want) / np.abs(want)) < 1e-10
    assert r.order == len(den) - 1


def analog(sc, **kw):
    return dataclasses.replace(sc, control=dataclasses.replace(
        sc.control, implementation="analog", **kw))


@NODE_CASES
def test_stage_rows_are_the_error_amplifier_equations(node):
    """Per system: the plant block equals the open-loop stage's, the compensator
    rows are w' = A w + B H (vref - vo) and the reference rises at Vref / t_ss until
    the end of the soft-start (then a level change), all by construction from the
    circuit equations (vo row from the plant stage). The controller states follow
    the plant's (``stage.i_ctl``), after the node state when there is one."""
    sc = demo(node)
    st = Stage(sc)
    # with node capacitance the channels' current ramps join the plant (model.stage_ramps)
    ramps = tuple(n for n in ("ihs", "khs", "ils", "kls") if n in st.state_names)
    assert bool(ramps) == (node and sc.high_side.rise_time > 0)
    plant_names = ("iL", "vC", "vn") + ramps if node else ("iL", "vC")
    assert st.state_names == plant_names + ("w1", "w2", "w3", "vref")
    assert st.node == node and st.i_ctl == len(plant_names)
    assert st.n_modes == 2 and st.matrices.shape[0] == 2 * N_CONDUCTION * len(st.levels)
    plain = Stage(dataclasses.replace(sc, control=Control(duty=0.15)))
    H, ctl = sc.control.sense_gain, sc.control
    r = analog_realization(ctl.compensator)
    p = st.plant_index
    c0 = st.i_ctl                                   # w1, w2, w3 at c0 .. c0 + 2
    i_ref = st.state_names.index("vref")
    for s in range(st.matrices.shape[0]):
        level, _ = st.split_id(s)
        M = st.matrices[s]
        # open-loop stage levels: the same supply/load, no soft-start boundary
        t = st.levels[level].time
        lp = max(i for i, lev in enumerate(plain.levels) if lev.time <= t)
        Mp = plain.matrices[lp * N_CONDUCTION + s % N_CONDUCTION]
        assert np.array_equal(M[np.ix_(p, p)], Mp)
        assert not np.any(M[:c0, c0:-1])            # the plant ignores the controller
        vo = st.signal("vo", s)
        e_row = -H * vo
        e_row[i_ref] += H                           # + H vref
        held = (s // N_CONDUCTION) % st.n_modes
        for i in range(3):
            want = r.B[i] * e_row
            want[c0:c0 + 3] += r.A[i]
            if held and i == 0:
                want[:] = 0.0      # anti-windup: the integrator (first section) holds
            assert np.allclose(M[c0 + i], want, rtol=1e-15, atol=0)
        slope = ctl.reference / ctl.soft_start if t < ctl.soft_start else 0.0
        assert M[i_ref, -1] == slope and not np.any(M[i_ref, :-1])
    # u = C w + D H (vref - vo): the signal row
    s = 0 * N_CONDUCTION + LOW
    values = {"iL": 1.0, "vC": 1.7, "vn": -0.02, "w1": 0.2, "w2": 0.3, "w3": 0.25, "vref": 1.8,
              "ihs": 0.0, "khs": 0.0, "ils": 0.0, "kls": 0.0}
    z = np.array([values[name] for name in st.state_names] + [1.0])
    want = r.C @ z[c0:c0 + 3] + r.D * H * (z[i_ref] - st.signal("vo", s) @ z)
    assert st.signal("u", s) @ z == pytest.approx(want, rel=1e-14)
    assert st.signal("vref", s + IDLE - LOW) @ z == 1.8


@NODE_CASES
def test_compensator_states_follow_scipy_between_switching_instants(node):
    """Within one segment the compensator integrates the error exactly: its state
    from the engine's stored segment equals scipy's expm of the augmented system
    (circuit theory: linear within a conduction state). The node state ``vn`` is
    the exception by construction (bucksim.model.stage): its row is zero while a
    channel or diode conducts, and the engine stores the node voltage at each
    segment's end instead, so it is checked against the ``vsw`` row at that state."""
    sc = demo(node)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, duration=None, cycles=50))
    run = bucksim.simulate(sc)
    st, seg = run.stage, run.segments
    # (and the ramps' states, which the loop sets at gate edges: engine.ramps)
    other = [i for i, name in enumerate(st.state_names)
             if name not in ("vn", "ihs", "khs", "ils", "kls")]
    opened = 0
    for k in range(len(seg) - 1):                   # every segment: 50 cycles, a few hundred
        z0 = np.append(seg.x0[k], 1.0)
        want = expm(run.table.matrices[seg.system[k]] * seg.dt[k]) @ z0
        assert np.allclose(seg.x0[k + 1][other], want[other], rtol=1e-11, atol=1e-12)
        if node:
            vsw = st.signal("vsw", seg.system[k]) @ want
            assert seg.x0[k + 1][st.i_node] == pytest.approx(vsw, rel=1e-11, abs=1e-12)
            opened += seg.conduction[k] == OPEN
    assert opened > 0 or not node                   # open-node segments: vn integrated


@NODE_CASES
def test_duty_is_where_the_ramp_meets_the_compensator_output(node):
    """The PWM comparator (Erickson ch. 7): the high side turns off where
    V_ramp (t - t_k) / T equals u(t); u is evaluated there from the stored states.
    A cycle that starts with u at or below the ramp's start (0 V) has no on-time:
    with node capacitance the small start-up current discharges the node only
    slowly in the falling dead time (Cn dvn/dt = -iL), and those volt-seconds
    alone can exceed what the loop asks for, so early cycles skip."""
    sc = demo(node)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, duration=None, cycles=300))
    run = bucksim.simulate(sc)
    T, ramp = sc.period, sc.control.ramp
    k = np.arange(5, 300, 7)
    d = run.duty[k]
    assert np.all((d >= 0) & (d < sc.control.max_duty))
    on = d > 0
    assert np.count_nonzero(on) >= 0.9 * k.shape[0]     # the crossing is checked on most
    t_off = (k[on] + d[on]) * T
    u = run.at(t_off - 1e-15 * T, "u")
    assert np.allclose(u, ramp * d[on], rtol=0, atol=1e-9 * ramp)
    u0 = run.at(k[~on] * T + 1e-15 * T, "u")
    assert np.all(u0 <= 1e-9 * ramp)


def test_implementation_key_is_checked(tmp_path):
    path = tmp_path / "rail.toml"
    text = Path(DEMO).read_text(encoding="utf-8")
    path.write_text(text.replace('implementation = "analog"', 'implementation = "analogue"'))
    with pytest.raises(ScenarioError, match=r"rail\.toml:\d+: control\.implementation: must be "
                                            r"one of 'digital', 'analog', got 'analogue'"):
        bucksim.load_scenario(path)
    path.write_text(text.replace('ramp = "1.5 V"', 'ramp = "1.5 V"\ndelay = 1'))
    with pytest.raises(ScenarioError, match=r"control\.delay: must be 0 with implementation"):
        bucksim.load_scenario(path)
    with pytest.raises(ScenarioError, match="control.implementation: applies to closed-loop"):
        Control(duty=0.3, implementation="analog")


def test_stored_analog_run_reads_back_identically(tmp_path):
    """HDF5 round trip: every state column (w1.., vref) is stored with its units and
    the summary of the reopened run equals the in-memory one."""
    import h5py

    sc = bucksim.load_scenario(DEMO)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, duration=None, cycles=200))
    run = bucksim.simulate(sc)
    path = tmp_path / "a.h5"
    run.save(path)
    with h5py.File(path) as f:
        assert f["segments/x0_w2"].attrs["units"] == "V"
        assert f.attrs["x_end_vref"] == run.x_end[-1]
    back = bucksim.open_run(path)
    assert np.array_equal(back.segments.x0, run.segments.x0)
    assert back.summary().to_dict() == run.summary().to_dict()


def test_analog_and_digital_agree_when_the_loop_is_slow():
    """With crossover far below fs the sampling of a digital loop hardly matters
    (common practice): the same PI design, analog and digital, gives the same
    settled duty to well within a percent."""
    sc = bucksim.load_scenario("scenarios/startup_5v_softstart.toml")
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, duration=None, cycles=200))
    d = bucksim.simulate(sc)
    a = bucksim.simulate(analog(sc))
    ss_d = bucksim.steady_state(sc)
    ss_a = bucksim.steady_state(analog(sc))
    assert ss_a.success and ss_d.success
    assert ss_a.x[:2] == pytest.approx(ss_d.x[:2], rel=5e-3)
    assert a.duty[-1] == pytest.approx(d.duty[-1], rel=0.05)


def test_integrator_holds_at_its_limits_exactly():
    """Anti-windup (conditional integration, common practice): a start-up overshoot
    into a light load drives the integrator to its lower limit, where it holds
    exactly (its row of the held systems is zero, checked against scipy's expm of
    those systems) while the error stays negative; it never leaves [0, max_duty ramp]."""
    from bucksim.model.parts import (
        Capacitor,
        Diode,
        Inductor,
        Load,
        Mosfet,
        RunSettings,
        Scenario,
        Supply,
        Switching,
    )

    hs = Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    ctl = Control(mode="voltage-mode", reference=3.3, compensator={"gain": 2000.0,
                                                                 "zeros": [2000.0]},
                  implementation="analog")
    sc = Scenario("hold test", Supply(12.0), Switching(500e3, "diode-emulation", (20e-9, 20e-9)),
                  Inductor(4.7e-6, 0.01), Capacitor(47e-6, 0.005), hs, ls, Load(330.0), ctl,
                  RunSettings(cycles=1500))
    run = bucksim.simulate(sc)
    st = run.stage
    seg = run.segments
    held = (seg.system // N_CONDUCTION) % st.n_modes == 1
    assert held.sum() > 100                      # the hold happened, for many segments
    lo, hi = st.integrator_limits()
    i_w = st.integrator_index                    # the first compensator state, st.i_ctl
    assert i_w == st.i_ctl
    w = seg.x0[:, i_w]
    assert np.all(w[held] == lo)                 # snapped to the limit and held there
    assert w.min() >= lo - 1e-12 and w.max() <= hi + 1e-12
    for k in np.nonzero(held)[0][[0, 50, -1]]:
        z0 = np.append(seg.x0[k], 1.0)
        z1 = expm(run.table.matrices[seg.system[k]] * seg.dt[k]) @ z0
        assert z1[i_w] == z0[i_w]
    # the overshoot that drove it there, and still decaying through 330 ohm
    t = np.linspace(0.0, sc.duration, 3001)
    vo = run.at(t, "vo")
    assert vo.max() > 3.6 and vo[-1] > 3.3
    assert run.summary().to_dict()["energy_balance_error"] < 1e-9
