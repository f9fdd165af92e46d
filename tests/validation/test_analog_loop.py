"""Analog closed-loop control: the engine against an independent reference and textbook models.

The reference (tests/references/analog_solver.py) is written from the circuit and
control description alone: solve_ivp (DOP853, rtol 1e-12) on the plant plus our
own state-space realisation of the compensator (tests/references/compensator.py,
integrator state explicit), restarted at every switching instant, with terminal
events for the comparator, for iL = 0 and for the start and end of the
integrator hold (anti-windup by conditional integration).

Sources: Erickson & Maksimovic, Fundamentals of Power Electronics, 3rd ed.
2020 (ch. 2 buck stage and ripple, ch. 7 averaged model and PWM gain 1/Vm,
ch. 9 compensators and loop gain, ch. 12 current-programmed control); Ridley,
"A new, continuous-time model for current-mode control", IEEE Trans. Power
Electron. 1991 (period doubling above D = 0.5, slope compensation >= half the
sensed down-slope); Aprille & Trick, Proc. IEEE 60(1), 1972 (shooting);
Astrom & Hagglund, Advanced PID Control, ISA 2006, ch. 3 (integrator windup,
conditional integration);
general reference libraries: scipy (solve_ivp, expm), python-control (averaged
loop, stability margins). Circuit values are invented for these tests.
"""

import dataclasses
import functools
import math
import os

import control as ct
import numpy as np
import pytest

import bucksim
from bucksim.model.compensator import compensator_tf
from bucksim.model.parts import (
    Capacitor,
    Control,
    Diode,
    Inductor,
    Load,
    LoadStep,
    Mosfet,
    RunSettings,
    Scenario,
    Supply,
    Switching,
)
from bucksim.model.scenario import loads_scenario
from bucksim.steady.closed_loop import closed_loop_steady_state
from tests.references.analog_solver import compensator_polynomials, compensator_ss, reference_loop
from tests.references.compensator import FREE, HELD_HIGH, HELD_LOW, integrator_limits
from tests.references.stage_solver import simulate_expm

FS = 500e3
T = 1 / FS
PI = {"gain": 2000.0, "zeros": [2000.0]}
TYPE2 = {"gain": 2000.0, "zeros": [2000.0], "poles": [100e3]}
# type III for the rail below: crossover ~20 kHz (fs/25), phase margin ~61 deg
TYPE3 = {"gain": 2600.0, "zeros": [5e3, 8e3], "poles": [100e3, 200e3]}
# two zeros, one pole, for the rail below with 220 uF: crossover ~22 kHz (fs/23), phase
# margin ~54 deg (averaged model); its integrator is fast: without soft start it winds up
# to the top during the start-up, and the overshoot then drives it to the bottom
FAST = {"gain": 20000.0, "zeros": [5000.0, 10000.0], "poles": [100e3]}
STATE_TOL = 1e-10    # relative to the largest value of the quantity in the run
DUTY_TOL = 1e-10     # fraction of the period
EPS = np.finfo(float).eps


