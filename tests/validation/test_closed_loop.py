"""Closed-loop control: steady state, small-signal agreement, current-mode stability, start-up.

Sources: Erickson & Maksimovic, Fundamentals of Power Electronics, 3rd ed.
(averaged models ch. 7-9, current-programmed control ch. 12); Ridley, "A new,
continuous-time model for current-mode control", IEEE Trans. Power Electron.
1991 (subharmonic oscillation above D = 0.5 without slope compensation);
python-control (general reference library) for the averaged loop; circuit
theory for the series RLC step response.
"""

import dataclasses

import control as ct
import numpy as np
import pytest
from scipy import signal

import bucksim
from bucksim.model.compensator import design
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
from bucksim.steady.closed_loop import closed_loop_steady_state

FS = 500e3


def rail(control, vin=12.0, R=0.66, L=4.7e-6, C=47e-6, esr=0.005, dcr=0.01, cycles=3000,
         steps=(), strategy="forced-pwm", dead=(20e-9, 20e-9), fs=FS, rds=(0.01, 0.005)):
    hs = Mosfet(rds[0], Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = Mosfet(rds[1], Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    return Scenario("loop test", Supply(vin), Switching(fs, strategy, dead), Inductor(L, dcr),
                    Capacitor(C, esr), hs, ls, Load(R, steps=steps), control,
                    RunSettings(cycles=cycles))


PI = {"gain": 2000.0, "zeros": [2000.0]}


def test_integrating_loop_regulates_within_ripple_and_matches_brute_force():
    sc = rail(Control(mode="voltage-mode", reference=3.3, compensator=PI))
    ss = closed_loop_steady_state(sc)
    assert ss.success and ss.residual < 1e-10
    assert ss.stable
    run = bucksim.simulate(dataclasses.replace(sc, run=RunSettings(cycles=20000)))
    s = run.summary().to_dict()
    vo = s["output_voltage"]
    # integral action: the sampled output equals the reference, so the mean
    # lies within the ripple band of the reference
    assert abs(vo["mean"] - 3.3) <= vo["ripple"]
    assert np.allclose(run.x_end, ss.x, rtol=1e-9)
    assert np.allclose(run.controller_state.w, ss.controller.w, rtol=1e-8, atol=1e-12)


def averaged_plant(sc):
    """ZOH-discretised averaged plant, inputs [d, i_load], output vo."""
    return averaged_loop(sc, None, plant_only=True)


def averaged_loop(sc, comp, plant_only=False):
    """Averaged small-signal buck (Erickson ch. 7) closed by the same digital compensator.

    States [iL, vC]; inputs [d, i_load]; output vo. The duty is held for a
    period from the sample at its start, so the plant is discretised with a
    zero-order hold at T (python-control c2d).
    """
    L, C = sc.inductor.inductance, sc.output_capacitor.capacitance
    rL, rC = sc.inductor.dcr, sc.output_capacitor.esr
    R = sc.load.resistance
    vin = sc.supply.voltage
    D = 3.3 / vin
    r_sw = D * sc.high_side.rds_on + (1 - D) * sc.low_side.rds_on
    k = 1 / (1 + rC / R)
    A = np.array([[-(rL + r_sw + k * rC) / L, -k / L], [k / C, -k / (R * C)]])
    B = np.array([[vin / L, k * rC / L], [0.0, -k / C]])   # [d, i_load]
    Cm = np.array([[k * rC, k]])
    Dm = np.array([[0.0, -k * rC]])
    T = 1 / sc.switching.frequency
    zoh = ct.c2d(ct.ss(A, B, Cm, Dm), T, method="zoh")
    plant = ct.ss(zoh.A, zoh.B, zoh.C, zoh.D, T, inputs=["d", "i_load"], outputs=["vo"])
    if plant_only:
        return plant
    K = ct.ss(comp.Ad, comp.Bd[:, None], comp.Cd[None, :], [[comp.Dd]], T,
              inputs=["e"], outputs=["u"])
    error = ct.ss([], [], [], [[-sc.control.sense_gain]], T, inputs=["vo"], outputs=["e"])
    pwm = ct.ss([], [], [], [[1.0 / sc.control.ramp]], T, inputs=["u"], outputs=["d"])
    return ct.interconnect([plant, K, error, pwm], inplist=["i_load"], outlist=["vo"])


def test_small_load_step_matches_averaged_model():
    """5 % load step, crossover below fs/10: deviation within 10 % in peak and one
    period in timing of the averaged model built with python-control."""
    comp_spec = {"gain": 1000.0}   # integrator: crossover ~ 2 kHz, well below fs/10
    i_step = 0.05 * 5.0
    R0 = 0.66
    t_step = 2e-3
    R1 = 1 / (1 / R0 + i_step / 3.3)
    sc = rail(Control(mode="voltage-mode", reference=3.3, compensator=comp_spec),
              R=R0, steps=(LoadStep(t_step, resistance=R1),), cycles=2000)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, start="steady-state"))
    run = bucksim.simulate(sc)
    T = sc.period
    k = np.arange(int(t_step / T) - 5, sc.n_cycles)
    vo = run.at(k * T, "vo")
    dev_sim = vo - vo[:5].mean()
    comp = design(comp_spec, T)
    cl = averaged_loop(dataclasses.replace(sc, load=Load(R0)), comp)
    loop = ct.ss(comp.Ad, comp.Bd[:, None], comp.Cd[None, :], [[comp.Dd]], T) * averaged_plant(
        dataclasses.replace(sc, load=Load(R0)))[0, 0]
    gm, pm, sm, w_phase, w_gain, w_sm = ct.stability_margins(loop, method="frd")
    assert w_gain / (2 * np.pi) < sc.switching.frequency / 10 and pm > 30
    n = len(k) - 5
    _, y = ct.forced_response(cl, T=np.arange(n) * T, U=np.full(n, i_step))
    dev_avg = np.concatenate([np.zeros(5), y])
    p_sim, p_avg = np.argmin(dev_sim), np.argmin(dev_avg)
    assert dev_sim[p_sim] == pytest.approx(dev_avg[p_avg], rel=0.10)
    assert abs(p_sim - p_avg) <= 1


