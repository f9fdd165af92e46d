"""The light-load decision on a rail with core loss, a quiescent draw and an input-fed driver.

Facts checked (each with its source):

* a PFM controller charges the gates once per pulse, so its gate-drive power is
  ``(Qg_hs + Qg_ls) Vin f_pulse`` with a regulator from the input, against
  ``(Qg_hs + Qg_ls) Vin fs`` at the clock (the drive's definition; common practice);
* at the lightest load the light-load mode beats fixed-frequency diode emulation,
  which beats forced PWM (the ranking the issue asks bucksim to show, explained in
  docs/light-load-modes.md);
* above its range a controller leaves PFM for fixed-frequency operation (common
  practice): the PFM row there is the diode-emulation row, marked ``"pwm"``;
* pulse skipping at the clock pulses at ``Io / q``, ``q = 0.5 Ip (t + L Ip / Vo)``,
  ``Ip = (Vin - Vo) t / L`` (charge balance of the lossless stage, derived), with ``t``
  between ``t_min`` and ``t_min`` plus the falling dead time: the node capacitance
  holds the node above the output for part of the dead time after the high side
  opens, and the current goes on rising meanwhile; where a pulse at every clock edge
  is not enough the row is diode emulation's.
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from bucksim import load_scenario
from bucksim.model.conduction import node_capacitance
from bucksim.studies.compare import compare

RAIL = Path(__file__).resolve().parents[2] / "scenarios" / "radio_rail_3v3_controller_supply.toml"


def min_on_charge(sc, t, vo=3.3):
    """The charge [C] of one pulse of on-time ``t`` [s] from zero current on the lossless
    stage: ``0.5 Ip (t + L Ip / Vo)``, ``Ip = (Vin - Vo) t / L`` (charge balance of the
    triangle, derived)."""
    L, vin = sc.inductor.inductance, sc.supply.voltage
    ip = (vin - vo) * t / L
    return 0.5 * ip * (t + L * ip / vo)


def boundary_json(capsys, *options):
    """``bucksim boundary RAIL --load 10 mA OPTIONS --json`` as a dict."""
    import json

    from bucksim.cli.main import main
    assert main(["boundary", str(RAIL), "--load", "10 mA", *options, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


@pytest.fixture(scope="module")
def asleep():
    sc = load_scenario(RAIL)
    return sc, compare(sc, ["5 mA", "1 A"], output_voltage=3.3, pfm={"peak_current": 0.4},
                       pulse_skipping={"min_on_time": "80 ns"}, log=True)


def test_light_load_mode_wins_asleep_and_forced_pwm_loses(asleep):
    _, cmp = asleep
    pfm, de, fp = (cmp.row(s, "5 mA") for s in ("pfm", "diode-emulation", "forced-pwm"))
    assert pfm.light_mode == "pfm" and pfm.ok and de.ok and fp.ok
    assert pfm.efficiency > de.efficiency > fp.efficiency
    assert pfm.switching_frequency < 0.1 * de.switching_frequency
    assert de.switching_frequency == fp.switching_frequency == 1e6
    # PFM's price is ripple: larger than fixed-frequency DCM's at the same load
    assert pfm.output_ripple > de.output_ripple


def test_gate_drive_follows_the_pulse_rate(asleep):
    sc, cmp = asleep
    vin = sc.supply.voltage
    hs, ls = sc.high_side, sc.low_side
    for name in ("pfm", "diode-emulation"):
        row = cmp.row(name, "5 mA")
        f = row.switching_frequency
        beside = sum(row.losses[k] for k in ("gate_drive.driver", "gate_drive.resistors",
                                              "gate_drive.regulator"))
        # the MOSFETs' internal gate resistance takes its share of each loop's Qg Vg
        # (beside the driver's; no external resistor here) inside their switching items
        rd = sc.controller.driver_resistance
        inside = sum(m.qg * m.gate_voltage * m.gate_resistance.internal
                     / (rd + m.gate_resistance.internal) for m in (hs, ls)) * f
        assert beside + inside == pytest.approx((hs.qg + ls.qg) * vin * f, rel=1e-9), name
        assert row.losses["controller.quiescent"] == pytest.approx(120e-6 * vin, rel=1e-12)


def test_above_its_range_the_light_load_row_is_fixed_frequency(asleep):
    _, cmp = asleep
    pfm, de = cmp.row("pfm", "1 A"), cmp.row("diode-emulation", "1 A")
    assert pfm.light_mode == "pwm" and pfm.ok
    assert pfm.efficiency == de.efficiency and pfm.losses == de.losses
    rec = cmp.to_dict()["rows"]["pfm"][1]
    assert rec["light_mode"] == "pwm" and rec["switching_frequency"] == 1e6
    assert rec["output_voltage_ripple"] == pytest.approx(de.output_ripple)


def test_pulse_skipping_row_pulses_at_the_charge_balance_rate(asleep):
    sc, cmp = asleep
    skip, de, pfm = (cmp.row(s, "5 mA") for s in ("pulse-skipping", "diode-emulation", "pfm"))
    assert skip.ok and skip.light_mode == "skip"
    t_min = 80e-9

    def rate(t):
        return skip.load_current / min_on_charge(sc, t)

    # 163 kHz at t_min, 129 kHz with the 10 ns dead time added (158 kHz measured)
    assert rate(t_min + sc.switching.dead_time[0]) < skip.switching_frequency < rate(t_min)
    assert skip.duty == pytest.approx(skip.switching_frequency * t_min, rel=1e-12)
    # fewer gate charges than the clock: it beats fixed-frequency diode emulation, and
    # PFM's larger, rarer pulses beat it in turn (docs/light-load-modes.md)
    assert pfm.efficiency > skip.efficiency > de.efficiency
    assert skip.output_ripple > de.output_ripple
    heavy = cmp.row("pulse-skipping", "1 A")
    assert heavy.light_mode == "pwm" and heavy.losses == cmp.row("diode-emulation",
                                                                 "1 A").losses
    rec = cmp.to_dict()["rows"]["pulse-skipping"][0]
    assert rec["switching_frequency"] == skip.switching_frequency
    assert rec["output_voltage_ripple"] == skip.output_ripple


def test_bad_pfm_arguments_are_refused():
    from bucksim.errors import ScenarioError
    sc = load_scenario(RAIL)
    for bad in ({"peak": 0.4}, {"peak_current": 0.4, "on_time": 1e-7}, 0.4,
                {"peak_current": "0.4 V"}):
        with pytest.raises(ScenarioError):
            compare(sc, ["5 mA"], pfm=bad)
    for bad in ({"min_on": 8e-8}, 8e-8, {"min_on_time": "80 nA"}):
        with pytest.raises(ScenarioError):
            compare(sc, ["5 mA"], pulse_skipping=bad)


def test_boundary_says_where_pfm_hands_over_to_the_clock(capsys):
    # PFM's pulses meet the clock at Io = 0.5 Ipk (ton + toff) fs (lossless charge
    # balance, derived); there the idle interval is about nothing, the output crosses the
    # threshold on a lobe of the node's ring, and the exact, lossy stage's period lies
    # within one ring period 2 pi sqrt(L Cn) of the clock's (derived: lobes are a ring
    # period apart; near the boundary the rate is not even monotone in load, 920.0 kHz at
    # 0.05 % less load and 911.3 kHz at 0.05 % more, so no tighter bound holds whatever
    # the rounding)
    from bucksim.cli.main import main
    pfm = boundary_json(capsys, "--pfm-peak-current", "0.4 A")["pfm"]
    sc = load_scenario(RAIL)
    L, vin, vo, fs = sc.inductor.inductance, sc.supply.voltage, 3.3, sc.switching.frequency
    expect = 0.5 * 0.4 * (L * 0.4 / (vin - vo) + L * 0.4 / vo) * fs
    assert pfm["closed_form"] == pytest.approx(expect, rel=1e-3)    # vo: the settled 3.3 V
    ring = 2 * math.pi * math.sqrt(L * node_capacitance(sc))
    assert abs(1 / pfm["frequency"] - 1 / fs) <= ring
    assert main(["boundary", str(RAIL.parent / "core_rail_1v0.toml"), "--pfm-peak-current",
                 "2"]) == 1
    assert "forced PWM" in capsys.readouterr().err


def test_boundary_says_where_pulse_skipping_stops_skipping(capsys):
    # a pulse at every clock edge carries Io = 0.5 Ip (t + L Ip / Vo) fs, Ip = (Vin - Vo)
    # t / L (lossless charge balance, derived); on the exact stage the node capacitance
    # holds the node up for part of the dead time after each pulse, so t lies between
    # t_min and t_min plus the falling dead time
    skip = boundary_json(capsys, "--skip-min-on-time", "80 ns")["pulse_skipping"]
    sc = load_scenario(RAIL)

    def carried(t):
        return min_on_charge(sc, t) * sc.switching.frequency

    assert skip["closed_form"] == pytest.approx(carried(80e-9), rel=1e-3)  # vo: settled
    assert carried(80e-9) < skip["exact"] < carried(80e-9 + sc.switching.dead_time[0])
