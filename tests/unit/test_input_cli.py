"""The input side through the command line: run, store and report, plot, sweep,
compare, the filter warning and refused input (file, line and key named)."""

from __future__ import annotations

import csv
import json

import pytest

from bucksim.cli.main import main
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH

NETWORK = ('\n[input_capacitor]\ncapacitance = "22 uF"\nesr = "3 mohm"\n'
           'banks = [{ capacitance = "100 uF", esr = "40 mohm" }]\n')


def _rail(tmp_path, extra=NETWORK, supply='resistance = "10 mohm"\ninductance = "1 uH"'):
    text = DEFAULT_SCENARIO_PATH.read_text(encoding="utf-8")
    text = text.replace('resistance = "10 mohm"', supply, 1).replace("cycles = 2000",
                                                                      "cycles = 300")
    path = tmp_path / "rail.toml"
    path.write_text(text + extra, encoding="utf-8")
    return path


def test_run_store_report_and_plot(tmp_path, capsys):
    path, h5, png = _rail(tmp_path), tmp_path / "r.h5", tmp_path / "r.png"
    assert main(["run", str(path), "--json", "--out", str(h5)]) == 0
    out = json.loads(capsys.readouterr().out)
    assert set(out["input_voltage"]) == {"mean", "min", "max", "ripple"}
    assert set(out["source_current"]) == {"mean", "rms"}
    assert {"input_capacitor", "input_capacitor_2"} <= set(out["devices"])
    assert "supply" not in out["devices"] and out["power"]["source_loss"] > 0
    assert main(["report", str(h5), "--json"]) == 0
    assert json.loads(capsys.readouterr().out) == out
    assert main(["plot", str(h5), "--signals", "vin,icin,icin2,isrc", "--out", str(png)]) == 0
    assert png.stat().st_size > 10_000


def test_sweep_over_the_capacitance(tmp_path, capsys):
    path, out = _rail(tmp_path, NETWORK.split("banks")[0]), tmp_path / "s.csv"
    assert main(["sweep", str(path), "--vary", "input_capacitor.capacitance=10e-6:40e-6:3",
                 "--out", str(out), "--quiet"]) == 0
    with out.open(newline="") as f:
        rows = list(csv.DictReader(f))
    ripple = [float(r["input_voltage.ripple"]) for r in rows]
    # a ceramic bank's ripple ~ Io D (1 - D) / (Cin fs): falls with C (common practice)
    assert ripple[0] > ripple[1] > ripple[2]
    assert ripple[0] / ripple[2] == pytest.approx(4.0, rel=0.25)


def test_compare_with_an_input_capacitor(tmp_path, capsys):
    path = _rail(tmp_path)
    assert main(["compare", str(path), "--loads", "1:5:2", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    for rows in out["rows"].values():
        for row in rows:
            assert row["error"] in (None, "")
            assert 0.5 < row["efficiency"] < 1.0
            assert row["energy_balance_error"] < 1e-9
            # the bank's ESR is one of the losses, the source's resistance is not
            assert row["losses"]["input_capacitor.esr"] > 0
            assert "supply.resistance" not in row["losses"]


@pytest.mark.parametrize("extra, supply, key", [
    ("", 'resistance = "10 mohm"\ninductance = "1 uH"', "supply.inductance"),
    ('\n[input_capacitor]\ncapacitance = "22 uF"\nesr = "-3 mohm"\n', 'resistance = "10 mohm"',
     "input_capacitor.esr"),
    ('\n[input_filter]\ninductance = "1 uH"\n', 'resistance = "10 mohm"', "input_filter"),
    ('\n[input_capacitor]\ncapacitance = "22 uF"\n', 'resistance = "0 ohm"', "input_capacitor"),
    (NETWORK + '[input_filter]\ninductance = "1 uH"\ndamping = { resistance = "1 ohm" }\n',
     'resistance = "10 mohm"', "input_filter.damping"),
])
def test_refused_input_names_file_line_and_key(tmp_path, capsys, extra, supply, key):
    path = _rail(tmp_path, extra, supply)
    assert main(["run", str(path)]) != 0
    err = capsys.readouterr().err
    assert f"{path}:" in err and key in err and "Traceback" not in err
    line = err.split(f"{path}:", 1)[1].split(":", 1)[0]
    assert line.strip().isdigit(), err


def test_filter_warning_on_a_thin_margin(tmp_path, capsys):
    assert main(["run", "scenarios/input_filter_undamped.toml"]) == 0
    assert "warning" in capsys.readouterr().err
