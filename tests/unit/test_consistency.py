"""One behaviour across implementations: the same rule in the digital and the
analog controller, in the light-load tools and the summary, in the event search.

Sources are named beside each check.
"""

import dataclasses

import numpy as np
import pytest

import bucksim
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

FS = 500e3
T = 1 / FS


def rail(control, vin=12.0, R=0.66, L=4.7e-6, C=47e-6, cycles=3, i0=0.0, v0=0.0,
         strategy="forced-pwm"):
    """A 12 V -> 3.3 V, 500 kHz rail (invented demo values)."""
    hs = Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    return Scenario("consistency", Supply(vin), Switching(FS, strategy, (20e-9, 20e-9)),
                    Inductor(L, 0.01), Capacitor(C, 0.005), hs, ls, Load(R), control,
                    RunSettings(cycles=cycles, initial_current=i0, initial_voltage=v0))


# ----------------------------------------------------------------------------- blanking
BLANK = 200e-9
LIMIT = 4.0


def pcm(impl):
    return Control(mode="peak-current", reference=3.3, implementation=impl,
                   compensator={"gain": 3000.0, "zeros": [2000.0]}, current_sense=0.1,
                   slope_compensation=2e4, min_on_time=BLANK, current_limit=LIMIT)


@pytest.mark.parametrize("impl", ["digital", "analog"])
def test_current_limit_is_blanked_with_the_comparator(impl):
    """Pre-biased start just under the limit: with the high side on, iL rises by
    (Vin - Vo) / L ~ 1.9 A/us and reaches the 4 A limit about 50 ns into the 200 ns
    blanking time. The limit comparator watches the same sensed current as the PWM
    comparator and is blanked with it (leading-edge blanking, common practice), so
    the on-time ends at the end of the blanking time in both implementations, never
    inside it, and iL there is above the limit by the rise over the rest of the
    blanking time."""
    i0 = LIMIT - 0.1
    sc = rail(pcm(impl), i0=i0, v0=3.3)
    run = bucksim.simulate(sc)
    slope = (12.0 - 3.3) / 4.7e-6          # di/dt with the high side on [A/s]
    assert i0 + slope * BLANK > LIMIT      # the limit is reached inside the blanking time
    assert run.duty[0] * T == pytest.approx(BLANK, rel=1e-12)
    il_off = run.at([BLANK])[0, 0]
    assert il_off > LIMIT + 0.5 * slope * (BLANK - 0.1 / slope)


def test_digital_and_analog_current_limits_agree_in_blanking():
    """The same design, digital and analog peak-current control: the first turn-off
    instant (set by the blanked limit) and the state there agree to rounding."""
    i0 = LIMIT - 0.1
    runs = [bucksim.simulate(rail(pcm(impl), i0=i0, v0=3.3)) for impl in ("digital", "analog")]
    t_off = [r.duty[0] * T for r in runs]
    assert t_off[0] == pytest.approx(t_off[1], rel=1e-12, abs=1e-12 * T)
    x = [r.at([t_off[0]])[0, :2] for r in runs]
    assert np.allclose(x[0], x[1], rtol=1e-11)


# ----------------------------------------------------------------------------- reversal
def _sink_rail(io):
    """12 V, duty 0.3, 500 kHz, 4.7 uH, forced PWM, a current-sink load (invented)."""
    hs = Mosfet(1e-3, Diode(0.7, 0.0, section="high_side"), section="high_side")
    ls = Mosfet(1e-3, Diode(0.7, 0.0, section="low_side"), section="low_side")
    return Scenario("reversal boundary", Supply(12.0), Switching(FS, "forced-pwm", (0.0, 0.0)),
                    Inductor(4.7e-6, 0.0), Capacitor(47e-6, 0.0), hs, ls, Load(None, io),
                    Control(duty=0.3), RunSettings(cycles=1))


