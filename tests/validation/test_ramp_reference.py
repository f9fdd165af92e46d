"""The channels' current ramps: the engine against an event-driven reference and closed forms.

With node capacitance and a MOSFET ``rise_time``/``fall_time`` > 0 a channel's
current ramps linearly as a current source while the node capacitance takes
the rest. The reference (:mod:`tests.references.ramp_hybrid`) is written from
that circuit, not from the engine, and integrated by scipy's ``solve_ivp``
(DOP853, Hairer, Norsett and Wanner, *Solving Ordinary Differential Equations
I*, 2nd ed., 1993, sec. II.5-6) at rtol 1e-12. It is checked here on its own:
without ramps it is :mod:`tests.references.node_hybrid` (itself checked against
``scipy.linalg.expm`` in test_node_hybrid), a second integrator (Radau IIA)
gives the same run, and a turn-off ramp's overlap energy and node swing and a
clamped turn-on's overlap energy follow their closed forms (derived: linear
current ramp, the capacitance takes the rest, a clamp at the swing).

The engine must then agree with the reference to ``REL = 1e-6`` of each
quantity's scale (iL, vC and vo to their largest magnitude over the run, the
node's voltages to Vin, the ramp currents to the largest ``|iL|``, the supply
energy of a period and the summary's overlap energies to themselves), in
forced PWM at heavy load (hard high-side turn-on against the low-side diode,
the swing completes within the turn-off ramp), at light load (negative
valley: low-side turn-off ramp, partial ZVS, the turn-off snubbed by ``Cn``),
with reverse current (both low-side ramps, high-side body diode), diode
emulation in DCM and the asynchronous stage in CCM (also with a turn-on ramp
long enough for the rising node to reach the body diode's clamp and end it). Every engine test needs
the engine's ramp states (``ihs``) and is skipped without them. ``Rs = 1 mOhm``
in those cases, ``Rs = 0`` (and ``Rn = 0``, ``Vf = r = 0``) in the closed forms.
Stage numbers are invented for these checks.
"""

from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np
import pytest

import bucksim
from bucksim.analysis.edges import supply_energy
from bucksim.model.parts import Mosfet
from bucksim.model.stage import Stage
from tests.references.node_hybrid import simulate_hybrid
from tests.references.node_solver import node_scenario
from tests.references.ramp_hybrid import simulate_ramps

CYCLES = 4
PER_CYCLE = 2000            # grid samples per period
REL = 1e-6                  # engine against reference, relative to each quantity's scale
T = 1e-6
RAMPS = {"high_side": (4e-9, 3e-9), "low_side": (3e-9, 3e-9)}    # (rise, fall) [s]
_COMMON = dict(vin=12.0, frequency=1.0 / T, inductance=0.33e-6, dcr=2e-3, capacitance=100e-6,
               esr=1e-3, rs=1e-3, rds_hs=3e-3, rds_ls=1.5e-3, vf_hs=0.7, r_hs=0.02,
               vf_ls=0.7, r_ls=0.02, coss_hs=150e-12)
_SYNC = dict(_COMMON, coss_ls=250e-12)      # Cn = 400 pF

# name: (scenario keywords, node resistance Rn [ohm], start: "periodic" or "dcm")
CASES = {
    # valley 4.7 A, peak 7.5 A: the node reaches the low-side diode within the 3 ns ramp
    "forced_pwm_heavy": (dict(_SYNC, strategy="forced-pwm", duty=0.09, resistance=0.16,
                              dead_time=(20e-9, 30e-9), x0=(5.5, 1.0)), 0.05, "periodic"),
    # valley -0.3 A: the low side's turn-off ramp starts a swing that stops short of Vin
    "forced_pwm_light": (dict(_SYNC, strategy="forced-pwm", duty=0.09, resistance=0.85,
                              dead_time=(20e-9, 20e-9), x0=(-0.3, 1.0)), 0.2, "periodic"),
    # iL < 0 throughout (a 7 A source at the output): the low side ramps on and off
    "forced_pwm_reverse": (dict(_SYNC, strategy="forced-pwm", duty=0.09, resistance=0.5,
                                current=-7.0, dead_time=(20e-9, 20e-9), x0=(-5.0, 1.0)),
                           0.2, "periodic"),
    # DCM: the high side ramps off from the peak, the node rings once the low side opens
    "dcm_diode_emulation": (dict(_SYNC, strategy="diode-emulation", duty=0.1, resistance=5.0,
                                 dead_time=(20e-9, 20e-9), x0=(0.0, 3.0)), 1.0, "dcm"),
    # CCM freewheel diode (cj = 300 pF): hard turn-on ramp against it (Rn = 0)
    "asynchronous_ccm": (dict(_COMMON, cj=300e-12, strategy="asynchronous", duty=0.15,
                              resistance=0.4, vf_ls=0.45, x0=(4.0, 1.8)), 0.0, "periodic"),
    # a 60 ns turn-on ramp: the rising node reaches the body diode's clamp first, which
    # ends the ramp (the start as given: the clamp instant is sensitive to it)
    "asynchronous_slow_turn_on": (dict(_COMMON, cj=300e-12, strategy="asynchronous",
                                       duty=0.3, resistance=1.0, vf_ls=0.45, x0=(2.0, 2.0),
                                       inductance=0.1e-6, ramps={"high_side": (60e-9, 3e-9),
                                                                 "low_side": (0.0, 0.0)}),
                                  0.0, "given"),
}