def pcm(vin, vo, slope, cycles=600):
    ctl = Control(mode="peak-current", reference=vo, current_sense=0.1,
                  slope_compensation=slope, compensator={"gain": 3000.0, "zeros": [2000.0]},
                  max_duty=0.95)
    return rail(ctl, vin=vin, R=vo / 4.0, cycles=cycles, dead=(0.0, 0.0))


def test_peak_current_above_half_duty_needs_slope_compensation():
    vin, vo, L, Ri = 5.0, 3.3, 4.7e-6, 0.1
    m2 = vo / L                       # inductor down-slope [A/s]
    bare = closed_loop_steady_state(pcm(vin, vo, 0.0))
    # Ridley 1991 / common practice: without compensation a multiplier leaves
    # the unit circle (period doubling) when D > 0.5
    assert vo / vin > 0.5
    assert np.max(np.abs(bare.floquet)) > 1.0
    mu = bare.floquet[np.argmax(np.abs(bare.floquet))]
    assert mu.real < -1.0               # negative real: subharmonic, not a slow drift
    run = bucksim.simulate(pcm(vin, vo, 0.0, cycles=3000))
    d = run.duty[-40:]
    assert np.max(np.abs(d[1:] - d[:-1])) > 0.02      # alternating pulses
    fixed = closed_loop_steady_state(pcm(vin, vo, 0.5 * Ri * m2 * 1.05))
    assert np.max(np.abs(fixed.floquet)) < 1.0
    run = bucksim.simulate(pcm(vin, vo, 0.5 * Ri * m2 * 1.05, cycles=3000))
    d = run.duty[-40:]
    assert np.max(np.abs(d[1:] - d[:-1])) < 1e-6


