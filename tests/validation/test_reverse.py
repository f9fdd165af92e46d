"""Reverse-current check against closed-form boundaries and triangle-wave geometry.

Stage (numbers our own): 12 V in, duty 0.3, 500 kHz, 4.7 uH, 47 uF, a
current-sink load; low-loss parts (1 mohm channels, no DCR or ESR) unless a
test adds loss on purpose.

References
----------
.. [EM] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020: ch. 2 (M(D) = D, CCM ripple dI = Vo (1 - D) / (L fs)),
   ch. 5 (CCM/DCM boundary K = 2 L / (R Ts) = 1 - D, i.e. Io = dI / 2).
   Chapter numbers from memory.
.. [CP] Forced-PWM current reverses when Io < dI / 2: common practice.
.. [RL] Series RL circuit driven by a constant voltage: i(t) = v/R + (i0 - v/R)
   exp(-R t / L) (circuit theory); used for the exact boundary with resistance.
"""

from __future__ import annotations

import json
import math

import pytest
from scipy.optimize import brentq

from bucksim.errors import ScenarioError
from bucksim.model import parts as p
from bucksim.studies.reverse import LoadLevel, find_boundary, parse_levels, reverse_current

VIN, D, FS, L, C = 12.0, 0.3, 500e3, 4.7e-6, 47e-6
T = 1.0 / FS


def stage(strategy="forced-pwm", current=0.4, dead_time=(0.0, 0.0), rds_hs=1e-3,
          rds_ls=1e-3, dcr=0.0, vf=0.7):
    hs = p.Mosfet(rds_hs, p.Diode(vf, 0.0, section="high_side"), section="high_side")
    if strategy == "asynchronous":
        ls = p.Diode(vf, 0.0, section="low_side")
        dead_time = (0.0, 0.0)
    else:
        ls = p.Mosfet(rds_ls, p.Diode(vf, 0.0, section="low_side"), section="low_side")
    return p.Scenario(title="reverse-current check (invented)", supply=p.Supply(VIN),
                      switching=p.Switching(FS, strategy, dead_time),
                      inductor=p.Inductor(L, dcr), output_capacitor=p.Capacitor(C, 0.0),
                      high_side=hs, low_side=ls, load=p.Load(None, current),
                      control=p.Control(duty=D), run=p.RunSettings(cycles=1))


# [EM] ch. 2 and 5, lossless: Vo = D Vin, dI = Vo (1 - D) / (L fs), boundary dI / 2
VO_IDEAL = D * VIN
DI_IDEAL = VO_IDEAL * (1 - D) / (L * FS)
IO_BOUNDARY = DI_IDEAL / 2


def test_closed_form_boundary_matches_simulated_low_loss():
    """[EM]/[CP]: with low-loss parts and no dead time the simulated reversal load
    is dI/2 within 1 %, and points on either side reverse or not accordingly."""
    res = reverse_current(stage(), load=[0.8 * IO_BOUNDARY, 1.25 * IO_BOUNDARY])
    b = res.boundary
    assert b.kind == "reversal"
    assert b.simulated == pytest.approx(IO_BOUNDARY, rel=0.01)
    # the result's own closed form uses the simulated Vo: still the textbook value here
    assert b.closed_form == pytest.approx(IO_BOUNDARY, rel=0.005)
    below, above = res.points
    assert below.reverses and below.min_current < 0 and below.negative_fraction > 0
    assert not above.reverses and above.min_current > 0 and above.returned_charge == 0
    # CCM valley = Io - dI/2 ([EM] ch. 2 triangle), on both sides of the boundary
    for pt in res.points:
        assert pt.min_current == pytest.approx(pt.load_current - DI_IDEAL / 2, abs=2e-3)


