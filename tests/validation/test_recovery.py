"""Charge-control reverse recovery (bucksim.analysis.recovery) against independent references.

The model is the charge-control equation of a diode's stored charge,
``dq/dt = i_F - q / tau`` (R. W. Erickson and D. Maksimovic, *Fundamentals of
Power Electronics*, 3rd ed., Springer, 2020, ch. 4, diode recovery; R. Beaufoy
and J. J. Sparkes, ATE Journal 13, 1957, the charge-control model; both cited
from memory). References used here:

* its closed-form solution for a constant forward current,
  ``q = I tau (1 - exp(-t / tau))`` (the textbook's first-order response), and
  for a linearly falling current, derived with sympy in the test;
* ``scipy.integrate.solve_ivp`` (DOP853) of ``q' = i_F(t) - q / tau`` with
  ``i_F`` the run's own diode-current signal, segment by segment, the
  periodic start found by iterating the period map (no closed form).

Stage numbers are invented for the tests. Where a run's current only
approximates the analytic shape, the test bounds the deviation from the
run's own values and asserts the bound is far below the checked difference.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import sympy as sp
from scipy.integrate import solve_ivp

from bucksim.analysis.recovery import recovered_charges, recovery_parameters
from bucksim.analysis.switching import switching_energy
from bucksim.errors import ScenarioError
from bucksim.model.parts import Diode, Mosfet, SupplyStep
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH, loads_scenario
from bucksim.model.stage import HIGH, HIGH_DIODE, IDLE, LOW, LOW_DIODE
from bucksim.simulation import simulate, simulate_settled
from tests.references.stage_solver import buck_scenario


def with_diodes(sc, low=None, high=None):
    """``sc`` with the recovery keys ``low``/``high`` (dicts) set on its two diodes."""
    ls, hs = sc.low_side, sc.high_side
    if high is not None:
        hs = dataclasses.replace(hs, body_diode=dataclasses.replace(
            hs.body_diode, section="high_side.body_diode", **high))
    if low is not None:
        if isinstance(ls, Mosfet):
            ls = dataclasses.replace(ls, body_diode=dataclasses.replace(
                ls.body_diode, section="low_side.body_diode", **low))
        else:
            ls = dataclasses.replace(ls, section="low_side", **low)
    return dataclasses.replace(sc, low_side=ls, high_side=hs)


def segments_of(run, code):
    return np.flatnonzero(run.segments.conduction == code)


# -- the parameter rules -------------------------------------------------------

@pytest.mark.parametrize("keys, tau, k", [
    ({"qrr": 20e-9}, 0.0, 1.0),                                        # fixed charge
    ({"qrr": 20e-9, "qrr_current": 4.0}, 5e-9, 1.0),                   # tau = qrr / I
    ({"tau": 30e-9}, 30e-9, 1.0),
    ({"tau": 30e-9, "qrr": 60e-9, "qrr_current": 4.0}, 30e-9, 0.5),    # k = qrr / (I tau)
    ({"tau": 5e-9, "qrr": 20e-9, "qrr_current": 4.0}, 5e-9, 1.0),      # k = 1 exactly
])
def test_recovery_parameters_follow_the_key_rules(keys, tau, k):
    got_tau, got_k = recovery_parameters(Diode(0.7, **keys))
    assert got_tau == pytest.approx(tau, rel=1e-15, abs=0.0)
    assert got_k == pytest.approx(k, rel=1e-15)


@pytest.mark.parametrize("keys, key, value, words", [
    ({"qrr_current": 4.0}, "qrr_current", 4.0, "give qrr"),
    ({"qrr": 20e-9, "tau": 30e-9}, "qrr_current", 0.0, "must be > 0 A when tau and qrr"),
    ({"qrr": 200e-9, "tau": 30e-9, "qrr_current": 4.0}, "tau", 30e-9, "(0, 1]"),
    ({"tau": -1e-9}, "tau", -1e-9, "must be >= 0 s"),
])
def test_diode_refuses_what_says_nothing_definite(keys, key, value, words):
    with pytest.raises(ScenarioError) as info:
        Diode(0.7, section="low_side.body_diode", **keys)
    err = info.value
    assert err.key == f"low_side.body_diode.{key}"
    assert err.value == value
    assert words in str(err) and repr(value) in str(err)


def test_refusal_from_a_file_names_file_line_and_key():
    text = DEFAULT_SCENARIO_PATH.read_text()
    old = 'body_diode = { vf = "0.75 V", r = "8 mohm", qrr = "25 nC" }'
    assert text.count(old) == 1
    text = text.replace(old, old[:-2] + ', tau = "1 ns", qrr_current = "5 A" }')
    line = 1 + text.splitlines().index(next(s for s in text.splitlines() if 'tau = "1 ns"' in s))
    with pytest.raises(ScenarioError) as info:
        loads_scenario(text, source="rail.toml")
    msg = str(info.value)
    assert msg.startswith(f"rail.toml:{line}: low_side.body_diode.tau: must be >= qrr / "
                          f"qrr_current = 5e-09 s")
    assert msg.endswith("got 1e-09")


# -- closed forms on real runs -----------------------------------------------

# An asynchronous stage with a 1 kH inductor carries a practically constant
# current through its freewheel diode for the whole off-time.
VIN, DUTY, FS = 12.0, 0.25, 1e6
T_OFF = (1 - DUTY) / FS


def constant_current_run(diode_keys):
    sc = buck_scenario(vin=VIN, duty=DUTY, frequency=FS, strategy="asynchronous",
                       inductance=1e3, capacitance=1e-3, resistance=3.0, cycles=2,
                       x0=(1.0, 3.0))
    return simulate(with_diodes(sc, low=diode_keys))


@pytest.mark.parametrize("tau", [50e-9, 750e-9, 5e-6])
@pytest.mark.parametrize("k", [1.0, 0.5])
def test_constant_forward_current_matches_first_order_response(tau, k):
    keys = {"tau": tau} if k == 1.0 else {"tau": tau, "qrr_current": 2.0, "qrr": k * 2.0 * tau}
    run = constant_current_run(keys)
    j = segments_of(run, LOW_DIODE)[0]
    seg = run.segments
    i_a, i_b = run.segment_values("iL", [j, j], [0.0, seg.dt[j]])
    # iL is monotone inside the segment, so |iL - i_a| <= |i_b - i_a| throughout,
    # and the charge's response to that deviation is at most |i_b - i_a| tau
    bound = abs(i_b - i_a) * tau
    mid = seg.t0[j] + 0.5 * T_OFF
    out = recovered_charges(run, 0.0, mid)["low_side"]
    q_mid = i_a * tau * -math.expm1(-0.5 * T_OFF / tau)
    assert abs(out["stored_charge"] - q_mid) <= bound + 1e-13 * q_mid
    rec = recovered_charges(run)["low_side"]
    q_end = i_a * tau * -math.expm1(-T_OFF / tau)
    assert bound < 1e-7 * q_end          # the check below is far tighter than the effect
    assert rec["mode"] == "charge-control" and rec["k"] == pytest.approx(k)
    np.testing.assert_allclose(rec["times"], [0.0, 1 / FS], rtol=1e-12, atol=0)
    assert rec["charges"][0] == 0.0      # a run from a given state holds no charge at t = 0
    assert abs(rec["charges"][1] - k * q_end) <= k * bound + 1e-13 * q_end
    np.testing.assert_allclose(rec["vin"], VIN, rtol=1e-15)


def linear_fall_solution():
    """``q(t)`` of ``q' = i0 - s t - q / tau``, ``q(0) = 0`` (sympy), as a function."""
    t, tau, i0, s = sp.symbols("t tau i0 s", positive=True)
    q = sp.Function("q")
    ode = sp.Eq(q(t).diff(t), i0 - s * t - q(t) / tau)
    sol = sp.dsolve(ode, q(t), ics={q(0): 0}).rhs
    assert sp.simplify(sol.diff(t) - (i0 - s * t - sol / tau)) == 0
    return sp.lambdify((t, tau, i0, s), sol, "math")


