"""The gate drive and the controller's supply against their closed forms.

Sources: gate-drive power ``Qg V fs`` per MOSFET, drawn at the voltage of the rail's
source (a linear regulator passes the gate charge through at its input voltage) and
the split of the gate loop's ``Qg Vg`` over its series resistances in proportion to
them: common practice (Erickson & Maksimovic, *Fundamentals of Power Electronics*,
3rd ed., ch. 4, from memory). Quiescent power ``Iq V``: the definition.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from bucksim import load_scenario
from bucksim.errors import ScenarioError
from bucksim.model.conduction import HIGH, LOW
from bucksim.model.drive_parts import Controller, GateResistance
from bucksim.model.scenario import loads_scenario
from bucksim.simulation import simulate, simulate_settled

ROOT = Path(__file__).resolve().parents[2]
CORE = ROOT / "scenarios" / "core_rail_1v0.toml"
AUX = ROOT / "scenarios" / "aux_rail_5v_async.toml"


@pytest.fixture(scope="module")
def core():
    return load_scenario(CORE)


def _summary(scenario, controller, **mosfets):
    sc = dataclasses.replace(scenario, controller=controller, **mosfets)
    return sc, simulate_settled(sc).summary()


def _turn_ons(run, t_start, t_stop, conduction):
    seg = run.segments
    k = np.nonzero((seg.t0 >= t_start) & (seg.t0 < t_stop))[0]
    prev = seg.conduction[np.maximum(k - 1, 0)]
    return int(np.count_nonzero((seg.conduction[k] == conduction) & (prev != conduction)))


@pytest.mark.parametrize("supply, volts", [("input", None), ("bias", 12.0)])
def test_rail_draws_the_gate_charge_at_its_source_voltage(core, supply, volts):
    # a regulator from the input costs Qg Vin fs, a bias rail Qg Vbias fs: exactly
    iq = 2.5e-3
    ctl = Controller(quiescent_current=iq, driver_supply=supply, bias_voltage=volts,
                     driver_resistance=1.2)
    sc, s = _summary(core, ctl)
    v = core.supply.voltage if supply == "input" else volts
    fs = core.switching.frequency
    qg = core.high_side.qg + core.low_side.qg
    g = s.gate_drive
    drawn = g.input if supply == "input" else g.bias
    assert drawn == pytest.approx(qg * v * fs + iq * v, rel=1e-12)
    assert (g.bias if supply == "input" else g.input) == 0.0
    # where it goes adds up to what was drawn, and the loop's loss is Qg Vg
    assert g.total == pytest.approx(drawn, rel=1e-12)
    loop = (core.high_side.qg * core.high_side.gate_voltage
            + core.low_side.qg * core.low_side.gate_voltage) * fs
    assert g.driver + g.resistors + g.internal == pytest.approx(loop, rel=1e-12)
    assert g.regulator == pytest.approx(drawn - loop - iq * v, rel=1e-12)
    assert g.quiescent == pytest.approx(iq * v, rel=1e-12)
    # the circuit's energy balance still closes with the bias rail as an input
    assert s.energy_balance_error < 1e-9
    bias = s.power.bias or 0.0
    assert s.efficiency == pytest.approx(s.power.output / (s.power.input + bias), rel=1e-15)
    assert (s.power.bias is not None) == (supply == "bias")


def test_default_rail_keeps_the_gate_energy_of_the_gate_voltage(core):
    # without a [controller] table the draw is Qg Vg fs, as before the table existed
    # (total loss and input unchanged); only where it is booked moved to the driver
    s = simulate_settled(core).summary()
    fs = core.switching.frequency
    loop = (core.high_side.qg * core.high_side.gate_voltage
            + core.low_side.qg * core.low_side.gate_voltage) * fs
    assert s.gate_drive.supply == "ideal-rail"
    assert s.gate_drive.input == pytest.approx(loop, rel=1e-12)
    assert s.gate_drive.driver == pytest.approx(loop, rel=1e-12)
    assert s.devices["high_side"].switching["gate"] == 0.0
    assert s.loss_items()["gate_drive.driver"] == pytest.approx(loop, rel=1e-12)
    assert sum(s.loss_items().values()) == pytest.approx(s.power.loss, rel=1e-12)


def test_gate_loop_splits_in_proportion_to_its_resistances(core):
    ctl = Controller(driver_resistance=1.0)
    hs = dataclasses.replace(core.high_side, gate_resistance=GateResistance(1.5, 2.5))
    ls = dataclasses.replace(core.low_side, gate_resistance=GateResistance(0.5, 0.0,
                                                                           key="low_side.x"))
    sc, s = _summary(core, ctl, high_side=hs, low_side=ls)
    fs = core.switching.frequency
    e_hs = core.high_side.qg * core.high_side.gate_voltage * fs
    e_ls = core.low_side.qg * core.low_side.gate_voltage * fs
    g = s.gate_drive
    assert g.driver == pytest.approx(e_hs * 1.0 / 5.0 + e_ls * 1.0 / 1.5, rel=1e-12)
    assert g.resistors == pytest.approx(e_hs * 2.5 / 5.0, rel=1e-12)
    assert s.devices["high_side"].switching["gate"] == pytest.approx(e_hs * 1.5 / 5.0,
                                                                     rel=1e-12)
    assert s.devices["low_side"].switching["gate"] == pytest.approx(e_ls * 0.5 / 1.5,
                                                                    rel=1e-12)
    assert g.internal == pytest.approx(e_hs * 1.5 / 5.0 + e_ls * 0.5 / 1.5, rel=1e-12)


def test_asynchronous_stage_charges_one_gate():
    aux = load_scenario(AUX)
    sc, s = _summary(aux, Controller(driver_supply="input"))
    fs = aux.switching.frequency
    assert s.gate_drive.input == pytest.approx(aux.high_side.qg * aux.supply.voltage * fs,
                                               rel=1e-12)


def test_skipped_pulses_charge_no_gate(core):
    # the energy follows the turn-ons actually made: a run from rest with a soft start
    # and a load step has periods of every kind; count the channel closings directly
    sc = dataclasses.replace(core, controller=Controller(driver_supply="input"))
    run = simulate(sc)
    s = run.summary()
    w = s.window
    n_hs = _turn_ons(run, w.start, w.stop, HIGH)
    n_ls = _turn_ons(run, w.start, w.stop, LOW)
    width = w.stop - w.start
    expected = (core.high_side.qg * n_hs + core.low_side.qg * n_ls) * core.supply.voltage
    assert s.gate_drive.input * width == pytest.approx(expected, rel=1e-12)


def test_closed_form_budget_carries_the_same_rail(core):
    from bucksim import crosscheck
    sc = dataclasses.replace(core, controller=Controller(quiescent_current=1e-3,
                                                         driver_supply="input"))
    cc = crosscheck(sc)
    row = next(r for r in cc.rows if r["item"] == "gate_drive")
    fs = core.switching.frequency
    vin = core.supply.voltage
    assert row["closed_form"] == pytest.approx(
        (core.high_side.qg + core.low_side.qg) * vin * fs + 1e-3 * vin, rel=1e-12)
    assert not row["flagged"]


@pytest.mark.parametrize("table, key", [
    ('driver_supply = "bias"', "controller.bias_voltage"),
    ('driver_supply = "bias"\nbias_voltage = "3 V"', "controller.bias_voltage"),
    ('bias_voltage = "5 V"', "controller.bias_voltage"),
    ('driver_supply = "usb"', "controller.driver_supply"),
    ('quiescent_current = "-1 mA"', "controller.quiescent_current"),
    ('driver_resistance = "-1 ohm"', "controller.driver_resistance"),
    ('voltage = "5 V"', "controller.voltage"),
])
def test_bad_controller_tables_are_refused_by_key_and_line(table, key):
    text = CORE.read_text(encoding="utf-8") + f"\n[controller]\n{table}\n"
    with pytest.raises(ScenarioError) as err:
        loads_scenario(text, source="rail.toml")
    assert err.value.key == key
    assert "rail.toml:" in str(err.value)


def test_a_regulated_rail_needs_the_gate_voltage():
    text = CORE.read_text(encoding="utf-8").replace('gate_voltage = "5 V"', 'gate_voltage = 0',
                                                     1)
    loads_scenario(text)        # the ideal rail: no gate voltage, no gate energy
    with pytest.raises(ScenarioError, match="gate_voltage"):
        loads_scenario(text + '\n[controller]\ndriver_supply = "input"\n', source="r.toml")


def test_gate_resistance_is_read_and_written():
    from bucksim.model.scenario import scenario_to_dict
    text = CORE.read_text(encoding="utf-8").replace(
        "[high_side]\n", '[high_side]\ngate_resistance = {internal = "1.1 ohm", external = 2}\n')
    sc = loads_scenario(text + '\n[controller]\ndriver_supply = "bias"\nbias_voltage = 6\n')
    assert sc.high_side.gate_resistance == GateResistance(1.1, 2.0)
    d = scenario_to_dict(sc)
    assert d["high_side"]["gate_resistance"] == {"internal": 1.1, "external": 2.0}
    assert d["controller"]["bias_voltage"] == 6.0
    with pytest.raises(ScenarioError) as err:
        loads_scenario(text.replace("external = 2", "externl = 2"), source="r.toml")
    assert err.value.key == "high_side.gate_resistance.externl"