def rail(control, vin=12.0, R=0.66, L=4.7e-6, C=47e-6, esr=0.005, dcr=0.01, cycles=250,
         steps=(), strategy="forced-pwm", dead=(20e-9, 20e-9), rds=(0.01, 0.005),
         low_diode=None):
    """Invented 12 V -> 3.3 V, 5 A rail at 500 kHz (the digital-loop tests' rail)."""
    hs = Mosfet(rds[0], Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    if low_diode is None:
        ls = Mosfet(rds[1], Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    else:
        ls, strategy, dead = low_diode, "asynchronous", (0.0, 0.0)
    return Scenario("analog loop test", Supply(vin), Switching(FS, strategy, dead),
                    Inductor(L, dcr), Capacitor(C, esr), hs, ls, Load(R, steps=steps), control,
                    RunSettings(cycles=cycles))


def analog(mode="voltage-mode", reference=3.3, compensator=PI, **kw):
    return Control(mode=mode, reference=reference, compensator=compensator,
                   implementation="analog", **kw)


def pcm_slope(vin=5.0, vo=3.3, L=4.7e-6, Ri=0.1, factor=1.05):
    """``factor`` x half the sensed inductor down-slope Ri Vo / L [V/s] (Ridley 1991)."""
    return factor * 0.5 * Ri * vo / L


# ---------------------------------------------------------------------------
# waveform cases: scenario, periods
CASES = {
    "voltage-mode type II, forced PWM, dead time, soft start":
        lambda: (rail(analog(compensator=TYPE2, soft_start=2e-4)), 250),
    "peak-current D > 0.5 with slope compensation, forced PWM":
        lambda: (rail(analog("peak-current", compensator={"gain": 3000.0, "zeros": [2000.0],
                                                          "poles": [80e3]},
                             current_sense=0.1, slope_compensation=pcm_slope(),
                             soft_start=2e-4), vin=5.0, R=3.3 / 4), 250),
    "diode emulation, light load, zero-current events":
        lambda: (rail(analog(soft_start=2e-4), R=33.0, strategy="diode-emulation",
                      cycles=300), 300),
    "current limit, no soft start":
        lambda: (rail(analog(current_limit=4.0), R=1.0, C=220e-6, cycles=300), 300),
    "min on-time with pulse skipping, diode emulation":
        lambda: (rail(analog(min_on_time=400e-9, pulse_skipping=True, soft_start=1e-4),
                      R=330.0, strategy="diode-emulation", cycles=600), 600),
    "peak-current with blanking, asynchronous":
        lambda: (rail(analog("peak-current", compensator={"gain": 3000.0, "zeros": [2000.0]},
                             current_sense=0.1, slope_compensation=2e4, min_on_time=100e-9,
                             soft_start=2e-4), low_diode=Diode(0.4, 0.01), cycles=300), 300),
    "integrator held at the lower limit, light load, diode emulation":
        lambda: (rail(analog(), R=100.0, strategy="diode-emulation", cycles=1200), 1200),
    "fast integrator held at both limits, forced PWM":
        lambda: (rail(analog(compensator=FAST), C=220e-6, cycles=150), 150),
}
# the integrator holds each case must show: [(hold, at least this many periods), ...]
HOLDS = {
    "current limit, no soft start": [(HELD_HIGH, 100)],
    "integrator held at the lower limit, light load, diode emulation":
        [(HELD_LOW, 500), (FREE, 300)],
    "fast integrator held at both limits, forced PWM":
        [(HELD_HIGH, 3), (FREE, 10), (HELD_LOW, 10), (FREE, 100)],
}


@functools.cache
def case(name):
    sc, n = CASES[name]()
    ref = reference_loop(sc)
    return sc, n, ref, ref.run(n), bucksim.simulate(sc)


def worst(a, b):
    """Largest |a - b| relative to max |b|, and the period where it occurs."""
    d = np.abs(np.asarray(a) - np.asarray(b))
    return d.max() / np.abs(b).max(), int(np.argmax(d))


# -- the reference itself ---------------------------------------------------------------

@pytest.mark.parametrize("spec", [PI, TYPE2, TYPE3, FAST,
                                  {"gain": 0.5, "zeros": [3e3], "poles": [40e3],
                                   "integrator": False}])
def test_reference_compensator_is_the_table_transfer_function(spec):
    """The reference's own realisation of Gc (integrator state, then a cascade of
    first-order sections) has the frequency response of the formula written out term by term
    (Erickson & Maksimovic ch. 9), evaluated with python-control; its polynomials
    are those the project reads from the same table (bucksim.model.compensator.compensator_tf).
    With an integrator, the first state is a pure integrator of gain x e (the
    anti-windup contract's x_I)."""
    Ac, Bc, Cc, Dc = compensator_ss(spec)
    sys = ct.ss(Ac, Bc[:, None], Cc[None, :], [[Dc]])
    for f in np.logspace(1, 6, 11):
        s = 2j * math.pi * f
        g = spec["gain"] / s if spec.get("integrator", True) else spec["gain"]
        g *= np.prod([1 + s / (2 * math.pi * z) for z in spec.get("zeros", [])])
        g /= np.prod([1 + s / (2 * math.pi * p) for p in spec.get("poles", [])])
        assert complex(ct.evalfr(sys, s)) == pytest.approx(g, rel=1e-12)
    if spec.get("integrator", True):
        assert np.all(Ac[0] == 0.0) and Bc[0] == spec["gain"]
    num, den = compensator_polynomials(spec)
    pnum, pden = compensator_tf(spec)
    assert np.allclose(num, pnum, rtol=1e-14, atol=0) and np.allclose(den, pden, rtol=1e-14,
                                                                       atol=0)


@pytest.mark.parametrize("name", ["voltage-mode type II, forced PWM, dead time, soft start",
                                  "fast integrator held at both limits, forced PWM"])
def test_reference_integrators_agree(name):
    """solve_ivp (DOP853) against the exact augmented exponential (scipy expm, Van Loan
    1978) on the same switching schedule; the comparator is zero on the exact solution
    at each turn-off it ends, x_I is on its limit where a hold starts and the error is
    zero where one ends (the hold rule, Astrom & Hagglund ch. 3); with the on-times
    found, the plant alone (reference_sim's open-loop expm solver) reproduces every
    period."""
    sc, n, ref, tr, _ = case(name)
    exact = ref.replay_expm(tr)
    z = np.array([exact[t] for t in tr.t[1:]])
    assert np.max(np.abs(z - tr.z[1:]) / np.abs(tr.z).max(axis=0)) < 1e-11
    # (t_max - t_k) / T may round below max_duty: a pulse ended by max duty is no residual
    for k in np.flatnonzero((tr.duty > 0) & (tr.duty < sc.control.max_duty * (1 - 1e-12))):
        t_off = tr.t[k] + tr.duty[k] * T
        # ramp slope is ramp / T: the residual over the ramp is the timing error in periods
        assert abs(ref.comparator(t_off, exact[t_off], tr.t[k])) / sc.control.ramp < 1e-11
    lo, hi = integrator_limits(ref.loop)
    for t, hold in tr.holds:
        if hold == FREE:
            assert abs(ref.e(t, exact[t])) / sc.control.reference < 1e-11
        else:
            limit = hi if hold == HELD_HIGH else lo
            assert abs(exact[t][ref.ix] - limit) < 1e-12 * max(1.0, abs(limit))
    c = ref.c
    for k in range(n):
        if tr.duty[k] > 0:
            x1 = simulate_expm(dataclasses.replace(c, duty=tr.duty[k]), 1, x0=tr.z[k, :2])
            assert np.allclose(x1.gate_states[-1], tr.z[k + 1, :2], rtol=1e-11, atol=1e-12)


# -- a. waveform agreement with the reference -------------------------------------------

@pytest.mark.parametrize("name", list(CASES))
def test_waveforms_match_reference(name):
    """iL, vo and the integrator state x_I (the engine's "w1") at every clock instant,
    the duty and the compensator output u(t_k) of every period agree with the
    independent reference (solve_ivp, scipy) to 1e-10 (states and u relative to their
    largest value, duty in periods)."""
    sc, n, ref, tr, run = case(name)
    assert run.success and len(run.duty) == n and len(run.control_output) == n
    x = run.at(tr.t)
    assert x.shape[1] >= 2
    err, k = worst(x[:, 0], tr.z[:, 0])
    assert err < STATE_TOL, f"iL differs by {err:.2e} (relative) at t_{k}"
    err, k = worst(run.at(tr.t, "vo"), tr.vo(ref.c))
    assert err < STATE_TOL, f"vo differs by {err:.2e} (relative) at t_{k}"
    d = np.abs(run.duty - tr.duty)
    assert d.max() < DUTY_TOL, f"duty differs by {d.max():.2e} T in period {np.argmax(d)}"
    err, k = worst(run.control_output, tr.u)
    assert err < STATE_TOL, f"u(t_k) differs by {err:.2e} (relative) in period {k}"
    err, k = worst(x[:, run.stage.state_names.index("w1")], tr.z[:, ref.ix])
    assert err < STATE_TOL, f"x_I differs by {err:.2e} (relative) at t_{k}"
    # a period without a pulse in the reference has none in the engine, and back
    assert np.array_equal(run.duty == 0.0, tr.duty == 0.0)


def test_waveform_cases_cover_their_features():
    """The cases exercise what they are named for (so the agreement above means something)."""
    _, _, _, tr, _ = case("diode emulation, light load, zero-current events")
    assert len(tr.zero_events) > 150
    _, _, _, tr, _ = case("current limit, no soft start")
    assert np.sum(np.isclose(tr.peak, 4.0, rtol=1e-12)) > 10
    sc, _, _, tr, _ = case("min on-time with pulse skipping, diode emulation")
    assert tr.skipped[100:].sum() > 100 and (~tr.skipped[100:]).sum() > 20
    assert np.all(tr.duty[~tr.skipped] * T >= sc.control.min_on_time * (1 - 1e-12))
    _, _, _, tr, _ = case("peak-current with blanking, asynchronous")
    assert np.sum(np.isclose(tr.duty, 0.05, rtol=1e-9)) > 0     # blanking ends the pulse
    _, _, _, tr, _ = case("peak-current D > 0.5 with slope compensation, forced PWM")
    assert tr.duty[-20:].min() > 0.5


@pytest.mark.parametrize("name", list(CASES))
def test_engine_integrator_stays_within_its_limits(name):
    """Anti-windup contract (conditional integration, Astrom & Hagglund ch. 3): the
    engine's integrator state never leaves [0, Dmax Vm] (voltage mode) or [0, inf)
    (peak-current mode) by more than rounding, at any segment start nor on a grid of
    16 points per period."""
    _, n, ref, _, run = case(name)
    j = run.stage.state_names.index("w1")
    lo, hi = integrator_limits(ref.loop)
    w = np.concatenate([run.segments.x0[:, j],
                        run.at(np.linspace(0.0, n * T, 16 * n + 1))[:, j]])
    tol = 8 * EPS * (hi if math.isfinite(hi) else np.abs(w).max())
    assert w.min() >= lo - tol, f"integrator {w.min():.3e} V below {lo}"
    assert w.max() <= hi + tol, f"integrator {w.max():.17g} V above {hi}"


@pytest.mark.parametrize("name", list(HOLDS))
def test_integrator_holds_where_the_reference_holds(name):
    """The reference's integrator goes through the holds the case is built for (so the
    agreement above covers them), and the engine's integrator state sits on the same
    limit, to rounding, at every clock instant inside each of the reference's holds."""
    _, _, ref, tr, run = case(name)
    lo, hi = integrator_limits(ref.loop)
    edges = [t for t, _ in tr.holds] + [tr.t[-1]]
    assert [h for _, h in tr.holds] == [h for h, _ in HOLDS[name]]
    w1 = run.at(tr.t)[:, run.stage.state_names.index("w1")]
    for (t0, hold), t1, (_, periods) in zip(tr.holds, edges[1:], HOLDS[name], strict=True):
        assert t1 - t0 > periods * T, (hold, t0 / T, t1 / T)
        if hold != FREE:
            inside = (tr.t > t0) & (tr.t < t1)
            limit = hi if hold == HELD_HIGH else lo
            assert np.all(tr.z[inside, ref.ix] == limit)
            assert np.max(np.abs(w1[inside] - limit)) <= 8 * EPS * max(1.0, abs(limit))


@pytest.mark.parametrize("name", ["diode emulation, light load, zero-current events",
                                  "min on-time with pulse skipping, diode emulation"])
def test_zero_current_instants_match_reference(name):
    """Every zero-current event (diode emulation turning the low side off) lies where
    the reference's solve_ivp event puts it, to 1e-11 of a period."""
    sc, n, ref, tr, run = case(name)
    seg = run.segments
    idle = seg.conduction == 4
    entries = seg.t0[idle & np.r_[False, ~idle[:-1]]]
    entries = entries[np.min(np.abs(entries[:, None] - tr.t[None, :]), axis=1) > 1e-3 * T]
    assert len(entries) == len(tr.zero_events)
    d = np.abs(entries - tr.zero_events) / T
    assert d.max() < 1e-11, f"event {np.argmax(d)} differs by {d.max():.2e} T"


# -- b. small-signal agreement with the averaged model ---------------------------------

def averaged_loop(sc, D, spec):
    """Averaged CCM buck (Erickson & Maksimovic ch. 7) with parasitics, PWM gain 1/Vm and
    the same analog Gc, built with python-control. Inputs [d, io]; output vo.
    Returns (closed loop io -> vo, loop gain)."""
    L, C = sc.inductor.inductance, sc.output_capacitor.capacitance
    rL, rC, R = sc.inductor.dcr, sc.output_capacitor.esr, sc.load.resistance
    vin, ctl = sc.supply.voltage, sc.control
    rhs, rls = sc.high_side.rds_on, sc.low_side.rds_on
    IL = ctl.reference / R
    k = 1 / (1 + rC / R)
    A = [[-(rL + D * rhs + (1 - D) * rls + k * rC) / L, -k / L], [k / C, -k / (R * C)]]
    # d(vsw)/dd = Vin - (Rhs - Rls) IL; io is a current sink at the output node
    B = [[(vin - (rhs - rls) * IL) / L, k * rC / L], [0.0, -k / C]]
    plant = ct.ss(A, B, [[k * rC, k]], [[0.0, -k * rC]], inputs=["d", "io"], outputs=["vo"])
    gc = ct.tf(*compensator_polynomials(spec), inputs=["e"], outputs=["u"])
    sense = ct.ss([], [], [], [[-ctl.sense_gain]], inputs=["vo"], outputs=["e"])
    pwm = ct.ss([], [], [], [[1.0 / ctl.ramp]], inputs=["u"], outputs=["d"])
    cl = ct.interconnect([plant, gc, sense, pwm], inplist=["io"], outlist=["vo"])
    loop = ct.tf(*compensator_polynomials(spec)) * ct.ss2tf(plant[0, 0]) * (
        ctl.sense_gain / ctl.ramp)
    return cl, loop


def half_crossing(dev):
    """Time [periods] where ``dev`` first reaches half its minimum (linear interpolation)."""
    h = 0.5 * dev.min()
    j = int(np.argmax(dev <= h))
    return j - 1 + (h - dev[j - 1]) / (dev[j] - dev[j - 1])


@pytest.mark.parametrize("spec, post", [({"gain": 1000.0}, 600), (TYPE3, 200)],
                         ids=["integrator, crossover 1.9 kHz", "type III, crossover 20 kHz"])
def test_small_load_step_matches_averaged_model(spec, post):
    """5 % load step (0.25 A on 5 A), crossover below fs/10: the output deviation at the
    clock instants matches the averaged model closed by the same analog Gc
    (python-control) within 10 % in peak and one period in timing."""
    pre, vref, R = 50, 3.3, 0.66
    i_step = 0.05 * vref / R
    sc = rail(analog(compensator=spec), R=R, dead=(0.0, 0.0), cycles=pre + post,
              steps=(LoadStep(pre * T, current=i_step),))
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, start="steady-state"))
    run = bucksim.simulate(sc)
    assert run.success
    vo = run.at(np.arange(pre + post + 1) * T, "vo")
    assert np.ptp(vo[:pre]) < 1e-9            # started on the periodic steady state
    dev_sim = vo[pre:] - vo[pre - 1]
    cl, loop = averaged_loop(dataclasses.replace(sc, load=Load(R)), run.duty[:pre].mean(), spec)
    gm, pm, _, _, wc, _ = ct.stability_margins(loop)
    assert wc / (2 * math.pi) < FS / 10 and pm > 45 and gm > 2
    t = np.arange(post + 1) * T
    _, dev_avg = ct.forced_response(cl, T=t, U=np.full(t.size, i_step))
    assert dev_sim.min() == pytest.approx(dev_avg.min(), rel=0.10)
    assert abs(int(np.argmin(dev_sim)) - int(np.argmin(dev_avg))) <= 1
    assert abs(half_crossing(dev_sim) - half_crossing(dev_avg)) <= 1.0


