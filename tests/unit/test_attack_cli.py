"""The command line under attack: refusals are plain (exit 1, file and key named),
never a traceback; nothing is misread; streamed runs are judged like runs in memory.

The expectations are the tool's own contract (README: exit codes, error
messages) and facts of the trade marked "common practice". Demo scenarios
are the invented ones in ``bucksim/data`` and ``scenarios/``.
"""

import dataclasses
import json
import math
import shutil
import subprocess
import sys
import tracemalloc
from pathlib import Path

import h5py
import numpy as np
import pytest

from bucksim.cli.main import build_parser, main
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

REPO = Path(__file__).resolve().parents[2]
DEFAULT = REPO / "bucksim" / "data" / "default.toml"
CORE = REPO / "scenarios" / "core_rail_1v0.toml"


def scenario_file(tmp_path, name="rail.toml", **replace):
    """The bundled demo rail with some lines replaced (``old=new`` pairs) and 200 cycles."""
    text = DEFAULT.read_text().replace("cycles = 2000", "cycles = 200")
    for old, new in replace.values():
        assert old in text, old
        text = text.replace(old, new)
    path = tmp_path / name
    path.write_text(text)
    return path


def run_cli(capsys, args):
    """``main(args)`` -> (exit code, stdout, stderr); SystemExit (argparse) counts too."""
    try:
        code = main([str(a) for a in args])
    except SystemExit as exc:
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def assert_plain_refusal(code, err, *names):
    assert code == 1, err
    assert "Traceback" not in err and "internal error" not in err, err
    for name in names:
        assert str(name) in err, (name, err)


def unstable_loop(cycles=600):
    """A voltage-mode loop with an integrator gain ~1e6 above a sane crossover
    (invented values, as in tests/validation/test_extreme_designs.py): it bangs between its
    duty clamps."""
    hs = Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    return Scenario("unstable loop (invented)", Supply(12.0),
                    Switching(500e3, "forced-pwm", (20e-9, 20e-9)), Inductor(4.7e-6, 0.01),
                    Capacitor(47e-6, 0.005), hs, ls, Load(0.66),
                    Control(mode="voltage-mode", reference=3.3, compensator={"gain": 1e9}),
                    RunSettings(cycles=cycles))


# ----------------------------------------------------------------------------- parsing

def _all_parsers():
    root = build_parser()
    todo, seen = [root], []
    while todo:
        p = todo.pop()
        seen.append(p)
        for action in p._actions:
            if action.choices and isinstance(action.choices, dict):
                todo.extend(action.choices.values())
    return seen


def test_every_parser_refuses_abbreviations():
    parsers = _all_parsers()
    assert len(parsers) >= 9  # bucksim and each verb
    assert all(p.allow_abbrev is False for p in parsers), [
        p.prog for p in parsers if p.allow_abbrev]


def test_compare_out_is_not_taken_for_output_voltage(capsys):
    # with prefix matching, --out read as --output-voltage and failed on its unit
    code, _, err = run_cli(capsys, ["compare", CORE, "--loads", "1 A:2 A:2", "--out", "x"])
    assert_plain_refusal(code, err, "--out")
    assert "unrecognized" in err and "output_voltage" not in err


def test_usage_errors_are_user_errors(capsys):
    # README: 1 is a user error, 2 an internal one; argparse's own code is 2
    for args in (["run", "--no-such-option"], ["report"], ["cache", "wipe"], ["no-such-verb"],
                 ["run", "--summ", "5"]):
        code, _, err = run_cli(capsys, args)
        assert_plain_refusal(code, err, "usage:")


