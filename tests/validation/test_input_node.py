"""The node's charge through the input network (bucksim.analysis.edges_input).

With node capacitance and an input capacitor the closing high side takes the
node's charge from the switch cell at once. Checks against laws outside the
project:

* Charge conservation at the cell (Kirchhoff's current law): over whole
  periods of a periodic steady state the banks and inductors return to their
  state, so the source's charge equals the charge the high side draws,
  ``int iin dt``, plus the node charge of every closure.
* Conservation of energy: the summary's balance, with the node as a coss table too.
* The limit of a stiff cell (tiny ESR and source resistance, a huge capacitor):
  the node's charge energies equal those without an input network, where the
  ideal source supplies the charge at ``Vs`` (0.5 Cn dv^2 per hard closure,
  Erickson & Maksimovic, 3rd ed., ch. 4).
"""

from __future__ import annotations

import numpy as np
import pytest

import bucksim
from bucksim.analysis.edges import node_transfers
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH, loads_scenario
from bucksim.model.stage import HIGH

BASE = DEFAULT_SCENARIO_PATH.read_text(encoding="utf-8").replace(
    "start = \"rest\"", "start = \"steady-state\"").replace("cycles = 2000", "cycles = 40")
NETWORK = '\n[input_capacitor]\ncapacitance = "22 uF"\nesr = "3 mohm"\n'
TABLE_COSS = ('coss = [["0 V", "1.2 nF"], ["2 V", "600 pF"], ["6 V", "300 pF"], '
              '["12 V", "200 pF"]]')


def _scenario(extra=NETWORK, supply='resistance = "10 mohm"\ninductance = "1 uH"',
              low_coss=None):
    text = BASE.replace('resistance = "10 mohm"', supply, 1) + extra
    if low_coss is not None:
        text = text.replace('coss = "600 pF"', low_coss)
    return loads_scenario(text)


@pytest.mark.parametrize("low_coss", [None, TABLE_COSS])
def test_charge_is_conserved_at_the_cell(low_coss):
    run = bucksim.simulate(_scenario(low_coss=low_coss))
    s = run.summary()
    width = s.window.stop - s.window.start
    src = s.source_current.mean * width
    drawn = s.devices["high_side"].mean * width
    if "high_side_ramp" in run.signals:     # and the channel's current ramps (exact)
        from bucksim.analysis.summarize import WindowIntegrals
        from bucksim.analysis.windows import window_pieces
        idx, ta, tb, za = window_pieces(run, s.window.start)
        drawn += WindowIntegrals(run, idx, tb - ta, za, width).integral("high_side_ramp")
    node = node_transfers(run, s.window.start)
    jumps = node["conduction"] == HIGH
    stage = run.stage
    level = stage.level_at(s.window.start)
    q = float(np.sum(stage.curves[level].charge(node["v_from"][jumps],
                                                _after_jump(run, node, jumps))))
    # high side current: channel iL plus the body diode's -iL (here it never conducts)
    assert s.devices["high_side_body_diode"].rms == 0.0
    assert src == pytest.approx(drawn + q, rel=1e-9)
    assert q > 0.0
    assert s.energy_balance_error < 1e-9


def _after_jump(run, node, jumps):
    seg = run.segments
    idx = node["index"][jumps]
    rows = run.signal_table("vsw")[seg.system[idx]]
    z = np.hstack([seg.x0[idx], np.ones((len(idx), 1))])
    return np.einsum("ij,ij->i", rows, z)


def test_stiff_cell_limit_equals_the_ideal_source():
    stiff = _scenario('\n[input_capacitor]\ncapacitance = "1 F"\nesr = "1 uohm"\n',
                      supply='resistance = "1 uohm"')
    plain = _scenario("", supply='resistance = "0 ohm"')
    a, b = bucksim.simulate(stiff).summary(), bucksim.simulate(plain).summary()
    for dev in ("high_side", "low_side"):
        assert a.devices[dev].switching["coss"] == pytest.approx(
            b.devices[dev].switching["coss"], rel=1e-5)
    assert a.efficiency == pytest.approx(b.efficiency, rel=1e-5)
    assert a.energy_balance_error < 1e-9