# -- c. closed-loop steady state --------------------------------------------------------

SETTLE = {
    "voltage mode, PI": lambda: rail(analog(compensator=PI)),
    "voltage mode, type III": lambda: rail(analog(compensator=TYPE3)),
    "peak current, PI": lambda: rail(analog("peak-current", current_sense=0.1,
                                            slope_compensation=2e4,
                                            compensator={"gain": 3000.0, "zeros": [2000.0]})),
}


def assert_same_multipliers(a, b, tol):
    """Each multiplier of ``a`` has a partner in ``b`` within ``tol`` (and as many)."""
    a, b = np.asarray(a), np.asarray(b)
    assert a.shape == b.shape, (a, b)
    for mu in a:
        assert np.min(np.abs(b - mu)) < tol, (mu, b)


@pytest.mark.parametrize("name", list(SETTLE))
def test_steady_state_matches_brute_force_and_reference(name):
    """Integral action: at the periodic steady state the integrator has zero net input
    over a period, so the mean output is the reference (to rounding; within the ripple
    as the acceptance bound). Shooting equals brute-force settling from rest (20000
    periods, 1e-10 relative), and the independent reference's own Newton shooting
    (Aprille & Trick 1972) on its solve_ivp cycle map: plant state 1e-10, Floquet
    multipliers 1e-6 (both from differenced Jacobians)."""
    sc = SETTLE[name]()
    ss = closed_loop_steady_state(sc)
    assert ss.success and ss.residual < 1e-10
    assert np.allclose(bucksim.steady_state(sc).x[:2], ss.x[:2], rtol=1e-10, atol=0)
    run = bucksim.simulate(dataclasses.replace(sc, run=RunSettings(cycles=20000)))
    vo = run.summary().to_dict()["output_voltage"]
    assert abs(vo["mean"] - 3.3) <= vo["ripple"]
    assert vo["mean"] == pytest.approx(3.3, rel=1e-9)
    assert np.allclose(run.x_end[:2], ss.x[:2], rtol=1e-10, atol=0)
    z, mu, res = reference_loop(sc).steady_state()
    assert res < 1e-12
    assert np.allclose(ss.x[:2], z[:2], rtol=1e-10, atol=0)
    assert_same_multipliers(ss.floquet, mu, 1e-6)
    assert np.max(np.abs(mu)) < 1


