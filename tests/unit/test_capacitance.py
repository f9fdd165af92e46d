"""``coss`` and ``cj`` as (voltage, capacitance) tables: reading, refusing, writing back."""

from __future__ import annotations

import pytest

from bucksim.errors import ScenarioError
from bucksim.model.capacitance import CapacitanceTable, NodeCurve, charge, energy
from bucksim.model.scenario import (
    dump_scenario,
    load_scenario,
    loads_scenario,
    replace_key,
    scenario_to_dict,
)
from tests.unit.test_scenario import BASE, edit, line_no, load_error, write

TABLE = 'coss = [[0, "1.2 nF"], [2, 600e-12], [10, 250e-12]]'


def test_a_table_is_read_and_written_back(tmp_path):
    sc = load_scenario(write(tmp_path, edit('coss = "200 pF"', TABLE)))
    assert sc.high_side.coss == CapacitanceTable((0.0, 2.0, 10.0), (1.2e-9, 600e-12, 250e-12))
    out = tmp_path / "back.toml"
    dump_scenario(sc, out)
    again = load_scenario(out)
    assert again.high_side.coss == sc.high_side.coss
    assert scenario_to_dict(again)["high_side"]["coss"] == [[0.0, 1.2e-9], [2.0, 600e-12],
                                                            [10.0, 250e-12]]


@pytest.mark.parametrize("value, key, words", [
    ("[[0, 1e-9], [0, 2e-9]]", "high_side.coss[1]", "increase strictly"),
    ("[[0, -1e-9]]", "high_side.coss[0][1]", ">= 0 F"),
    ("[[0, 1e-9, 3]]", "high_side.coss[0]", "pair"),
    ('[[0, "1 nH"]]', "high_side.coss[0][1]", "F"),
    ("[]", "high_side.coss", "at least one"),
    ('[[0, 1e-9], "x"]', "high_side.coss[1]", "pair"),
    ("[[0, inf]]", "high_side.coss[0][1]", "finite"),
    ("[[nan, 1e-9]]", "high_side.coss[0][0]", "finite"),
])
def test_bad_tables_are_refused_with_file_line_and_key(tmp_path, value, key, words):
    text = edit('coss = "200 pF"', f"coss = {value}")
    path, err = load_error(tmp_path, text)
    msg = str(err)
    assert key in msg and words in msg
    assert msg.startswith(f"{path}:{line_no(text, 'coss')}:")


def test_freewheel_diode_cj_takes_a_table():
    text = edit('device = "mosfet"\nrds_on = "5 mohm"\nbody_diode = { vf = "0.7 V", '
                'r = "8 mohm", qrr = "20 nC" }',
                'device = "diode"\nvf = "0.5 V"\ncj = [[0, 400e-12], [5, 150e-12]]')
    text = text.replace('strategy = "forced-pwm"', 'strategy = "asynchronous"')
    sc = loads_scenario(text)
    assert sc.low_side.cj == CapacitanceTable((0.0, 5.0), (400e-12, 150e-12))


def test_replace_key_with_a_table():
    sc = loads_scenario(BASE)
    new = replace_key(sc, "high_side.coss", [[0, 1e-9], [6, 3e-10]])
    assert new.high_side.coss == CapacitanceTable((0.0, 6.0), (1e-9, 3e-10))
    with pytest.raises(ScenarioError, match="increase strictly"):
        replace_key(sc, "high_side.coss", [[6, 1e-9], [0, 3e-10]])


def test_charge_energy_and_node_bands():
    """Hand values of the piecewise-constant integrals (arithmetic only)."""
    tab = CapacitanceTable((0.0, 2.0), (1e-9, 0.5e-9))
    assert charge(tab, 4.0) == pytest.approx(2 * 1e-9 + 2 * 0.5e-9)
    assert energy(tab, 4.0) == pytest.approx(1e-9 * 4 / 2 + 0.5e-9 * (16 - 4) / 2)
    assert charge(tab, -1.0) == pytest.approx(-1e-9)     # below the first point: c_0
    curve = NodeCurve(tab, tab, 12.0)
    # edges: the low side's 2 V and the high side's 12 - 2 = 10 V
    assert list(curve.edges[1:-1]) == [2.0, 10.0]
    assert list(curve.caps) == pytest.approx([1e-9 + 0.5e-9, 1e-9, 0.5e-9 + 1e-9])
    assert curve.equivalent() == pytest.approx(2 * charge(tab, 12.0) / 12.0)