def ramp_scenario(rn, ramps=RAMPS, **kw):
    """:func:`~tests.references.node_solver.node_scenario` with node resistance ``rn``
    [ohm] and the MOSFETs' ``(rise_time, fall_time)`` [s] of ``ramps``."""
    s = node_scenario(**kw)
    hs = dataclasses.replace(s.high_side, rise_time=ramps["high_side"][0],
                             fall_time=ramps["high_side"][1])
    ls = s.low_side
    if isinstance(ls, Mosfet):
        ls = dataclasses.replace(ls, rise_time=ramps["low_side"][0],
                                 fall_time=ramps["low_side"][1])
    return dataclasses.replace(s, high_side=hs, low_side=ls, switching=dataclasses.replace(
        s.switching, node_resistance=rn))


def _engine_has_ramps():
    s = ramp_scenario(0.0, **dict(CASES["forced_pwm_heavy"][0], cycles=1))
    return "ihs" in Stage(s).state_names


requires_ramps = pytest.mark.skipif(not _engine_has_ramps(),
                                    reason="channel ramps not in the engine yet")


def _with_start(s, il, vc):
    return dataclasses.replace(s, run=dataclasses.replace(s.run, initial_current=float(il),
                                                          initial_voltage=float(vc)))


def _periodic_start(s, passes=4):
    """Near the periodic state by period averages (``iL(0) -= C dvC/T``, ``vC(0) +=
    L diL/T`` over one reference period): only keeps the regime of a short run."""
    c_l, c_c = s.inductor.inductance / T, s.output_capacitor.capacitance / T
    for _ in range(passes):
        d = np.diff(simulate_ramps(s, 1).period_ends[:, :2], axis=0)[0]
        s = _with_start(s, s.run.initial_current - c_c * d[1],
                        s.run.initial_voltage + c_l * d[0])
    return s


def _dcm_start(s, steps=3):
    """Zero current at turn-on, ``vC(0)`` by secant steps on ``vC(T) - vC(0)``."""
    def gap(v):
        e = simulate_ramps(_with_start(s, 0.0, v), 1).period_ends
        return e[1, 1] - e[0, 1]

    a, b = s.run.initial_voltage, 1.05 * s.run.initial_voltage
    fa, fb = gap(a), gap(b)
    for _ in range(steps):
        a, b, fa = b, b - fb * (b - a) / (fb - fa), fb
        fb = gap(b)
    return _with_start(s, 0.0, b)


@functools.cache
def _reference(name):
    kw, rn, start = CASES[name]
    s = ramp_scenario(rn, cycles=CYCLES, **kw)
    if start != "given":
        s = _periodic_start(s) if start == "periodic" else _dcm_start(s)
    return s, simulate_ramps(s)


@functools.cache
def _case(name):
    scenario, trace = _reference(name)
    return scenario, trace, bucksim.simulate(scenario, check=True)


def _grid():
    return np.linspace(0.0, CYCLES * T, CYCLES * PER_CYCLE + 1)


def _quiet(tr, t):
    """Grid times more than 1 ps from every interval boundary of the reference."""
    edges = np.concatenate([tr.t0, tr.t1])
    return t[np.min(np.abs(t[:, None] - edges[None, :]), axis=1) > 1e-12]


def _rel(a, b, scale):
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b)))) / scale


def _ramps(tr, side, kind, first=1):
    """Ramps of ``side`` and ``kind`` from period ``first`` on (period 0 starts from a
    node at rest)."""
    return [r for r in tr.ramps if r["side"] == side and r["kind"] == kind
            and r["t0"] >= first * T - 1e-15]


