"""The bucksim command: verbs, exit codes, data on stdout and messages on stderr."""

import json
import subprocess
import sys

import pytest

from bucksim.cli.main import main
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH

SCENARIOS = "scenarios"


def test_run_default_json(capsys):
    assert main(["run", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["conduction_mode"] in ("ccm", "dcm")
    assert out["energy_balance_error"] < 1e-9
    # keys of the design contract
    for key in ("window", "output_voltage", "inductor_current", "devices", "power", "efficiency"):
        assert key in out


def test_run_table_names_the_rail(capsys):
    assert main(["run", f"{SCENARIOS}/aux_rail_5v_async.toml"]) == 0
    out = capsys.readouterr().out
    assert "efficiency" in out and "low_side" in out


def test_store_and_report_round_trip(tmp_path, capsys):
    h5 = tmp_path / "rail.h5"
    assert main(["run", f"{SCENARIOS}/sensor_rail_3v3_battery.toml", "--json",
                 "--out", str(h5)]) == 0
    first = json.loads(capsys.readouterr().out)
    assert main(["report", str(h5), "--json"]) == 0
    assert json.loads(capsys.readouterr().out) == first
    # --out never silently overwrites
    assert main(["run", "--out", str(h5)]) == 1
    assert "exists" in capsys.readouterr().err


def test_crosscheck_json(capsys):
    assert main(["crosscheck", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    items = {r["item"]: r for r in out["rows"]}
    # default rail is CCM with small ripple: conduction items agree closely
    assert abs(items["high_side.conduction"]["percent"]) < 0.5


def test_bad_scenario_is_a_user_error(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text(DEFAULT_SCENARIO_PATH.read_text(encoding="utf-8")
                   .replace('inductance = "3.3 uH"', 'inductance = "3.3 uF"'))
    assert main(["run", str(bad)]) == 1
    err = capsys.readouterr().err
    assert "inductor.inductance" in err and "bad.toml" in err


def test_missing_file_is_a_user_error(capsys):
    assert main(["run", "no/such/file.toml"]) == 1
    assert "no/such/file.toml" in capsys.readouterr().err


@pytest.mark.parametrize("verb", ["run", "report", "crosscheck", "cache"])
def test_help_has_an_example(verb, capsys):
    with pytest.raises(SystemExit) as e:
        main([verb, "--help"])
    assert e.value.code == 0
    assert "Example:" in capsys.readouterr().out


def test_python_dash_m_version():
    out = subprocess.run([sys.executable, "-m", "bucksim", "--version"], capture_output=True,
                         text=True, check=True)
    assert out.stdout.startswith("bucksim ")


def test_streamed_run_reports_like_the_in_memory_run(tmp_path, capsys):
    h5 = tmp_path / "long.h5"
    assert main(["run", "--cycles", "3000", "--json", "--quiet"]) == 0
    memory = json.loads(capsys.readouterr().out)
    assert main(["run", "--cycles", "3000", "--json", "--quiet", "--stream",
                 "--out", str(h5)]) == 0
    streamed = json.loads(capsys.readouterr().out)
    assert streamed == memory


def test_sweep_out_never_silently_overwrites(tmp_path, capsys):
    out = tmp_path / "table.csv"
    out.write_text("keep me\n")
    args = ["sweep", f"{SCENARIOS}/aux_rail_5v_async.toml", "--vary", "load.resistance=5:10:2",
            "--workers", "1", "--quiet", "--out", str(out)]
    assert main(args) == 1
    assert "exists" in capsys.readouterr().err and out.read_text() == "keep me\n"
    assert main(args + ["--force"]) == 0
    assert out.read_text().startswith("point,")