def test_dead_time_moves_boundary_down():
    """Dead time lowers the reversal load (derived below, lossless piecewise-linear).

    Why: reversal can only start in the low-side channel (in a dead time the body
    diodes stop the current at zero and the node idles at vo). At the boundary
    the current is zero at the end of the channel interval, so the triangle spans
    T - tr instead of T; and with the node idling at vo in the rising dead time
    the output sits higher, Vo = (D Vin - Vf tf fs) / (1 - tr fs), leaving less
    voltage across L in the on-time, so the peak is lower too. Both lower Io.
    """
    tf = tr = 25e-9
    vf = 0.7
    res = find_boundary(stage(dead_time=(tf, tr), vf=vf))
    # volt-second balance over [0, T - tr] (current zero and node at vo after it)
    vo = (VIN * D * T - vf * tf) / (T - tr)
    ip = (VIN - vo) * D * T / L
    t_low = T - D * T - tf - tr
    i1 = vo * t_low / L                           # current entering the channel interval
    assert ip - (vo + vf) * tf / L == pytest.approx(i1, rel=1e-12)
    charge = ip * D * T / 2 + (ip + i1) * tf / 2 + i1 * t_low / 2
    predicted = charge / T
    assert res.simulated == pytest.approx(predicted, rel=3e-3)
    shift = res.simulated / IO_BOUNDARY - 1
    assert shift < -0.01, shift                   # measurable, and downward as derived


def _rl_boundary(r_high, r_low):
    """Exact boundary for series resistance, large C ([RL]): the current rises from 0
    for D T through r_high and falls back to 0 over (1 - D) T through r_low."""
    def piece(i0, v, r, t):
        tau, final = L / r, v / r
        e = math.exp(-t / tau)
        return final + (i0 - final) * e, final * t + (i0 - final) * tau * (1 - e)

    def end_current(vo):
        ip, _ = piece(0.0, VIN - vo, r_high, D * T)
        return piece(ip, -vo, r_low, (1 - D) * T)[0]

    vo = brentq(end_current, 0.1, VIN - 0.1, xtol=1e-14)
    ip, q_on = piece(0.0, VIN - vo, r_high, D * T)
    _, q_off = piece(ip, -vo, r_low, (1 - D) * T)
    return (q_on + q_off) / T


@pytest.mark.parametrize("rds_hs, rds_ls, dcr", [(0.6, 0.01, 0.0), (1e-3, 1e-3, 0.3)])
def test_resistance_moves_boundary_down(rds_hs, rds_ls, dcr):
    """Series resistance lowers the reversal load; the exact RL solution predicts it.

    Why: to first order, dI = D (1 - D) (Vin - (R_high - R_low) Io) / (L fs)
    (volt-second balance with the resistive drops): resistance that acts only
    in the on-time takes voltage from the inductor there, so the ripple and its
    half, the boundary, shrink. A DCR acts in both intervals and cancels to
    first order; what remains is the exponential (not linear) current, whose
    ripple is smaller than the linear estimate: also downward.
    """
    res = find_boundary(stage(rds_hs=rds_hs, rds_ls=rds_ls, dcr=dcr))
    predicted = _rl_boundary(rds_hs + dcr, rds_ls + dcr)
    assert res.simulated == pytest.approx(predicted, rel=2e-3)
    shift = res.simulated / IO_BOUNDARY - 1
    assert shift < -0.005, shift
    if rds_hs > rds_ls:  # the first-order estimate gives sign and size
        k = D * (1 - D) / (2 * L * FS)
        first_order = k * VIN / (1 + k * (rds_hs - rds_ls)) / IO_BOUNDARY - 1
        assert shift == pytest.approx(first_order, rel=0.25)


def test_returned_charge_energy_and_negative_share_follow_the_triangle():
    """[EM] ch. 2 triangle, lossless: valley Iv = Io - dI/2 < 0; the current rises
    at (Vin - Vo)/L and falls at Vo/L, so it is negative for |Iv| (L/(Vin - Vo) +
    L/Vo); the supply gets the part while the high side conducts, charge
    Iv^2 L / (2 (Vin - Vo)), energy Vin times that (derived)."""
    io = 0.3
    pt, = reverse_current(stage(), load=[io]).points
    iv = io - DI_IDEAL / 2
    rise, fall = (VIN - VO_IDEAL) / L, VO_IDEAL / L
    assert pt.min_current == pytest.approx(iv, rel=5e-3)
    assert pt.negative_fraction == pytest.approx(-iv * (1 / rise + 1 / fall) / T, rel=5e-3)
    q = iv ** 2 / (2 * rise)
    assert pt.returned_charge == pytest.approx(q, rel=1e-2)
    assert pt.returned_energy == pytest.approx(VIN * q, rel=1e-2)
    assert pt.returned_power == pytest.approx(VIN * q * FS, rel=1e-2)


