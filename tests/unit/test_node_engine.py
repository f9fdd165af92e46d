"""The switch node as a state: the engine's own rules, each against something independent.

The circuit itself is checked against a stiff reference solver in
tests/validation/test_node_reference.py and against closed forms in
tests/validation/test_node_closed_forms.py; these tests pin the engine's
shortcuts (the Newton clamp locator, the ring-energy bound), the summary's
words for the modes, and the shooting on a node that rings.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm

import bucksim
from bucksim.engine.bounds import open_node_clear, row_norms, system_bounds
from bucksim.engine.driver import build_table, stage_tables
from bucksim.engine.kernels import find_zero
from bucksim.engine.loop_parts import newton_crossing
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH, replace_key
from bucksim.model.stage import OPEN, Stage


def _rail(strategy="forced-pwm", load="0.5 ohm", **keys):
    sc = bucksim.load_scenario(DEFAULT_SCENARIO_PATH)
    sc = replace_key(sc, "switching.strategy", strategy)
    sc = replace_key(sc, "load.resistance", load)
    sc = replace_key(sc, "load.steps", [])
    sc = replace_key(sc, "high_side.coss", "400 pF")
    sc = replace_key(sc, "low_side.coss", "1.2 nF")
    for k, v in keys.items():
        sc = replace_key(sc, k.replace("__", "."), v)
    return sc


def _open_system(sc):
    stage = Stage(sc)
    table = build_table(stage.matrices, sc.period)
    return stage, table, stage.system_id(0, OPEN)


@pytest.mark.parametrize("current", [0.5, 5.0, 20.0])
def test_newton_clamp_locator_agrees_with_the_general_search(current):
    """The node slewing down from Vin after the high side opens: the Newton locator's
    crossing equals find_zero's (table descent, an independent path) to 1e-12 of
    the period, and the state there lies on the clamp row."""
    sc = _rail()
    stage, table, s = _open_system(sc)
    tabs = stage_tables(stage, table)
    row = tabs.Cls[0]
    m = stage.n + 1
    z0 = np.zeros(m)
    z0[0], z0[1], z0[stage.i_node], z0[-1] = current, 1.0, 11.9, 1.0
    d = 2e-7
    z1 = expm(table.matrices[s] * d) @ z0
    tmp, trial, work = np.empty(2 * m), np.empty(m), np.empty(m)
    u = newton_crossing(table.matrices, table.exponentials, table.steps, s, z0, 0.0, d, row,
                        tabs.kls[0, s], tabs.bnd, tmp, work)
    za = z0.copy()
    tz = find_zero(table.matrices, table.exponentials, table.steps, s, za, z1, 0.0, d, 1.0,
                   tabs.guards[s], tmp, trial, np.empty(m), row, 0.0, 0.0, 0.0, False,
                   table.taylor_gap, np.empty((9, m + 1)), tabs.bnd, -1.0)
    assert u > 0 and tz > 0
    assert u == pytest.approx(tz, abs=1e-12 * sc.period)
    assert abs(row @ work) <= 1e-9 * 12.0
    # the crossing is the first: the exact solution keeps the row positive before it
    us = np.linspace(0.0, u, 400)[:-1]
    assert all(row @ (expm(table.matrices[s] * ui) @ z0) > 0 for ui in us)


def test_ring_energy_bound_never_clears_a_clamp_the_exact_solution_reaches():
    """Random open-node states (a ringing DCM node near and far from both clamps):
    wherever open_node_clear says a clamp row stays positive, the exact solution,
    sampled densely, keeps it positive (the bound may be loose, never wrong)."""
    sc = _rail("diode-emulation", "30 ohm")
    stage, table, s = _open_system(sc)
    tabs = stage_tables(stage, table)
    rng = np.random.default_rng(20261202)
    m = stage.n + 1
    checked = cleared = 0
    for _ in range(300):
        z0 = np.zeros(m)
        z0[0] = rng.uniform(-0.3, 0.3)
        z0[1] = rng.uniform(0.5, 6.0)
        z0[stage.i_node] = rng.uniform(-0.7, 12.7)
        z0[-1] = 1.0
        d = rng.uniform(1e-8, 2e-6)
        lo, hi = open_node_clear(tabs.open_coef[0], z0, stage.i_node, d, tabs.Cls[0],
                                 tabs.Chs[0])
        us = np.linspace(0.0, d, 600)
        states = np.array([expm(table.matrices[s] * u) @ z0 for u in us])
        checked += 1
        if lo:
            cleared += 1
            assert np.all(states @ tabs.Cls[0] > 0)
        if hi:
            assert np.all(states @ tabs.Chs[0] > 0)
    assert cleared > 20, "the bound should clear rings that stay between the clamps"


def test_bounds_tables_cover_the_open_system():
    sc = _rail()
    stage, table, s = _open_system(sc)
    bnd = system_bounds(table.matrices)
    rows = np.array(stage.clamp_rows(0))
    assert np.all(np.isfinite(row_norms(table.matrices, bnd, rows)))


DEAD = "1000 ns"


def test_forced_pwm_is_never_dcm_and_flags_zero_current_in_a_dead_time():
    """A light load in forced PWM with a long falling dead time: the current reaches
    zero while the low-side body diode conducts, the node opens, and the channel takes over at the
    dead time's end. That is CCM with a flag, not DCM (the stage does not block the
    reversal); diode emulation at the same point is DCM."""
    fp = bucksim.simulate(_rail("forced-pwm", "20 ohm", switching__dead_time=[DEAD, "20 ns"],
                                run__start="steady-state")).summary()
    de = bucksim.simulate(_rail("diode-emulation", "20 ohm",
                                run__start="steady-state")).summary()
    assert fp.conduction_mode == "ccm" and fp.reverse_current
    assert fp.zero_current_in_dead_time
    assert de.conduction_mode == "dcm" and not de.zero_current_in_dead_time
    for s in (fp, de):
        assert s.energy_balance_error < 1e-9


def test_a_ringing_dcm_node_is_found_by_newton_not_by_settling():
    """Diode emulation at light load: the node rings through the idle interval, so a
    period's start depends on the ring's phase; shooting still converges by Newton
    (after block settling), to the map's fixed point."""
    sc = _rail("diode-emulation", "60 ohm")
    ss = bucksim.steady_state(sc)
    assert ss.success and ss.method != "brute-force", ss.message
    run = bucksim.simulate(replace_key(replace_key(sc, "run.cycles", 1),
                                       "run.summary_cycles", 1), x0=ss.x)
    scale = np.maximum(np.abs(run.segments.x0).max(axis=0), 1e-9)
    assert np.max(np.abs(run.x_end - ss.x) / scale) < 1e-9