def _mode_at(tr, t):
    return tr.modes[int(np.searchsorted(tr.t0, t, side="right") - 1)]


# --------------------------------------------------------------------------- the reference

@pytest.mark.parametrize("name", ["forced_pwm_light", "dcm_diode_emulation"])
def test_reference_without_ramps_is_node_hybrid(name):
    """Rise and fall times 0: the reference is node_hybrid's circuit, interval by
    interval; every state and the supply energy to 1e-9 of their scales."""
    kw, rn, _ = CASES[name]
    none = {"high_side": (0.0, 0.0), "low_side": (0.0, 0.0)}
    s = ramp_scenario(rn, ramps=none, cycles=2, **kw)
    a, b = simulate_ramps(s), simulate_hybrid(s)
    t = np.linspace(0.0, b.t1[-1], 4001)     # node_hybrid's last phase may end 1 ulp early
    for j, sig in enumerate(("iL", "vC", "vn", "energy")):
        assert _rel(a.at(t, sig), b.at(t, sig), a.circuit.scales()[j]) < 1e-9, sig
    assert a.mode_changes()[1] == b.mode_changes()[1]
    assert not a.ramps


@pytest.mark.parametrize("name", ["forced_pwm_heavy", "forced_pwm_reverse",
                                  "asynchronous_ccm"])
def test_reference_second_integrator(name):
    """The same ramped runs by ``solve_ivp``'s Radau IIA (implicit, order 5; Hairer and
    Wanner, *Solving ODEs II*, 2nd ed., 1996, sec. IV.8) at rtol 1e-10: all eight
    states on the grid to 1e-8 of their scales (``vn`` near its events: 1e-9 measured)."""
    s, a = _reference(name)
    b = simulate_ramps(s, method="Radau", rtol=1e-10, atol=1e-14)
    t = _grid()
    err = np.max(np.abs(a.states(t) - b.states(t)) / a.circuit.scales(), axis=0)
    assert np.all(err < 1e-8), err


def test_case_regimes():
    """Each case exercises what its name says (on the reference, periods 1 to 3)."""
    _, tr = _reference("forced_pwm_heavy")
    c = tr.circuit
    assert tr.at(_grid(), "iL").min() > 3.0
    for r in _ramps(tr, "hs", "on"):                 # hard: against the low-side diode
        assert _mode_at(tr, r["t0"]) == "low-diode" and r["slope"] > 0.0
    for r in _ramps(tr, "hs", "off"):                # the swing ends within the ramp
        assert _mode_at(tr, r["t1"] - 1e-12) == "low-diode"
    _, tr = _reference("forced_pwm_light")
    # the high side's turn-on ramps carry nothing (negative valley: partial ZVS), they
    # only delay its closing by the rise time
    assert all(r["slope"] == 0.0 for r in _ramps(tr, "hs", "on"))
    assert len(_ramps(tr, "ls", "off")) == CYCLES - 1
    for r in _ramps(tr, "ls", "off"):                # partial ZVS: short of the body diode
        t = np.linspace(r["t0"], (np.floor(r["t0"] / T) + 1) * T * (1 - 1e-12), 401)
        assert 2.0 < tr.at(t, "vsw").max() < c.vin
    for r in _ramps(tr, "hs", "off"):                # snubbed: I0 < 2 Cn V / tf
        assert r["i0"] < 2 * c.node.at(0.0) * (c.vin + c.vf_ls) / c.tf_hs
        assert _mode_at(tr, r["t1"] - 1e-12) == "open"
    _, tr = _reference("forced_pwm_reverse")
    assert tr.at(_grid(), "iL").max() < 0.0
    assert all(r["slope"] == 0.0 for r in _ramps(tr, "hs", "on", 0))
    for r in _ramps(tr, "ls", "on"):                 # hard: against the high-side diode
        assert _mode_at(tr, r["t0"]) == "high-diode"
        assert _mode_at(tr, r["t1"]) == "low"
    assert len(_ramps(tr, "ls", "off")) == CYCLES - 1
    _, tr = _reference("dcm_diode_emulation")
    assert len(_ramps(tr, "hs", "off")) == CYCLES - 1 and not _ramps(tr, "ls", "on", 0)
    assert len(_ramps(tr, "hs", "on", 0)) == CYCLES      # at the ring's current, any sign
    assert sum(m == "open" and t1 - t0 > 100e-9 for t0, t1, m
               in zip(tr.t0, tr.t1, tr.modes, strict=True)) == CYCLES    # the DCM rings
    _, tr = _reference("asynchronous_ccm")
    assert tr.at(_grid(), "iL").min() > 0.0
    for r in _ramps(tr, "hs", "on"):
        assert _mode_at(tr, r["t0"]) == "low-diode"
    _, tr = _reference("asynchronous_slow_turn_on")
    assert tr.at(_grid(), "iL").min() > 0.0
    for r in _ramps(tr, "hs", "on"):                 # ended by the clamp, not by the time
        assert r["t1"] - r["t0"] < tr.circuit.tr_hs - 1e-9 and _mode_at(tr, r["t1"]) == "high"
        assert _mode_at(tr, r["t1"] - 1e-12) == "open"