@pytest.mark.parametrize("tau", [100e-9, 1e-6])
def test_linearly_falling_current_then_idle_matches_sympy(tau):
    """DCM asynchronous stage: the freewheel current falls linearly to zero, the
    charge then decays through the idle interval until the next turn-on."""
    q_lin = linear_fall_solution()
    vin, fs, L = 12.0, 500e3, 10e-6
    sc = buck_scenario(vin=vin, duty=0.2, frequency=fs, strategy="asynchronous", inductance=L,
                       capacitance=1.0, vf_ls=0.7, cycles=2, x0=(0.0, 3.0))
    run = simulate(with_diodes(sc, low={"tau": tau}))
    seg = run.segments
    j = segments_of(run, LOW_DIODE)[0]
    assert seg.conduction[j + 1] == IDLE and seg.conduction[j + 2] == HIGH
    d, d_idle = seg.dt[j], seg.dt[j + 1]
    i0 = run.segment_values("iL", [j], [0.0])[0]
    v_a, v_b = run.segment_values("vC", [j, j], [0.0, d])
    slope = (0.7 + v_a) / L          # diL/dt at the start: no resistance in the loop
    # vC rises by v_b - v_a over the segment, so the slope drifts by at most
    # (v_b - v_a) / L and the current by d (v_b - v_a) / L; the charge by min(d, tau)
    # times that at the segment's end, decaying like the charge itself afterwards
    decay = math.exp(-d_idle / tau)
    bound = d * (v_b - v_a) / L * min(d, tau) * decay
    expected = q_lin(d, tau, i0, slope) * decay
    rec = recovered_charges(run)["low_side"]
    assert rec["times"][1] == seg.t0[j + 2]
    assert bound < 1e-6 * expected
    assert abs(rec["charges"][1] - expected) <= bound + 1e-12 * expected