# -- d. peak-current mode above D = 0.5 --------------------------------------------------

def pcm(slope, cycles=3000):
    """5 V -> 3.3 V (D ~ 0.68), 4 A, Ri = 0.1 V/A, PI (the digital-loop test's rail)."""
    return rail(analog("peak-current", current_sense=0.1, slope_compensation=slope,
                       compensator={"gain": 3000.0, "zeros": [2000.0]}),
                vin=5.0, R=3.3 / 4.0, dead=(0.0, 0.0), cycles=cycles)


def test_peak_current_above_half_duty_needs_slope_compensation():
    """Ridley 1991, Erickson & Maksimovic ch. 12: without slope compensation at D > 0.5 a
    multiplier leaves the unit circle on the negative real axis (period doubling) and
    the duty alternates; with Se >= Ri Vo / (2 L) (x 1.05) all multipliers are inside
    and the duty is constant. The multipliers match the reference's to 1e-6."""
    bare = closed_loop_steady_state(pcm(0.0, cycles=10))
    assert bare.success
    mu = bare.floquet[np.argmax(np.abs(bare.floquet))]
    assert abs(mu) > 1.0 and mu.real < -1.0 and abs(mu.imag) < 1e-9
    _, mu_ref, res = reference_loop(pcm(0.0, cycles=10)).steady_state()
    assert res < 1e-10
    assert_same_multipliers(bare.floquet, mu_ref, 1e-6)
    d = bucksim.simulate(pcm(0.0)).duty[-200:]
    step = np.diff(d)
    assert np.max(np.abs(step)) > 0.1
    # period doubling (irregular, clipped at max_duty): consecutive duties anti-correlated
    assert np.corrcoef(d[1:], d[:-1])[0, 1] < -0.4

    se = pcm_slope(factor=1.05)
    fixed = closed_loop_steady_state(pcm(se, cycles=10))
    assert fixed.success and np.max(np.abs(fixed.floquet)) < 1.0
    _, mu_ref, _ = reference_loop(pcm(se, cycles=10)).steady_state()
    assert_same_multipliers(fixed.floquet, mu_ref, 1e-6)
    d = bucksim.simulate(pcm(se)).duty[-40:]
    assert d.min() > 0.5 and np.max(np.abs(np.diff(d))) < 1e-9