@pytest.mark.parametrize("args, option", [
    (["run", "--summary-cycles", "0"], "--summary-cycles"),
    (["run", "--cycles", "-3"], "--cycles"),
    (["report", "x.h5", "--summary-cycles", "-1"], "--summary-cycles"),
    (["crosscheck", "--summary-cycles", "0"], "--summary-cycles"),
    (["plot", "x.h5", "--out", "x.png", "--dpi", "-5"], "--dpi"),
    (["plot", "x.h5", "--out", "x.png", "--dpi", "100000"], "--dpi"),
    (["sweep", "x.toml", "--monte-carlo", "2", "--seed", "-1"], "--seed"),
])
def test_bad_option_values_are_refused_naming_the_option(capsys, args, option):
    code, _, err = run_cli(capsys, args)
    assert_plain_refusal(code, err, option)


def test_non_utf8_profile_is_refused_naming_the_file(tmp_path, capsys):
    prof = tmp_path / "profile.toml"
    prof.write_bytes(b'[[level]]\nload = "0.3 A"\nshare = 1.0 # \xff\xfe\n')
    code, _, err = run_cli(capsys, ["compare", CORE, "--loads", "1 A:2 A:2", "--profile", prof])
    assert_plain_refusal(code, err, str(prof), "UTF-8")


def test_fixed_duty_and_output_voltage_contradict(capsys):
    code, _, err = run_cli(capsys, ["compare", CORE, "--loads", "1 A:2 A:2", "--fixed-duty",
                                    "--output-voltage", "1 V"])
    assert_plain_refusal(code, err, "--fixed-duty", "--output-voltage")


def test_compare_outputs_must_differ(tmp_path, capsys):
    out = tmp_path / "same.out"
    for pair in (("--csv", "--figure"), ("--figure", "--breakdown")):
        args = ["compare", CORE, "--loads", "1 A:2 A:2", pair[0], out, pair[1], out]
        code, _, err = run_cli(capsys, args)
        assert_plain_refusal(code, err, pair[0], pair[1], str(out))
    assert not out.exists()


def test_compare_load_count_is_capped(capsys):
    code, _, err = run_cli(capsys, ["compare", CORE, "--loads", "1 A:10 A:100000000"])
    assert_plain_refusal(code, err, "--loads")


# ----------------------------------------------------------------------------- JSON, divergence

def test_json_output_has_no_nan():
    from bucksim.cli.common import json_ready
    data = {"a": math.nan, "b": [1.0, math.inf, {"c": -math.inf}], "d": np.float64("nan"),
            "e": 2.5, "f": None}
    text = json.dumps(json_ready(data), allow_nan=False)
    assert json.loads(text) == {"a": None, "b": [1.0, None, {"c": None}], "d": None,
                                "e": 2.5, "f": None}


@pytest.mark.parametrize("change", [
    ('capacitance = "100 uF"', "capacitance = 1e-300"),
    ('start = "rest"', 'start = "rest"\ninitial_current = 1e300'),
])
def test_diverged_run_is_a_plain_error_and_its_file_is_kept(tmp_path, capsys, change):
    toml = scenario_file(tmp_path, x=change)
    h5 = tmp_path / "diverged.h5"
    code, out, err = run_cli(capsys, ["run", toml, "--json", "--out", h5])
    assert_plain_refusal(code, err, str(toml))
    assert "diverge" in err
    assert out.strip() == "" or json.loads(out) is not None  # never NaN in the JSON
    assert "NaN" not in out
    assert h5.exists()
    code, out, err = run_cli(capsys, ["report", h5])
    assert_plain_refusal(code, err, str(h5))
    assert "nan" not in out.lower()


# ----------------------------------------------------------------------------- size guards

@pytest.mark.parametrize("stream", [False, True])
@pytest.mark.parametrize("change, key", [
    (("cycles = 200", "cycles = 1000000000000"), "run.cycles"),
    (("cycles = 200", 'duration = "1e6 s"'), "run.duration"),
])
def test_oversized_runs_are_refused_up_front(tmp_path, capsys, stream, change, key):
    toml = scenario_file(tmp_path, x=change)
    h5 = tmp_path / "huge.h5"
    args = ["run", toml, "--quiet", "--out", h5] + (["--stream"] if stream else [])
    code, _, err = run_cli(capsys, args)
    assert_plain_refusal(code, err, key, "would need")
    # in memory or streamed, the refusal names the file's line of the key
    line = next(i for i, text in enumerate(Path(toml).read_text(encoding="utf-8").splitlines(), 1)
                if text.startswith(key.split(".")[1]))
    assert f"rail.toml:{line}: {key}" in err, err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rail.toml"]