def test_short_light_conduction_recovers_almost_nothing():
    """18 mA through the body diode for a 5 ns dead time: q = I tau (1 - e^{-t/tau})."""
    current, td, qrr, i_rated, tau = 0.018, 5e-9, 50e-9, 10.0, 25e-9
    sc = buck_scenario(vin=12.0, duty=0.3, frequency=1e6, strategy="forced-pwm",
                       inductance=1.0, capacitance=100e-6, resistance=200.0,
                       dead_time=(0.0, td), cycles=2, x0=(current, 3.6))
    keys = {"qrr": qrr, "qrr_current": i_rated, "tau": tau}
    run = simulate(with_diodes(sc, low=keys, high=keys))
    k = qrr / (i_rated * tau)
    expected = k * current * tau * -math.expm1(-td / tau)
    rec = recovered_charges(run)
    low = rec["low_side"]
    assert low["charges"][1] == pytest.approx(expected, rel=1e-6)
    assert low["charges"][1] < 1e-3 * qrr           # measured: 3.3e-4 of the stated Qrr
    assert rec["high_side"]["charges"].tolist() == [0.0, 0.0]  # it never conducted
    fixed = recovered_charges(simulate(with_diodes(sc, low={"qrr": qrr})))["low_side"]
    assert fixed["mode"] == "fixed" and fixed["charges"][1] == qrr


# -- against solve_ivp on general runs ---------------------------------------

SIGNAL = {"low_side": "low_side_body_diode", "high_side": "high_side_body_diode"}
FORCED_BY = {"low_side": HIGH, "high_side": LOW}


def reference_pass(run, name, tau, k, q0, prev0, stop=None):
    """``q' = i_F(t) - q / tau`` by solve_ivp, segment by segment, ``i_F`` from the run.

    Returns the recovery instants, the recovered charges and the charge at the
    end of segment ``stop - 1``. A recovery is an entry into the opposite
    channel: the charge ``k q`` is swept out and none is left.
    """
    seg = run.segments
    sig = run.signal_table(SIGNAL[name])
    stop = len(seg) if stop is None else stop
    q, times, charges = q0, [], []
    for j in range(stop):
        prev = prev0 if j == 0 else seg.conduction[j - 1]
        if seg.conduction[j] == FORCED_BY[name] and prev != FORCED_BY[name]:
            times.append(seg.t0[j])
            charges.append(k * q)
            q = 0.0
        d = float(seg.dt[j])
        if not np.any(sig[seg.system[j]]):
            q *= math.exp(-d / tau)
            continue

        def rhs(u, y, j=j):
            return [run.segment_values(SIGNAL[name], [j], [u])[0] - y[0] / tau]

        sol = solve_ivp(rhs, (0.0, d), [q], method="DOP853", rtol=1e-12, atol=1e-24)
        q = float(sol.y[0, -1])
    return np.array(times), np.array(charges), q