def test_soft_start_inrush_is_c_dv_dt_plus_load():
    """Common practice: during a slow reference ramp the inductor carries
    C dV/dt + the load current; at the end of the ramp the load is Vref/R."""
    ss_time = 2e-3
    C, R, vref, L = 220e-6, 1.0, 3.3, 4.7e-6
    sc = rail(Control(mode="voltage-mode", reference=vref, compensator=PI, soft_start=ss_time),
              R=R, C=C, L=L, cycles=int(1.2 * ss_time * FS))
    run = bucksim.simulate(sc)
    tr = [e for e in run.summary().to_dict()["transients"] if e["event"] == "start-up"][0]
    # subtract half the CCM ripple dI = Vo (1 - D) / (L fs) (Erickson ch. 2)
    ripple = vref * (1 - vref / 12.0) / (L * FS)
    expected = C * vref / ss_time + vref / R
    assert tr["il_peak"] - ripple / 2 == pytest.approx(expected, rel=0.05)


def test_open_loop_start_without_soft_start_matches_rlc_step():
    """Series RLC step response (circuit theory), computed with scipy.signal from
    the averaged circuit; the switched peak adds half the ripple."""
    L, C, R = 10e-6, 100e-6, 2.0
    D, vin = 0.5, 10.0
    sc = rail(Control(duty=D), vin=vin, R=R, L=L, C=C, esr=0.0, dcr=0.0, fs=1e6,
              rds=(1e-3, 1e-3), dead=(0.0, 0.0), cycles=1000)
    run = bucksim.simulate(sc)
    il_peak = run.summary().to_dict()["transients"][0]["il_peak"]
    r = 1e-3   # D Rhs + (1 - D) Rls
    A = [[-r / L, -1 / L], [1 / C, -1 / (R * C)]]
    sys = signal.StateSpace(A, [[D * vin / L], [0]], [[1, 0]], [[0]])
    t = np.linspace(0, 1e-3, 200001)
    _, il = signal.step(sys, T=t)
    ripple = D * vin * (1 - D) / (L * 1e6)
    assert il_peak == pytest.approx(il.max() + ripple / 2, rel=0.02)


CLOSED_LOOP_DEMOS = ["startup_5v_softstart.toml", "core_rail_0v9_load_step.toml",
                     "pcm_rail_3v3_high_duty.toml", "telemetry_rail_1v8_analog.toml"]


@pytest.mark.parametrize("name", CLOSED_LOOP_DEMOS)
def test_closed_loop_demo_scenarios_regulate(name):
    """Each bundled closed-loop demo ends regulated: integral action puts the mean
    output within its ripple of the reference, and every event settles into the
    +-1 % band before the run ends."""
    sc = bucksim.load_scenario(f"scenarios/{name}")
    run = bucksim.simulate(sc)
    s = run.summary().to_dict()
    assert s["energy_balance_error"] < 1e-9
    assert abs(s["output_voltage"]["mean"] - sc.control.reference) <= s["output_voltage"]["ripple"]
    for event in s["transients"]:
        assert event["settled"] and np.isfinite(event["settling_time"])


def test_closed_loop_scenarios_work_with_crosscheck_and_sweeps():
    """The settled operating point of a closed loop: the closed form at the duty
    that meets the reference agrees with the waveforms in CCM."""
    sc = bucksim.load_scenario("scenarios/startup_5v_softstart.toml")
    cc = bucksim.crosscheck(sc)
    rows = {r["item"]: r for r in cc.rows}
    assert rows["high_side.conduction"]["percent"] == pytest.approx(0.0, abs=1.0)
    table = bucksim.sweep(sc, vary={"load.resistance": [2.0, 4.0]}, workers=1, progress=False)
    assert not any(table.column("error"))
    eff = table.column("efficiency")
    assert np.all((eff > 0.5) & (eff < 1.0))