# ----------------------------------------------------------------------------- stored files

@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    folder = tmp_path_factory.mktemp("attack_stored")
    toml = scenario_file(folder)
    h5 = folder / "rail.h5"
    assert main(["run", str(toml), "--out", str(h5), "--quiet"]) == 0
    return h5


def _spoil(src, dst, edit):
    shutil.copy(src, dst)
    with h5py.File(dst, "r+") as f:
        edit(f)
    return dst


def _set(key, index, value):
    def edit(f):
        data = f[key][()]
        data[index] = value
        f[key][...] = data
    return edit


def _attr(name, value):
    def edit(f):
        f.attrs[name] = value
    return edit


SPOILED = {
    "negative dt": _set("segments/dt", 5, -1e-9),
    "nan dt": _set("segments/dt", 7, np.nan),
    "inf t0": _set("segments/t0", 9, np.inf),
    "t0 out of order": _set("segments/t0", 11, 0.0),
    "nan state": _set("segments/x0_iL", 13, np.nan),
    "inf state": _set("segments/x0_vC", 3, -np.inf),
    "conduction id": _set("segments/conduction", 2, 99),
    "system id": _set("segments/system", 4, 12345),
    "layout 99": _attr("layout_version", 99),
    "complete false": _attr("complete", False),
    "nan t_end": _attr("t_end", np.nan),
}


@pytest.mark.parametrize("what", list(SPOILED))
def test_report_and_plot_refuse_spoiled_files(stored, tmp_path, capsys, what):
    bad = _spoil(stored, tmp_path / "bad.h5", SPOILED[what])
    code, out, err = run_cli(capsys, ["report", bad])
    assert_plain_refusal(code, err, str(bad))
    assert out == ""
    code, _, err = run_cli(capsys, ["plot", bad, "--out", tmp_path / "bad.png"])
    assert_plain_refusal(code, err, str(bad))
    assert not (tmp_path / "bad.png").exists()