def test_summary_and_reverse_tool_agree_at_the_reversal_boundary():
    """Loads that put the lowest iL just below zero, at 0.1x and 10x the one
    threshold (bucksim.model.stage.REVERSE_CURRENT_THRESHOLD) of the current scale:
    the summary's ``reverse_current`` and the reverse tool's ``reverses`` give the
    same answer, and it is the threshold's. The boundary is found by secant steps
    on the simulated minimum, starting from the closed form Io = dI / 2
    (Erickson & Maksimovic ch. 2 and 5; forced PWM reverses below it: common
    practice)."""
    from bucksim.model.stage import REVERSE_CURRENT_THRESHOLD
    from bucksim.studies.levels import periodic_run
    from bucksim.studies.reverse import reverse_current

    def extremes(io):
        _, run = periodic_run(_sink_rail(io))
        s = run.summary().to_dict()
        return s["inductor_current"]["min"], s["inductor_current"]["max"], s

    for factor, expect in ((0.1, False), (10.0, True)):
        target = -factor * REVERSE_CURRENT_THRESHOLD
        io = 3.6 * 0.7 / (4.7e-6 * FS) / 2       # dI / 2, lossless closed form
        for _ in range(4):                        # iL shifts one-for-one with the load
            lo, hi, s = extremes(io)
            io -= lo - target * hi
        lo, hi, s = extremes(io)
        assert lo / hi == pytest.approx(target, rel=0.05)
        point, = reverse_current(_sink_rail(io), load=[io]).points
        assert point.reverses is expect
        assert s["reverse_current"] is expect


# ----------------------------------------------------------------------------- transients
def _ringing_start():
    """Open loop from rest, no ESR (vo = vC is smooth, its peaks inside segments),
    Q = R sqrt(C / L) ~ 6: the output rings down over a few hundred us."""
    hs = Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    return Scenario("ring-down", Supply(12.0), Switching(FS, "forced-pwm", (20e-9, 20e-9)),
                    Inductor(4.7e-6, 0.01), Capacitor(47e-6, 0.0), hs, ls, Load(2.0),
                    Control(duty=0.3), RunSettings(cycles=1500))


@pytest.mark.parametrize("depth", [1e-7, 1e-10])
def test_settling_exit_between_samples_is_found(depth):
    """The band is set just under one ring peak (by ``depth`` of the target), so vo
    leaves it for a few ns only, between any two samples of its segment; every
    later value is lower. The settling time is the instant vo falls back through
    the band's top after that peak: scipy's minimize_scalar (the peak) and brentq
    (the crossing) on the run's own exact evaluation give it independently."""
    from scipy.optimize import brentq, minimize_scalar

    from bucksim.analysis.transients import transients

    run = bucksim.simulate(_ringing_start())
    start, = transients(run)               # the start-up event, window [0, t_end]
    ref = start["reference"]
    coarse = np.linspace(100e-6, run.t_end, 20001)
    v = run.at(coarse, "vo")
    t_min = coarse[np.argmin(v[:5000])]     # a ring trough: the peak after it is
    fine = np.linspace(t_min, run.t_end, 400001)   # the highest from there on
    v = run.at(fine, "vo")
    i = int(np.argmax(v))
    assert 0 < i < fine.shape[0] - 1
    peak = minimize_scalar(lambda t: -run.at([t], "vo")[0], bounds=(fine[i - 1], fine[i + 1]),
                           method="bounded", options={"xatol": 1e-16})
    top = -peak.fun - depth * ref
    band = top / ref - 1.0
    want = brentq(lambda t: run.at([t], "vo")[0] - top, peak.x, peak.x + 1e-7,
                  xtol=1e-300, rtol=4 * np.finfo(float).eps)
    ev, = transients(run, band=band)
    assert ev["settled"]
    assert ev["settling_time"] == pytest.approx(want, abs=1e-9 * T)


def test_a_run_started_in_steady_state_has_no_start_up_event():
    """Started on its periodic steady state, the run has no start-up transient; a
    load step in it is still reported, and the same run from rest reports both."""
    from bucksim.model.parts import LoadStep

    base = rail(Control(duty=0.3), cycles=400)
    base = dataclasses.replace(base, load=Load(0.66, steps=(LoadStep(400e-6, 1.32),)))
    steady = dataclasses.replace(base, run=dataclasses.replace(base.run, start="steady-state"))
    kinds = [e["event"] for e in bucksim.simulate(steady).summary()["transients"]]
    assert kinds == ["load step"]
    kinds = [e["event"] for e in bucksim.simulate(base).summary()["transients"]]
    assert kinds == ["start-up", "load step"]