# --------------------------------------------------------------------------- closed forms

V_CLOSED = 12.0


def _closed_scenario(current, cn, tf, tr=0.0, inductance=1.0, cycles=1):
    """Forced PWM with ``iL`` held by a large inductance, Rs = Rn = 0, ideal diodes
    (Vf = r = 0, so the swing is Vin) and a 1 uOhm high side; ``Cn`` [F] split evenly."""
    s = ramp_scenario(0.0, ramps={"high_side": (tr, tf), "low_side": (0.0, 0.0)},
                      cycles=cycles, summary_cycles=1, vin=V_CLOSED, frequency=1.0 / T,
                      inductance=inductance, capacitance=100e-6, rs=0.0, rds_hs=1e-6,
                      rds_ls=1e-6, vf_hs=0.0, r_hs=0.0, vf_ls=0.0, r_ls=0.0, coss_hs=cn / 2,
                      coss_ls=cn / 2, strategy="forced-pwm", duty=0.2,
                      resistance=0.2 * V_CLOSED / current, dead_time=(20e-9, 20e-9),
                      x0=(current, 0.2 * V_CLOSED))
    return s


def snubbed_energy(v, i, tf, cn):
    """Overlap energy [J] of a channel current ``i (1 - t/tf)`` against ``cn`` [F] with
    the node clamped after a swing ``v`` [V] (derived: the capacitance carries ``i t/tf``,
    so the channel sees ``i t^2 / (2 cn tf)`` until that reaches ``v`` at ``t1``)::

        E = i^2/(2 cn tf) (t1^3/3 - t1^4/(4 tf)) + v i (tf - t1)^2 / (2 tf),
        t1 = min(sqrt(2 cn v tf / i), tf)
    """
    t1 = min(math.sqrt(2.0 * cn * v * tf / i), tf)
    return i * i / (2 * cn * tf) * (t1 ** 3 / 3 - t1 ** 4 / (4 * tf)) \
        + v * i * (tf - t1) ** 2 / (2 * tf)


def _turn_off(current, cn, tf, tr=0.0):
    """``(energy [J], I0 [A], trace)`` of the reference's first high-side turn-off."""
    trace = simulate_ramps(_closed_scenario(current, cn, tf, tr), x0=(current, 2.4, 0.0))
    ramp = _ramps(trace, "hs", "off", 0)[0]
    return trace.ramp_energy(ramp), ramp["i0"], trace


@pytest.mark.parametrize("ratio", [0.25, 0.5, 0.9])
def test_reference_snubbed_turn_off(ratio):
    """``I < 2 Cn Vin / tf``: the node does not finish its swing within ``tf`` and
    ``int (Vin - vsw) ihs dt = I^2 tf^2 / (24 Cn)`` (derived) within 1 % (8.5e-7 measured:
    the inductor's current moves by ``Vin tf / L`` over the edge)."""
    cn, tf = 300e-12, 5e-9
    e, i0, _ = _turn_off(ratio * 2 * cn * V_CLOSED / tf, cn, tf)
    assert e == pytest.approx(i0 ** 2 * tf ** 2 / (24 * cn), rel=1e-2, abs=0.0)