@pytest.mark.parametrize("strategy", ["diode-emulation", "asynchronous"])
def test_no_reversal_without_forced_pwm_and_dcm_boundary(strategy):
    """Diode emulation and a freewheel diode stop the current at zero: no reversal
    at any load, and below dI/2 the stage enters DCM ([EM] ch. 5, K = 1 - D).
    The asynchronous check uses Vf = 0 so the lossless boundary applies."""
    vf = 0.0 if strategy == "asynchronous" else 0.7
    res = reverse_current(stage(strategy, vf=vf), load=[0.1, 0.8])
    assert res.boundary.kind == "dcm"
    assert res.boundary.simulated == pytest.approx(IO_BOUNDARY, rel=0.01)
    light, heavy = res.points
    assert not light.reverses and not heavy.reverses
    assert light.returned_charge == 0 and light.negative_fraction == 0
    assert light.min_current >= -1e-9
    assert light.conduction_mode == "dcm" and heavy.conduction_mode == "ccm"


def test_table_dict_and_figure():
    res = reverse_current(stage(), load=[0.2, 0.8])
    d = json.loads(json.dumps(res.to_dict()))
    assert [pt["reverses"] for pt in d["points"]] == [True, False]
    assert d["boundary"]["simulated"] == res.boundary.simulated
    text = res.table()
    assert "reverses" in text and text.splitlines()[-1].startswith("Caution")
    fig = res.plot()
    line = fig.axes[0].lines[0]
    assert list(line.get_ydata()) == [pt.min_current for pt in res.points]


def test_load_levels():
    sc = stage()
    assert parse_levels([0.3, "2 ohm", "250 mA"], sc) == [
        LoadLevel("current", 0.3), LoadLevel("resistance", 2.0), LoadLevel("current", 0.25)]
    assert parse_levels({"resistance": [1, "4.7 ohm"]}, sc) == [
        LoadLevel("resistance", 1.0), LoadLevel("resistance", 4.7)]
    with pytest.raises(ScenarioError, match=r"load\[1\].*'3 uF'"):
        parse_levels([0.3, "3 uF"], sc)
    with pytest.raises(ScenarioError, match=r"load\.resistance\[0\].*> 0 ohm"):
        parse_levels({"resistance": ["-1"]}, sc)
    with pytest.raises(ScenarioError, match=r"load\[0\].*> 0 ohm"):
        parse_levels(["-2 ohm"], sc)
    # a resistor level on a current-sink scenario makes the load that resistor
    res = reverse_current(sc, load=["12 ohm"])
    assert res.points[0].load_current == pytest.approx(res.points[0].output_voltage / 12,
                                                       rel=1e-9)


def _cli(args):
    import argparse

    from bucksim.cli.boundary import register
    parser = argparse.ArgumentParser(prog="bucksim")
    register(parser.add_subparsers(dest="verb"))
    ns = parser.parse_args(args)
    return ns.func(ns)


def test_cli_boundary(tmp_path, capsys):
    from bucksim.model.scenario import dump_scenario
    path = tmp_path / "rail.toml"
    dump_scenario(stage(), path)
    assert _cli(["boundary", str(path), "--load", "0.2", "0.8 A", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [pt["reverses"] for pt in out["points"]] == [True, False]
    assert _cli(["boundary", str(path), "--load", "3 uF"]) == 1
    err = capsys.readouterr().err
    assert "3 uF" in err and "load" in err
    assert _cli(["boundary", str(tmp_path / "missing.toml")]) == 1


def test_cli_reverse_is_a_documented_alias_for_one_release(tmp_path, capsys):
    # the old verb name still runs the same study, with a note naming the new one
    from bucksim.model.scenario import dump_scenario
    path = tmp_path / "rail.toml"
    dump_scenario(stage(), path)
    assert _cli(["boundary", str(path), "--load", "0.2", "--json"]) == 0
    new = capsys.readouterr()
    assert _cli(["reverse", str(path), "--load", "0.2", "--json"]) == 0
    old = capsys.readouterr()
    assert old.out == new.out and "note" not in new.err
    assert "'bucksim reverse' is now 'bucksim boundary'" in old.err