# ----------------------------------------------------------------------------- summary table
def test_capacitor_mean_current_in_steady_state_prints_as_zero():
    """In periodic steady state the capacitor's mean current is zero (capacitor
    charge balance, Erickson & Maksimovic ch. 2); the exact integral leaves
    rounding of ~1e-14 of its RMS, which the table must print as 0, while the
    summary's data keep the computed value. A real mean (the inductor's, the load
    current) prints as computed."""
    from bucksim.model.units import format_si

    sc = rail(Control(duty=0.3), cycles=50)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, start="steady-state"))
    s = bucksim.simulate(sc).summary()
    cap = s["devices"]["output_capacitor"]
    assert 0.0 < abs(cap["mean"]) < 1e-12 * cap["rms"]      # rounding, not zero
    row = next(line for line in s.table().splitlines() if line.startswith("output_capacitor"))
    assert row.split()[1:4] == [*format_si(cap["rms"], "A").split(), "0"]
    ind = next(line for line in s.table().splitlines() if line.startswith("inductor "))
    assert format_si(s["inductor_current"]["mean"], "A") in ind


# ----------------------------------------------------------------------------- slope compensation
def test_slope_compensation_threshold_is_m2_2d_minus_1_over_2d():
    """Peak-current mode at D ~ 0.82 (the bundled handheld rail). The standard stability
    condition of the current loop (Erickson & Maksimovic, Fundamentals of Power
    Electronics, chapter on current-programmed control; Ridley's current-mode model;
    both from memory): a perturbation of the valley current is multiplied by
    -(m2 - ma) / (m1 + ma) per period, with m1 D = m2 (1 - D) in steady state, so the
    loop is stable iff ma > m2 (2D - 1) / (2D). Half the down-slope is sufficient at
    any duty, not necessary: 10 % above the threshold, still below half the
    down-slope, the shooting's Floquet multipliers are inside the unit circle; 10 %
    below it one leaves the circle on the negative real axis (period doubling)."""
    from bucksim.simulation import simulate_settled
    from bucksim.steady.closed_loop import closed_loop_steady_state

    sc = bucksim.load_scenario("scenarios/pcm_rail_3v3_high_duty.toml")
    d = float(simulate_settled(sc, cycles=1).duty[0])
    ri, vo = sc.control.current_sense, sc.control.reference
    m2 = ri * vo / sc.inductor.inductance          # sensed down-slope [V/s]
    threshold = m2 * (2 * d - 1) / (2 * d)
    assert 1.1 * threshold < 0.5 * m2
    for factor, stable in ((1.1, True), (0.9, False)):
        ctl = dataclasses.replace(sc.control, slope_compensation=factor * threshold)
        ss = closed_loop_steady_state(dataclasses.replace(sc, control=ctl))
        mu = ss.floquet[np.argmax(np.abs(ss.floquet))]
        assert bool(abs(mu) < 1.0) is stable, (factor, mu)
        if not stable:
            assert mu.real < -1.0


# ----------------------------------------------------------------------------- figures
@pytest.mark.parametrize("strategy", ["forced-pwm", "diode-emulation"])
def test_reverse_figure_names_the_strategy_once(strategy):
    """The bundled accelerator-card rail's title ends "forced PWM)": the figure's title must
    not repeat it, and must name the strategy when the run uses another one."""
    import matplotlib

    matplotlib.use("Agg")
    from bucksim.studies.reverse import reverse_current
    from bucksim.study_figures import reverse_figure

    sc = bucksim.load_scenario("scenarios/core_rail_1v0.toml")
    sc = dataclasses.replace(sc, switching=dataclasses.replace(sc.switching, strategy=strategy))
    res = reverse_current(sc, load=["2 A", "20 A"])
    title = reverse_figure(res).axes[0].get_title().lower().replace("-", " ")
    assert title.count(strategy.replace("-", " ")) == 1, title


# ----------------------------------------------------------------------------- scenario notes
def test_telemetry_scenario_states_its_phase_margins():
    """The telemetry rail's comment states the phase margin at both load levels of
    the run. The averaged CCM buck with its parasitics (Erickson & Maksimovic ch. 7),
    closed by the same analog compensator, gives them with python-control's
    stability_margins (tests/validation/test_analog_loop.py builds that model), at the duty
    of each settled operating point; the comment must match to 1 degree."""
    import math
    import re

    import control as ct

    from bucksim.simulation import simulate_settled
    from tests.validation.test_analog_loop import averaged_loop

    path = "scenarios/telemetry_rail_1v8_analog.toml"
    sc = bucksim.load_scenario(path)
    with open(path, encoding="utf-8") as f:
        text = " ".join(line.strip().lstrip("#").strip() for line in f if line.startswith("#"))
    found = re.search(r"phase margin of about (\d+) degrees at the 1 A load and about "
                      r"(\d+) degrees at 6 A", text)
    assert found, "the comment must state the margin at 1 A and at 6 A"
    stated = [float(found.group(1)), float(found.group(2))]
    for resistance, want in zip((1.8, 0.3), stated, strict=True):  # 1.8 V / 1 A, 1.8 V / 6 A
        point = dataclasses.replace(sc, load=Load(resistance))
        duty = float(simulate_settled(point, cycles=1).duty[0])
        _, loop = averaged_loop(point, duty, sc.control.compensator)
        _, pm, _, _, wc, _ = ct.stability_margins(loop)
        assert pm == pytest.approx(want, abs=1.0), (resistance, pm)
        assert 40e3 < wc / (2 * math.pi) < 60e3                # "near 48 kHz"