def test_reference_hard_turn_off_limit():
    """``I >> 2 Cn Vin / tf``: the energy tends to ``0.5 Vin I tf`` (derived: from the
    closed form, ``1 - E / (0.5 V I tf) = 4x/3 - x^2/2``, ``x = sqrt(2 Cn V / (I tf))``),
    within 1 % at ``I = 2e4 * 2 Cn V / tf`` (0.94 % there), approaching it as ``I`` grows."""
    cn, tf = 1e-12, 5e-9
    gaps = []
    for ratio in (1e2, 1e3, 2e4):
        e, i0, _ = _turn_off(ratio * 2 * cn * V_CLOSED / tf, cn, tf)
        gaps.append(1.0 - e / (0.5 * V_CLOSED * i0 * tf))
    assert gaps[-1] == pytest.approx(0.0, abs=1e-2)
    assert gaps[0] > gaps[1] > gaps[2] > 0.0


@pytest.mark.parametrize("ratio", [0.5, 3.0, 100.0])
def test_reference_turn_off_piecewise(ratio):
    """Between the two limits: :func:`snubbed_energy` with the swing ``Vin - Rh I`` plus
    the channel's own ``Rh I * I tf / 2`` (derived), to 1e-5 (5e-9 measured at 3)."""
    cn, tf, rh = 300e-12, 5e-9, 1e-6
    e, i0, _ = _turn_off(ratio * 2 * cn * V_CLOSED / tf, cn, tf)
    ref = rh * i0 * i0 * tf / 2 + snubbed_energy(V_CLOSED - rh * i0, i0, tf, cn)
    assert e == pytest.approx(ref, rel=1e-5, abs=0.0)


def test_reference_turn_off_swing():
    """The node during a snubbed turn-off: ``vsw = Vin - Rh I - I t^2 / (2 Cn tf)``
    (derived, ``iL`` constant) to 1e-7 of Vin; after the ramp it falls on at ``I / Cn``
    until the low-side diode takes it at 0 V."""
    cn, tf = 300e-12, 5e-9
    _, i0, tr = _turn_off(0.5 * 2 * cn * V_CLOSED / tf, cn, tf)
    r = _ramps(tr, "hs", "off", 0)[0]
    s = np.linspace(0.0, tf, 11)
    v = V_CLOSED - 1e-6 * i0 - i0 * s ** 2 / (2 * cn * tf)
    assert _rel(tr.at(r["t0"] + s, "vsw"), v, V_CLOSED) < 1e-7
    changes = tr.mode_changes()
    k = changes[1].index("low-diode", 1)
    fall = v[-1] * cn / i0              # from the ramp's end down to 0 V at I / Cn
    assert changes[0][k] - r["t1"] == pytest.approx(fall, rel=1e-6, abs=0.0)


def test_reference_clamped_turn_on():
    """A turn-on ramp against a clamped node (L large, ideal diode): the channel sees
    Vin until it carries all of ``iL``, ``E = 0.5 Vin I tr`` (derived; the familiar
    clamped inductive overlap, common practice), to 1e-9; then it closes fully and
    moves the node's charge ``Cn Vin`` (``E += Vin Q``)."""
    cn, tf, tr_ = 300e-12, 5e-9, 3e-9
    trace = simulate_ramps(_closed_scenario(1.0, cn, tf, tr_), x0=(1.0, 2.4, 0.0))
    r = _ramps(trace, "hs", "on", 0)[0]
    assert trace.ramp_energy(r) == pytest.approx(0.5 * V_CLOSED * 1.0 * tr_, rel=1e-9, abs=0.0)
    t, va, vb, supply = trace.jumps[0]
    assert t == pytest.approx(r["t1"], abs=1e-15) and abs(va) < 1e-6
    assert supply == pytest.approx(V_CLOSED * cn * (vb - va), rel=1e-12, abs=0.0)


# --------------------------------------------------------------------------- engine vs reference

@requires_ramps
@pytest.mark.parametrize("name", CASES)
def test_states_agree(name):
    """iL, vC and vo on a grid of 2000 points a period, to ``REL`` of their largest
    magnitude over the run."""
    _, tr, run = _case(name)
    t = _grid()
    for sig in ("iL", "vC", "vo"):
        ref = tr.at(t, sig)
        assert _rel(run.at(t, sig), ref, float(np.max(np.abs(ref)))) < REL, sig


def _left_limit(tr, times, near=REL * T):
    """Reference states just before ``times``: the interval ending within ``near`` of
    each time, else the one holding it."""
    out = np.empty((len(times), 8))
    for k, te in enumerate(times):
        j = int(np.argmin(np.abs(tr.t1 - te)))
        if abs(tr.t1[j] - te) > near:
            j = int(np.searchsorted(tr.t1, te, side="left"))
        out[k] = tr.solutions[j](te)
    return out