def test_unstable_loop_is_reported_and_kept():
    """A compensator gain far beyond crossover limits makes the loop bang between its
    duty limits; the run says so (success False) and keeps every segment."""
    sc = rail(Control(mode="voltage-mode", reference=3.3,
                      compensator={"gain": 2e6, "zeros": [1e3]}), cycles=2000)
    run = bucksim.simulate(sc)
    assert not run.success and "did not settle" in run.message
    assert run.t_end == pytest.approx(sc.duration) and len(run.segments) > 2000
    with pytest.raises(bucksim.SimulationError):
        bucksim.simulate(sc, check=True)


IMPLEMENTATIONS = ["digital", "analog"]


@pytest.mark.parametrize("impl", IMPLEMENTATIONS)
def test_pre_biased_start_in_diode_emulation_does_not_sink(impl):
    """Common practice: a controller starting into a pre-charged output ramps its
    reference from 0 but must not discharge the output; diode emulation never lets
    the inductor current go negative, so the output cannot be pulled down."""
    sc = rail(Control(mode="voltage-mode", reference=3.3, compensator=PI, soft_start=1e-3,
                      implementation=impl), strategy="diode-emulation", R=10.0, cycles=1000)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, initial_voltage=2.0))
    run = bucksim.simulate(sc)
    t = np.linspace(0, sc.duration, 20001)
    assert run.at(t)[:, 0].min() >= 0.0
    # only the load drains it while the ramp is below the pre-bias (RC decay bound)
    vo = run.at(t, "vo")
    assert vo.min() > 2.0 * np.exp(-sc.duration / (10.0 * sc.output_capacitor.capacitance)) - 1e-3
    # forced PWM, by contrast, sinks current from the pre-charged output
    fpwm = bucksim.simulate(dataclasses.replace(sc, switching=Switching(FS, "forced-pwm",
                                                                        (20e-9, 20e-9))))
    assert fpwm.at(t)[:, 0].min() < -0.1


@pytest.mark.parametrize("impl", IMPLEMENTATIONS)
def test_cycle_by_cycle_current_limit_caps_the_inrush(impl):
    """Without soft-start the loop demands full duty at start-up; the limit turns the
    high side off where iL reaches it (located on the analytic solution), so the
    peak current is the limit (common practice)."""
    limit = 4.0
    sc = rail(Control(mode="voltage-mode", reference=3.3, compensator=PI,
                      current_limit=limit, implementation=impl), R=1.0, C=220e-6, cycles=800)
    run = bucksim.simulate(sc)
    peak = max(e["il_peak"] for e in run.summary().to_dict()["transients"])
    assert peak == pytest.approx(limit, rel=1e-9)
    free = bucksim.simulate(dataclasses.replace(sc, control=dataclasses.replace(
        sc.control, current_limit=None)))
    assert max(e["il_peak"] for e in free.summary().to_dict()["transients"]) > 1.5 * limit


@pytest.mark.parametrize("impl", IMPLEMENTATIONS)
def test_pulse_skipping_below_the_minimum_on_time(impl):
    """At light load in diode emulation the loop asks for on-times below the minimum;
    with pulse skipping those periods carry no pulse at all, and regulation holds."""
    # no soft-start: the start-up overshoot into this light load would wind an
    # unprotected integrator far down (the output decays through 330 ohm only);
    # both controllers hold their integrator at its lower limit instead
    ctl = Control(mode="voltage-mode", reference=3.3, compensator=PI, min_on_time=400e-9,
                  pulse_skipping=True, implementation=impl)
    sc = rail(ctl, strategy="diode-emulation", R=330.0, cycles=4000)
    run = bucksim.simulate(sc)
    d = run.duty[-400:]
    assert np.any(d == 0.0) and np.all((d == 0.0) | (d * sc.period >= 400e-9 - 1e-15))
    assert abs(run.summary().to_dict()["output_voltage"]["mean"] - 3.3) < 0.05