def period_end_index(run):
    seg = run.segments
    return int(np.searchsorted(seg.t0, seg.t0[0] + run.period * (1 - 1e-9)))


def reference_periodic(run, name, tau, k, iterations=80):
    """Periodic charge before t = 0 by iterating the reference's period map."""
    p = period_end_index(run)
    prev0 = run.segments.conduction[p - 1]
    q = 0.0
    for _ in range(iterations):
        q_next = reference_pass(run, name, tau, k, q, prev0, stop=p)[2]
        if abs(q_next - q) <= 1e-15 * abs(q_next):
            return q_next, prev0
        q = q_next
    raise AssertionError("the period map did not converge")


def assert_matches_reference(run, name, tau, k, q0, prev0):
    got = recovered_charges(run)[name]
    times, charges, q_end = reference_pass(run, name, tau, k, q0, prev0)
    scale = max(np.max(np.abs(charges), initial=0.0), abs(q_end))
    assert scale > 0
    np.testing.assert_array_equal(got["times"], times)
    np.testing.assert_allclose(got["charges"], charges, rtol=0, atol=1e-9 * scale)
    assert got["stored_charge"] == pytest.approx(q_end, rel=1e-9, abs=1e-9 * scale)
    return got


LIGHT_FPWM = dict(vin=12.0, duty=0.3, frequency=1e6, strategy="forced-pwm", inductance=2.2e-6,
                  capacitance=10e-6, resistance=10.0, r_ls=10e-3, dead_time=(20e-9, 30e-9))
# k = 0.6 on the low side, 1 on the high side (tau alone); lifetimes long enough
# that some charge outlives the channel phase after the dead time that stored it
DIODES = {"low": {"tau": 200e-9, "qrr": 0.6 * 5.0 * 200e-9, "qrr_current": 5.0},
          "high": {"tau": 100e-9}}
KS = {"low_side": 0.6, "high_side": 1.0}


@pytest.mark.parametrize("name", ["low_side", "high_side"])
def test_start_up_from_rest_matches_solve_ivp(name):
    """Forced PWM from rest, 30 periods: both diodes conduct in the dead times (the
    current reverses at this light load), each is forced off by the other channel."""
    sc = with_diodes(buck_scenario(cycles=30, **LIGHT_FPWM), **DIODES)
    run = simulate(sc)
    assert segments_of(run, HIGH_DIODE).size and segments_of(run, LOW_DIODE).size
    tau = recovery_parameters(sc.high_side.body_diode if name == "high_side"
                              else sc.low_side.body_diode)[0]
    got = assert_matches_reference(run, name, tau, KS[name], 0.0, IDLE)
    assert got["start_charge"] == 0.0


@pytest.mark.parametrize("name", ["low_side", "high_side"])
def test_settled_forced_pwm_matches_solve_ivp(name):
    sc = with_diodes(buck_scenario(cycles=4, **LIGHT_FPWM), **DIODES)
    run = simulate_settled(sc, 4)
    tau = DIODES["low" if name == "low_side" else "high"]["tau"]
    q0, prev0 = reference_periodic(run, name, tau, KS[name])
    got = assert_matches_reference(run, name, tau, KS[name], q0, prev0)
    assert got["start_charge"] == pytest.approx(q0, rel=1e-9)
    assert np.ptp(got["charges"]) <= 1e-9 * np.max(got["charges"])   # periodic