@requires_ramps
@pytest.mark.parametrize("name", CASES)
def test_node_agrees(name):
    """The engine's stored ``vn`` at every segment's end and the terminal voltage
    ``vsw`` on the grid away from the reference's boundaries, to ``REL`` of Vin."""
    _, tr, run = _case(name)
    c, seg, iv = tr.circuit, run.segments, run.stage.i_node
    stored = np.append(seg.x0[1:, iv], run.x_end[iv])
    assert _rel(stored, _left_limit(tr, seg.t0 + seg.dt)[:, 2], c.vin) < REL
    t = _quiet(tr, _grid())
    assert _rel(run.at(t, "vsw"), tr.at(t, "vsw"), c.vin) < REL


@requires_ramps
@pytest.mark.parametrize("name", CASES)
def test_ramp_currents_agree(name):
    """The signals ``high_side_ramp`` and ``low_side_ramp`` against the reference's
    ``ihs`` and ``ils`` away from its boundaries, to ``REL`` of the largest ``|iL|``
    (a side without ramps must read 0 or lack the signal)."""
    _, tr, run = _case(name)
    t = _quiet(tr, _grid())
    scale = float(np.max(np.abs(tr.at(t, "iL"))))
    for sig, state in (("high_side_ramp", "ihs"), ("low_side_ramp", "ils")):
        ref = tr.at(t, state)
        if sig not in run.signals:
            assert not np.any(ref), f"{sig} missing, the reference ramps"
            continue
        assert _rel(run.at(t, sig), ref, scale) < REL, sig


@requires_ramps
@pytest.mark.parametrize("name", CASES)
def test_supply_energy_per_period(name):
    """Energy from the ideal source, mid on-time to mid on-time (one turn-on ramp
    and one turn-off inside; :func:`bucksim.analysis.edges.supply_energy`), to ``REL``
    of itself."""
    _, tr, run = _case(name)
    for a in np.arange(CYCLES - 1) * T + 0.5 * tr.circuit.duty * T:
        ref = float(np.diff(tr.at(np.array([a, a + T]), "energy"))[0])
        got = supply_energy(run, a, a + T)
        assert abs(got - ref) < REL * abs(ref), (a, got, ref)


@requires_ramps
@pytest.mark.parametrize("name", CASES)
def test_overlap_energy_agrees(name):
    """The summary's ``overlap`` kind [W] times its window against the energy the
    reference's ramping channels dissipate (``int (Vin - Rs ihs - vsw) ihs dt``,
    ``int -vsw ils dt``) over that window, per switch, to ``REL`` of itself (plus
    ``REL * 1e-3`` of the window's supply energy for a switch that never ramps)."""
    _, tr, run = _case(name)
    summary = run.summary()
    w = summary.window
    span = np.array([w.start, w.stop])
    floor = REL * 1e-3 * abs(float(np.diff(tr.at(span, "energy"))[0]))
    for dev, state in (("high_side", "whs"), ("low_side", "wls")):
        ref = float(np.diff(tr.at(span, state, side="left"))[0])
        got = summary.devices[dev].switching["overlap"] * (w.stop - w.start)
        assert abs(got - ref) <= REL * abs(ref) + floor, (dev, got, ref)


@requires_ramps
@pytest.mark.parametrize(("cn", "ratio", "closed"), [
    (300e-12, 0.25, "snubbed"), (300e-12, 0.9, "snubbed"), (1e-12, 2e4, "hard")])
def test_engine_overlap_closed_forms(cn, ratio, closed):
    """The summary's high-side ``overlap`` [W] times the period (one turn-off, no
    turn-on ramp: rise_time 0) against ``I^2 tf^2 / (24 Cn)`` below ``I = 2 Cn Vin / tf``
    and ``0.5 Vin I tf`` far above it (derived, see the reference's tests), at the
    run's current at the turn-off, within 1 %."""
    tf = 5e-9
    s = _closed_scenario(ratio * 2 * cn * V_CLOSED / tf, cn, tf, cycles=2)
    run = bucksim.simulate(s, check=True)
    summary = run.summary()
    assert summary.window.start == pytest.approx(T) and summary.window.cycles == 1
    e = summary.devices["high_side"].switching["overlap"] * T
    i0 = float(run.at(np.array([T + s.control.duty * T]), "iL")[0])
    ref = i0 ** 2 * tf ** 2 / (24 * cn) if closed == "snubbed" else 0.5 * V_CLOSED * i0 * tf
    assert e == pytest.approx(ref, rel=1e-2, abs=0.0)