# -- e. soft-start inrush ----------------------------------------------------------------

@pytest.mark.parametrize("spec, ss_time", [(PI, 2e-3), (TYPE3, 1e-3)], ids=["PI", "type III"])
def test_soft_start_inrush_is_c_dv_dt_plus_load(spec, ss_time):
    """Common practice: during a slow reference ramp the inductor carries C dV/dt plus
    the load current (Vref / R at the end of the ramp); the peak adds half the CCM
    ripple dI = Vo (1 - D) / (L fs) (Erickson & Maksimovic ch. 2). 5 %."""
    C, R, vref, L, vin = 220e-6, 1.0, 3.3, 4.7e-6, 12.0
    sc = rail(analog(compensator=spec, soft_start=ss_time), R=R, C=C, L=L,
              cycles=int(1.2 * ss_time * FS))
    run = bucksim.simulate(sc)
    start = [e for e in run.summary().to_dict()["transients"] if e["event"] == "start-up"][0]
    ripple = vref * (1 - vref / vin) / (L * FS)
    assert start["il_peak"] - ripple / 2 == pytest.approx(C * vref / ss_time + vref / R,
                                                          rel=0.05)
    assert start["settled"]


# -- the scenario contract ---------------------------------------------------------------

def test_analog_is_a_scenario_key_and_refuses_sampled_settings(tmp_path):
    """[control] implementation = "analog" (default "digital"); delay and duty_bits
    describe a sampled controller and are errors with analog (the scenario contract)."""
    with open(os.path.join(os.path.dirname(__file__), "..", "..", "scenarios",
                           "startup_5v_softstart.toml")) as f:
        text = f.read()
    assert loads_scenario(text).control.implementation == "digital"
    text = text.replace('mode = "voltage-mode"', 'mode = "voltage-mode"\nimplementation = "analog"')
    assert loads_scenario(text).control.implementation == "analog"
    for extra in ("delay = 1", "duty_bits = 8"):
        with pytest.raises(bucksim.ScenarioError, match="control." + extra.split()[0]):
            loads_scenario(text.replace('implementation = "analog"',
                                        'implementation = "analog"\n' + extra))
    with pytest.raises(bucksim.ScenarioError, match="control.delay"):
        analog(delay=2)