def test_settled_charge_never_swept_out_is_periodic():
    """An asynchronous stage fed back from its output (a negative load current)
    carries -iL through the high-side body diode every off-time, and nothing
    forces that diode off: its start charge is the fixed point of
    q -> exp(-T/tau) q + q_0(T), which the reference finds by iteration."""
    sc = buck_scenario(vin=12.0, duty=0.5, frequency=1e6, strategy="asynchronous",
                       inductance=10e-6, capacitance=10e-6, resistance=10.0, current=-2.0,
                       cycles=3)
    tau = 1e-6
    run = simulate_settled(with_diodes(sc, high={"tau": tau}), 3)
    assert segments_of(run, HIGH_DIODE).size == 3
    q0, prev0 = reference_periodic(run, "high_side", tau, 1.0)
    got = recovered_charges(run)["high_side"]
    assert got["times"].size == 0
    assert got["start_charge"] == pytest.approx(q0, rel=1e-9)
    for n in (1, 2, 3):
        q_n = recovered_charges(run, 0.0, n * run.period)["high_side"]["stored_charge"]
        assert q_n == pytest.approx(q0, rel=1e-9)
    assert_matches_reference(run, "high_side", tau, 1.0, q0, prev0)


# -- continuity through the CCM boundary -------------------------------------

DE = dict(vin=12.0, duty=0.3, frequency=1e6, strategy="diode-emulation", inductance=2.2e-6,
          capacitance=100e-6, dead_time=(20e-9, 30e-9), cycles=1)
CHARGE_CONTROL = {"tau": 20e-9, "qrr": 0.5 * 5.0 * 20e-9, "qrr_current": 5.0}


def settled_de(resistance, diode):
    return simulate_settled(with_diodes(buck_scenario(resistance=resistance, **DE), low=diode), 1)


def diode_ends_the_period(run):
    """The body diode conducts up to the high-side turn-on (else the stage idles)."""
    last = run.segments.conduction[period_end_index(run) - 1]
    assert last in (LOW_DIODE, IDLE)
    return last == LOW_DIODE


def diode_conducts_before_turn_on(run):
    """The body diode conducts at all in the rising dead time (the second half-period)."""
    seg = run.segments
    late = seg.t0 > seg.t0[0] + 0.5 * run.period
    return bool(np.any(late & (seg.conduction == LOW_DIODE)))


def boundary_bracket(ccm, diode, r_ccm=2.0, r_dcm=20.0, steps=45):
    """Load resistances either side of where ``ccm(run)`` changes, by bisection."""
    assert ccm(settled_de(r_ccm, diode)) and not ccm(settled_de(r_dcm, diode))
    for _ in range(steps):
        mid = math.sqrt(r_ccm * r_dcm)
        if ccm(settled_de(mid, diode)):
            r_ccm = mid
        else:
            r_dcm = mid
    assert r_dcm / r_ccm - 1 < 1e-12
    return r_ccm, r_dcm


def turn_on_charge(resistance, diode):
    """Charge recovered at the high-side turn-on of the settled period (0 if none is booked:
    the fixed-charge rule books none after idle)."""
    rec = recovered_charges(settled_de(resistance, diode))["low_side"]
    assert rec["times"].tolist() in ([0.0], [])
    return float(np.sum(rec["charges"]))


def test_recovered_charge_is_continuous_where_the_diode_stops_reaching_turn_on():
    """Diode emulation, falling load: the current through the body diode in the rising
    dead time reaches zero exactly at the high-side turn-on. Just above, the diode is
    forced off; just below, it stopped a moment earlier and the stage idled. The
    stored charge is the same on both sides; the fixed-charge rule drops from qrr to
    0 there (its cliff, which also shows the bracket straddles the boundary)."""
    r_ccm, r_dcm = boundary_bracket(diode_ends_the_period, CHARGE_CONTROL)
    fixed = {"qrr": 25e-9}
    assert turn_on_charge(r_ccm, fixed) == 25e-9 and turn_on_charge(r_dcm, fixed) == 0.0
    q_nominal = turn_on_charge(2.0, CHARGE_CONTROL)     # valley current about 1.2 A
    q_ccm, q_dcm = turn_on_charge(r_ccm, CHARGE_CONTROL), turn_on_charge(r_dcm, CHARGE_CONTROL)
    assert q_nominal > 1e-9 and q_dcm > 0.01 * q_nominal   # measured: 0.018 of nominal
    assert abs(q_ccm - q_dcm) < 1e-6 * q_nominal
    # approaching the boundary the charge falls steadily toward that value
    approach = [turn_on_charge(r_ccm * f, CHARGE_CONTROL) for f in (0.5, 0.8, 0.95, 0.99)]
    assert all(np.diff(approach) < 0) and approach[-1] > q_ccm