def _not_a_run(tmp_path, kind, stored):
    path = tmp_path / "file.h5"
    if kind == "empty":
        path.write_bytes(b"")
    elif kind == "text":
        path.write_text("hello\n")
    elif kind == "foreign hdf5":
        with h5py.File(path, "w") as f:
            f["x"] = np.arange(3)
    elif kind == "truncated":
        data = stored.read_bytes()
        path.write_bytes(data[: len(data) // 2])
    elif kind == "folder":
        path.mkdir()
    elif kind == "toml":
        path = tmp_path / "rail.toml"
        path.write_text(DEFAULT.read_text())
    elif kind == "partial":
        path = tmp_path / ".rail.h5.0123abcd.partial"
        shutil.copy(stored, path)
        with h5py.File(path, "r+") as f:
            f.attrs["complete"] = False
    return path


@pytest.mark.parametrize("kind", ["empty", "text", "foreign hdf5", "truncated", "folder",
                                  "toml", "partial"])
def test_report_refuses_what_is_not_a_run(stored, tmp_path, capsys, kind):
    path = _not_a_run(tmp_path, kind, stored)
    code, out, err = run_cli(capsys, ["report", path])
    assert_plain_refusal(code, err, str(path))
    assert out == ""


def test_report_refuses_a_file_still_being_written(stored, tmp_path, capsys):
    busy = tmp_path / "busy.h5"
    shutil.copy(stored, busy)
    holder = subprocess.Popen([sys.executable, "-c", (
        "import h5py, sys, time\n"
        f"f = h5py.File({str(busy)!r}, 'r+')\n"
        "print('open', flush=True)\n"
        "sys.stdin.read()\n")], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "open"
        code, _, err = run_cli(capsys, ["report", busy])
    finally:
        holder.communicate("")
    assert_plain_refusal(code, err, str(busy))
    assert "another process" in err


def test_main_maps_library_errors_to_user_errors(capsys, monkeypatch):
    from bucksim.cli import cache as cache_verb
    from bucksim.errors import ScenarioError, SimulationError, StorageError

    for exc in (StorageError("x.h5", "broken"), SimulationError("diverged"),
                ScenarioError("run.cycles", "too big", 1), MemoryError()):
        def boom(args, exc=exc):
            raise exc
        monkeypatch.setattr(cache_verb, "_cmd_cache", boom)
        code, _, err = run_cli(capsys, ["cache", "clear"])
        assert_plain_refusal(code, err, "bucksim: error:")


# ----------------------------------------------------------------------------- closed loops

def test_streamed_unstable_loop_has_the_in_memory_status(tmp_path):
    from bucksim.simulation import STATUS_LOOP_UNSETTLED, simulate, simulate_to_file
    from bucksim.waveforms import open_run

    sc = unstable_loop()
    run = simulate(sc)
    assert run.status == STATUS_LOOP_UNSETTLED
    report = simulate_to_file(sc, tmp_path / "loop.h5", chunk_cycles=150)
    assert (report["status"], report["message"]) == (run.status, run.message)
    back = open_run(tmp_path / "loop.h5")
    assert (back.status, back.message) == (run.status, run.message)


def test_cli_says_the_loop_did_not_settle_in_run_stream_and_report(tmp_path, capsys):
    from bucksim.model.scenario import dump_scenario

    toml = tmp_path / "loop.toml"
    dump_scenario(unstable_loop(), toml)
    for args in (["run", toml, "--quiet"],
                 ["run", toml, "--quiet", "--stream", "--out", tmp_path / "loop.h5"],
                 ["report", tmp_path / "loop.h5"]):
        code, out, err = run_cli(capsys, args)
        assert code == 1, (args, err)
        assert "did not settle" in err and "Traceback" not in err
        assert "efficiency" in out  # the summary is still shown, as in memory


@pytest.mark.parametrize("mode", ["open-loop", "closed-loop"])
def test_stream_starts_in_steady_state_like_simulate(tmp_path, mode):
    from bucksim.simulation import simulate, simulate_to_file
    from bucksim.waveforms import open_run

    base = unstable_loop(cycles=40)
    if mode == "open-loop":
        control = Control(duty=0.3)
    else:  # the stable PI of tests/validation/test_closed_loop.py
        control = Control(mode="voltage-mode", reference=3.3,
                          compensator={"gain": 2000.0, "zeros": [2000.0]})
    sc = dataclasses.replace(base, control=control,
                             run=dataclasses.replace(base.run, start="steady-state"))
    run = simulate(sc)
    assert run.success, run.message
    simulate_to_file(sc, tmp_path / "ss.h5")
    back = open_run(tmp_path / "ss.h5")
    for col in ("t0", "dt", "conduction", "system", "x0"):
        assert np.array_equal(getattr(back.segments, col), getattr(run.segments, col)), col
    assert np.array_equal(back.x_end, run.x_end)
    # started settled: no start-up event, in memory and from the file alike
    from bucksim.analysis.stored import summarize_file
    assert summarize_file(tmp_path / "ss.h5").to_dict() == run.summary().to_dict()


# ----------------------------------------------------------------------------- bounded summary

def _load_step_rail(cycles=3000):
    sc = unstable_loop(cycles)
    from bucksim.model.parts import LoadStep
    return dataclasses.replace(
        sc, control=Control(duty=0.3),
        load=Load(0.66, steps=(LoadStep(time=2e-3, resistance=1.32),
                               LoadStep(time=4e-3, resistance=0.66))))


@pytest.mark.parametrize("block", [7, 1000, 1 << 18])
def test_file_summary_equals_the_in_memory_summary(tmp_path, monkeypatch, block):
    """Read in blocks, the summary (window metrics and every event's metrics) is
    the in-memory one to the bit."""
    from bucksim.analysis import stored
    from bucksim.io.hdf5 import save_run
    from bucksim.simulation import simulate

    monkeypatch.setattr(stored, "BLOCK_ROWS", block)
    for k, sc in enumerate([_load_step_rail(), unstable_loop(400)]):
        run = simulate(sc)
        path = tmp_path / f"r{k}.h5"
        save_run(run, path)
        for cycles in (None, 1, 10_000):
            expect = run.summary(cycles).to_dict()
            assert stored.summarize_file(path, cycles).to_dict() == expect
        if k == 0:
            assert len(expect["transients"]) == 3


def _peak(f, *args):
    tracemalloc.start()  # the tracer sees numpy's buffers
    try:
        f(*args)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_file_summary_memory_is_bounded(tmp_path, monkeypatch):
    """The summary of a stored run holds a few blocks, not the run: its peak does
    not grow with the run length, where opening the whole run's does."""
    from bucksim.analysis import stored
    from bucksim.simulation import simulate_to_file
    from bucksim.waveforms import open_run

    monkeypatch.setattr(stored, "BLOCK_ROWS", 4096)
    peaks = {}
    for cycles in (20_000, 80_000):
        path = tmp_path / f"long{cycles}.h5"
        report = simulate_to_file(_load_step_rail(cycles), path)
        stored.summarize_file(path, 5)  # imports and compiles outside the measure
        peaks[cycles] = (_peak(stored.summarize_file, path, 5),
                         _peak(lambda p: open_run(p).summary(5), path))
    table_bytes = report["n_segments"] * (8 + 8 + 1 + 4 + 2 * 8)
    (file_short, memory_short), (file_long, memory_long) = peaks[20_000], peaks[80_000]
    # the whole run is held, and grows with it ...
    assert memory_long > table_bytes and memory_long > 1.5 * memory_short
    # ... where the blocks do not (about 2.5 MB either way when this was written)
    assert file_long < 1.2 * file_short and file_long < memory_long / 10


# ----------------------------------------------------------------------------- scenario files

def test_duplicate_key_error_names_the_key(tmp_path, capsys):
    toml = scenario_file(tmp_path, x=("duty = 0.284", "duty = 0.284\nduty = 0.3"))
    code, _, err = run_cli(capsys, ["run", toml])
    assert_plain_refusal(code, err, f"{toml}:", "control.duty")


def test_load_step_after_the_end_warns_once(tmp_path, capsys):
    from bucksim import load_scenario

    step = ('resistance = "660 mohm"         # 5 A at 3.3 V\n'
            'steps = [{ time = "1 s", resistance = "1 ohm" }]')
    toml = scenario_file(tmp_path, x=('resistance = "660 mohm"         # 5 A at 3.3 V', step))
    with pytest.warns(UserWarning, match=r"load\.steps\[0\]\.time"):
        load_scenario(toml)
    code, _, err = run_cli(capsys, ["run", toml, "--quiet"])
    assert code == 0
    lines = [ln for ln in err.splitlines() if "warning" in ln]
    assert len(lines) == 1 and str(toml) in lines[0] and "load.steps[0].time" in lines[0], err


# ----------------------------------------------------------------------------- compare

def test_compare_goes_on_past_a_failed_point(capsys):
    # diode emulation at 1 uA on this rail cannot hold 1 V at any duty (it pulses
    # the output up); the other points and strategies must still be reported
    code, out, err = run_cli(capsys, ["compare", CORE, "--loads", "1 uA:10 A:2", "--log",
                                      "--json"])
    assert code == 0, err
    data = json.loads(out)
    rows = data["rows"]["diode-emulation"]
    failed = [r for r in rows if r.get("error")]
    assert failed and failed[0]["efficiency"] is None
    assert all(r.get("error") is None for r in data["rows"]["forced-pwm"])
    assert "diode emulation" in err and "1 uA" in err