@pytest.mark.parametrize("current", [0.05, 0.5, 3.0, 7.6, 20.0, 400.0])
def test_snubbed_turn_off_is_the_integral_of_the_ramp_against_the_node(current):
    """The channel's current falls linearly over t_f; the node capacitance takes the
    rest until the node has swung V, then the opposite diode clamps it. Integrate
    v i_ch numerically (scipy quad) and compare; check the two limits (derived):
    I^2 t_f^2 / (24 Cn) below I = 2 Cn V / t_f, and 0.5 V I t_f far above."""
    from scipy.integrate import quad

    from bucksim.analysis.edges import snubbed_turn_off

    cn, tf, v = 1.9e-9, 6e-9, 12.0

    def power(t):
        i_ch = current * (1.0 - t / tf)
        return min(current * t * t / (2.0 * cn * tf), v) * i_ch

    t_v = np.sqrt(2 * cn * v * tf / current)
    points = [t_v] if t_v < tf else None
    want, _ = quad(power, 0.0, tf, points=points, epsabs=0.0, epsrel=1e-12, limit=200)
    got = float(snubbed_turn_off(v, current, tf, cn))
    assert got == pytest.approx(want, rel=1e-9)
    if current < 2 * cn * v / tf:
        assert got == pytest.approx(current ** 2 * tf ** 2 / (24 * cn), rel=1e-12)
    if current > 100 * 2 * cn * v / tf:
        assert got == pytest.approx(0.5 * v * current * tf, rel=0.2)
    assert float(snubbed_turn_off(v, current, tf, 0.0)) == pytest.approx(0.5 * v * current * tf)