# ----------------------------------------------------------------------------- event search
def _chain(coef):
    """A nilpotent chain z = [x1 .. x4, 1] whose x1 is the quartic sum coef[k] t^k
    (x1' = x2, x2' = x3, x3' = x4, x4' = 24 coef[4]); no time constant, so the
    search takes the whole interval as one sub-step."""
    import math

    a = [coef[k] * math.factorial(k) for k in range(5)]
    M = np.zeros((5, 5))
    M[0, 1] = M[1, 2] = M[2, 3] = 1.0
    M[3, 4] = a[4]
    return M, np.array([a[0], a[1], a[2], a[3], 1.0])


# W-shaped quartics on [0, 1]: positive at both ends, falling at 0 and rising at
# 1, with two dips; the search used to stop its extremum refinement on "twice the
# end slopes" and returned no crossing or a later one
_W_SHAPES = {
    "first dip crosses, second does not": [0.6098286160362613, -7.801560677678469,
                                           31.724833271073077, -44.76542518031959,
                                           20.35669478195791],
    "both dips cross": [0.8635597819247615, -8.078780118032093, 26.724884420043495,
                        -37.182679048518445, 18.44216999519092],
}


@pytest.mark.parametrize("name", list(_W_SHAPES))
def test_event_search_finds_the_first_of_several_crossings(name):
    """The first zero in (0, 1] of the quartic against numpy's polynomial roots,
    to 1e-12; the state there against scipy's expm."""
    from numpy.polynomial import polynomial as P
    from scipy.linalg import expm

    from bucksim.engine.kernels import find_zero
    from bucksim.engine.tables import build_table

    coef = np.array(_W_SHAPES[name])
    roots = P.polyroots(coef)
    real = np.sort(roots[(abs(roots.imag) < 1e-12) & (roots.real > 0) & (roots.real < 1)].real)
    assert real.size >= 2 and P.polyval(0.0, coef) > 0 and P.polyval(1.0, coef) > 0
    M, z = _chain(coef)
    table = build_table(M[None], 1.0)
    assert table.guard >= 1e300           # no time constant: one sub-step
    c = np.array([1.0, 0, 0, 0, 0])
    za = z.copy()
    tz = find_zero(table.matrices, table.exponentials, table.steps, 0, za, expm(M) @ z, 0.0,
                   1.0, 1.0, table.guard, np.empty(10), np.empty(5), np.empty(5), c, 0.0, 0.0,
                   0.0, False, table.taylor_gap)
    assert tz == pytest.approx(real[0], abs=1e-12)
    assert np.allclose(za, expm(M * tz) @ z, rtol=1e-12, atol=1e-12)


def test_event_search_reports_no_crossing_above_a_near_miss():
    """The same W shape lifted so that its lower dip stays 1e-6 above zero: the
    search must prove the whole interval free of zeros (and not report one)."""
    from numpy.polynomial import polynomial as P
    from scipy.linalg import expm

    from bucksim.engine.kernels import find_zero
    from bucksim.engine.tables import build_table

    coef = np.array(_W_SHAPES["first dip crosses, second does not"])
    crit = P.polyroots(P.polyder(coef)).real
    low = min(P.polyval(x, coef) for x in crit if 0 < x < 1)
    coef[0] += -low + 1e-6
    M, z = _chain(coef)
    table = build_table(M[None], 1.0)
    c = np.array([1.0, 0, 0, 0, 0])
    tz = find_zero(table.matrices, table.exponentials, table.steps, 0, z.copy(), expm(M) @ z,
                   0.0, 1.0, 1.0, table.guard, np.empty(10), np.empty(5), np.empty(5), c, 0.0,
                   0.0, 0.0, False, table.taylor_gap)
    assert tz == -1.0