def test_recovered_charge_vanishes_where_the_diode_stops_conducting_before_turn_on():
    """Lighter still: the channel's current reaches zero before the rising dead time and
    the body diode no longer conducts there; its charge from the falling dead time has
    decayed through the channel phase (exp(-600 ns / 20 ns)), so both sides recover ~0."""
    r_ccm, r_dcm = boundary_bracket(diode_conducts_before_turn_on, CHARGE_CONTROL)
    q_nominal = turn_on_charge(2.0, CHARGE_CONTROL)
    q_ccm, q_dcm = turn_on_charge(r_ccm, CHARGE_CONTROL), turn_on_charge(r_dcm, CHARGE_CONTROL)
    assert abs(q_ccm - q_dcm) < 1e-6 * q_nominal and q_ccm < 1e-6 * q_nominal
    above = turn_on_charge(r_ccm * 0.9, CHARGE_CONTROL)
    assert q_ccm < above < 0.1 * q_nominal


# -- the fixed-charge mode is the legacy rule ----------------------------------

@pytest.mark.parametrize("settled, resistance", [(False, 10.0), (True, 1.0)])
def test_fixed_charge_mode_books_what_switching_energy_books(settled, resistance):
    """switching_energy holds the legacy rule; the fixed mode must book the same
    recoveries (a consistency check: the legacy behaviour stays unchanged)."""
    sc = with_diodes(buck_scenario(cycles=30, **dict(LIGHT_FPWM, resistance=resistance)),
                     low={"qrr": 25e-9}, high={"qrr": 10e-9})
    run = simulate_settled(sc, 3) if settled else simulate(sc)
    rec = recovered_charges(run)
    sw = switching_energy(run, 0.0, run.t_end)
    assert rec["low_side"]["mode"] == rec["high_side"]["mode"] == "fixed"
    assert rec["low_side"]["times"].size > 0
    # switching_energy books the low-side diode's recovery to the high-side switch
    assert np.sum(rec["low_side"]["charges"] * rec["low_side"]["vin"]) == pytest.approx(
        sw["high_side"]["recovery"], rel=1e-15)
    assert np.sum(rec["high_side"]["charges"] * rec["high_side"]["vin"]) == pytest.approx(
        sw["low_side"]["recovery"], rel=1e-15)


def test_window_outside_the_run_is_refused():
    run = constant_current_run({"tau": 50e-9})
    with pytest.raises(ValueError, match="t_start <= t_stop"):
        recovered_charges(run, 0.0, 2 * run.t_end)
    with pytest.raises(ValueError, match="t_start <= t_stop"):
        recovered_charges(run, float("nan"), run.t_end)


def test_segment_split_inside_a_channel_phase_is_no_recovery():
    """A supply step during the high-side on-time splits its segment without any
    switch moving: only the turn-on itself sweeps the charge out."""
    sc = with_diodes(buck_scenario(cycles=30, **LIGHT_FPWM), **DIODES)
    sc = dataclasses.replace(sc, supply=dataclasses.replace(
        sc.supply, steps=(SupplyStep(20.1e-6, 10.0),)))
    run = simulate(sc)
    seg = run.segments
    split = np.flatnonzero((seg.conduction[1:] == HIGH) & (seg.conduction[:-1] == HIGH))
    assert split.size == 1
    got = recovered_charges(run)["low_side"]
    np.testing.assert_allclose(got["times"], np.arange(30) / 1e6, rtol=0, atol=1e-15)
    assert got["vin"][-1] == 10.0 and got["vin"][20] == 12.0
    times, charges, _ = reference_pass(run, "low_side", DIODES["low"]["tau"], KS["low_side"],
                                       0.0, IDLE)
    np.testing.assert_allclose(got["charges"], charges, rtol=0, atol=1e-9 * np.max(charges))
