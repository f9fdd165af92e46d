"""HDF5 run files: round trips, streaming, atomic writes, refusals.

The reference for every round trip is the run held in memory: a stored run
must evaluate and summarise bit for bit like the run that was saved.
"""

import dataclasses  # noqa: I001  (wrapped imports, as elsewhere in tests/)
import json
import os
import shutil
import signal
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

import h5py
import numpy as np
import pytest

from bucksim.errors import StorageError
from bucksim.model.parts import (Capacitor, Control, Diode, Inductor, Load, Mosfet, RunSettings,
                           Scenario, Supply, Switching)
from bucksim.model.scenario import load_scenario, scenario_to_dict
from bucksim.simulation import simulate
from bucksim.io.hdf5 import save_run
from bucksim.simulation import simulate_to_file
from bucksim.waveforms import open_run

REPO = Path(__file__).resolve().parents[2]
COLUMNS = ("t0", "dt", "conduction", "system", "x0")


def rail(strategy="forced-pwm", load_ohm=0.66, cycles=2000):
    """12 V in, duty 0.3, 500 kHz (invented demo values)."""
    return Scenario(
        "storage rail", Supply(12.0), Switching(500e3, strategy, (20e-9, 20e-9)),
        Inductor(4.7e-6, 0.01), Capacitor(47e-6, 0.005),
        Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side"),
        Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side"),
        Load(load_ohm), Control(duty=0.3), RunSettings(cycles=cycles))


SCENARIOS = {
    "forced-pwm": rail(),
    # 20 ohm draws ~0.2 A, below half the ~1 A ripple: diode emulation runs in DCM
    "dcm": rail("diode-emulation", 20.0),
}


@pytest.fixture(scope="module")
def runs():
    out = {}
    for name, sc in SCENARIOS.items():
        run = simulate(sc)
        out[name] = (run, run.summary().to_dict())
    assert out["forced-pwm"][1]["conduction_mode"] == "ccm"
    assert out["dcm"][1]["conduction_mode"] == "dcm"
    return out


@pytest.fixture(scope="module")
def saved(runs, tmp_path_factory):
    """A valid run file, for the refusal tests to spoil copies of."""
    path = tmp_path_factory.mktemp("storage_saved") / "rail.h5"
    save_run(runs["forced-pwm"][0], path)
    return path


def assert_same_segments(a, b):
    for col in COLUMNS:
        x, y = getattr(a.segments, col), getattr(b.segments, col)
        assert x.dtype == y.dtype, col
        assert np.array_equal(x, y), col


def assert_same_table(a, b):
    """Every field of the transition table, whatever fields it grows (taylor_gap was once
    lost on the way through HDF5)."""
    fields = [f.name for f in dataclasses.fields(b)]
    assert {"matrices", "exponentials", "steps", "guard", "taylor_gap"} <= set(fields)
    for field in fields:
        x, y = getattr(a, field), getattr(b, field)
        assert type(x) is type(y), field
        assert np.array_equal(x, y), field


# ----------------------------------------------------------------------------- round trips

@pytest.mark.parametrize("compression", [None, "gzip"])
@pytest.mark.parametrize("name", list(SCENARIOS))
def test_round_trip_is_bit_identical(runs, tmp_path, name, compression):
    run, summary = runs[name]
    path = tmp_path / f"{name}.h5"
    report = run.save(path, compression=compression)
    assert report == {"path": os.fspath(path), "n_segments": len(run.segments),
                      "t_end": run.t_end, "status": run.status, "message": run.message}
    back = open_run(path)
    assert back.summary().to_dict() == summary
    assert_same_segments(back, run)
    assert back.scenario == run.scenario
    assert (back.t_end, back.status, back.message) == (run.t_end, run.status, run.message)
    assert np.array_equal(back.x_end, run.x_end)
    assert_same_table(back.table, run.table)
    t = np.linspace(0.0, run.t_end, 997)
    assert np.array_equal(back.at(t, "vsw"), run.at(t, "vsw"))
    assert np.array_equal(back.at(t), run.at(t))


def test_layout_contract(runs, tmp_path):
    run = runs["forced-pwm"][0]
    plain, packed = tmp_path / "plain.h5", tmp_path / "packed.h5"
    save_run(run, plain)
    save_run(run, packed, compression="gzip")
    with h5py.File(plain, "r") as f:
        a = f.attrs
        assert a["layout_version"] == 1 and bool(a["complete"]) is True
        assert a["t_end"] == run.t_end and a["status"] == 0 and a["message"] == run.message
        assert (a["x_end_iL"], a["x_end_vC"]) == tuple(run.x_end)
        assert a["created"].endswith("+00:00") and a["bucksim_version"]
        units = {"t0": "s", "dt": "s", "conduction": "1", "system": "1",
                 "x0_iL": "A", "x0_vC": "V"}
        for col, unit in units.items():
            ds = f["segments"][col]
            assert ds.ndim == 1 and ds.shape == (len(run.segments),)
            assert ds.attrs["units"] == unit
            assert ds.maxshape == (None,) and ds.chunks is not None
            assert ds.compression is None
        assert np.array_equal(f["segments/x0_vC"][()], run.segments.x0[:, 1])
        assert list(f["segments/conduction"].attrs["names"])[:2] == ["high", "low"]
        assert np.array_equal(f["systems/exponentials"][()], run.table.exponentials)
        assert f["systems"].attrs["guard"] == run.table.guard
        assert json.loads(f["scenario/resolved"].asstr()[()]) == json.loads(
            json.dumps(scenario_to_dict(run.scenario)))
        assert f["scenario/text"].asstr()[()] == ""  # built in Python
    with h5py.File(packed, "r") as f:
        ds = f["segments/t0"]
        assert ds.compression == "gzip" and ds.shuffle
    assert os.path.getsize(packed) < 0.7 * os.path.getsize(plain)


SCENARIO_TEXT = """\
schema = 1
title = "storage file rail"   # invented demo values

[supply]
voltage = "12 V"

[switching]
frequency = "500 kHz"
strategy = "forced-pwm"
dead_time = ["20 ns", "20 ns"]

[inductor]
inductance = "4.7 uH"
dcr = "10 mohm"

[output_capacitor]
capacitance = "47 uF"
esr = "5 mohm"

[high_side]
rds_on = "10 mohm"
body_diode = { vf = "0.7 V", r = "10 mohm" }

[low_side]
device = "mosfet"
rds_on = "5 mohm"
body_diode = { vf = "0.7 V", r = "10 mohm" }

[load]
resistance = "0.66 ohm"

[control]
duty = 0.3

[run]
cycles = 300
"""


def test_scenario_file_text_and_source_kept(tmp_path):
    toml = tmp_path / "rail.toml"
    toml.write_text(SCENARIO_TEXT)
    sc = load_scenario(toml)
    run = simulate(sc)
    path = tmp_path / "from_file.h5"
    run.save(path)
    with h5py.File(path, "r") as f:
        assert f["scenario/text"].asstr()[()] == SCENARIO_TEXT
    back = open_run(path)
    assert back.scenario.text == SCENARIO_TEXT and back.scenario.source == str(toml)
    assert back.scenario == sc
    assert back.summary().to_dict() == run.summary().to_dict()


def test_save_replaces_atomically_and_leaves_nothing_else(runs, tmp_path):
    path = tmp_path / "rail.h5"
    path.write_bytes(b"an older file")
    save_run(runs["dcm"][0], path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rail.h5"]
    assert open_run(path).summary().to_dict() == runs["dcm"][1]


@pytest.mark.parametrize("exc", [KeyboardInterrupt, RuntimeError])
def test_failed_save_keeps_old_file_and_removes_partial(runs, tmp_path, monkeypatch, exc):
    from bucksim.io import hdf5 as storage

    path = tmp_path / "rail.h5"
    save_run(runs["forced-pwm"][0], path)
    before = path.read_bytes()

    def interrupted(self, *args):
        raise exc("stopped while writing")

    monkeypatch.setattr(storage._RunWriter, "finish", interrupted)
    with pytest.raises(exc):
        save_run(runs["dcm"][0], path)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rail.h5"]


def test_bad_compression_is_refused_before_writing(runs, tmp_path):
    with pytest.raises(ValueError, match="compression"):
        save_run(runs["dcm"][0], tmp_path / "x.h5", compression="zip")
    assert list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------------- streaming

@pytest.mark.parametrize("name", list(SCENARIOS))
def test_streaming_equals_in_memory(runs, tmp_path, name):
    run, summary = runs[name]
    streamed, saved_path = tmp_path / "streamed.h5", tmp_path / "saved.h5"
    # small engine chunks: many appends, events and dead times across chunk edges
    report = simulate_to_file(SCENARIOS[name], streamed, chunk_cycles=300)
    save_run(run, saved_path)
    assert report == {"path": os.fspath(streamed), "n_segments": len(run.segments),
                      "t_end": run.t_end, "status": 0, "message": run.message}
    a, b = open_run(streamed), open_run(saved_path)
    assert_same_segments(a, run)
    assert_same_segments(a, b)
    assert_same_table(a.table, run.table)
    assert a.summary().to_dict() == summary
    assert sorted(p.name for p in tmp_path.iterdir()) == ["saved.h5", "streamed.h5"]


def test_streaming_memory_is_bounded(tmp_path):
    simulate_to_file(rail(cycles=10), tmp_path / "warm.h5")  # imports and compiles
    tracemalloc.start()
    try:
        report = simulate_to_file(rail(cycles=40_000), tmp_path / "long.h5", chunk_cycles=1000)
        _, streamed_peak = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        total = report["n_segments"] * (8 + 8 + 1 + 4 + 2 * 8)  # bytes of the segment table
        probe = np.empty(total, np.uint8)  # the tracer sees numpy's buffers
        _, probe_peak = tracemalloc.get_traced_memory()
        del probe
    finally:
        tracemalloc.stop()
    assert report["n_segments"] > 150_000
    assert probe_peak >= total
    assert streamed_peak < total / 4
    with h5py.File(tmp_path / "long.h5", "r") as f:
        assert f["segments/t0"].shape == (report["n_segments"],)


# ----------------------------------------------------------------------------- atomicity

WRITER = """
import signal, sys
signal.signal(signal.SIGINT, signal.default_int_handler)  # as at an interactive prompt
from bucksim.model.parts import *
from bucksim.simulation import simulate_to_file
sc = Scenario("killed", Supply(12.0), Switching(500e3, "forced-pwm", (20e-9, 20e-9)),
              Inductor(4.7e-6, 0.01), Capacitor(47e-6, 0.005),
              Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side"),
              Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side"),
              Load(0.66), Control(duty=0.3), RunSettings(cycles=20_000_000))
simulate_to_file(sc, sys.argv[1])
"""


def start_writer(path):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        [str(REPO)] + ([os.environ["PYTHONPATH"]] if os.environ.get("PYTHONPATH") else [])))
    return subprocess.Popen([sys.executable, "-c", WRITER, str(path)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def wait_until_streaming(proc, path, deadline):
    """The writer's partial file, once several MB of segments are in it.

    By then the kernels are compiled or loaded, so a Ctrl-C cannot land inside
    numba's compiler callbacks (which swallow it), and the run (2e7 cycles,
    tens of seconds) is far from done.
    """
    while time.monotonic() < deadline and proc.poll() is None:
        partial = [p for p in path.parent.iterdir() if p.name.endswith(".partial")]
        if partial and partial[0].stat().st_size > 8_000_000:
            return partial[0]
        time.sleep(0.01)
    proc.kill()
    err = proc.communicate()[1].decode()[-2000:]
    pytest.fail(f"the writer did not start streaming into a partial file: {err}")


def test_interrupted_writers_leave_no_final_file(tmp_path):
    # both writers run at once so the suite pays one interpreter start-up
    target = {"killed": tmp_path / "killed" / "long.h5",
              "stopped": tmp_path / "stopped" / "long.h5"}
    for path in target.values():
        path.parent.mkdir()
    procs, partial = {}, {}
    try:
        for name, path in target.items():
            procs[name] = start_writer(path)
        deadline = time.monotonic() + 60
        for name, sig in (("killed", signal.SIGKILL), ("stopped", signal.SIGINT)):
            partial[name] = wait_until_streaming(procs[name], target[name], deadline)
            assert partial[name].name.startswith(".long.h5.")
            procs[name].send_signal(sig)
        errors = {}
        for name, proc in procs.items():
            try:
                errors[name] = proc.communicate(timeout=15)[1]
            except subprocess.TimeoutExpired:
                proc.kill()
                err = proc.communicate()[1].decode()[-3000:]
                pytest.fail(f"the {name} writer ignored its signal; stderr:\n{err}")
    finally:
        for proc in procs.values():
            if proc.poll() is None:
                proc.kill()
                proc.communicate()
    for proc in procs.values():
        assert proc.returncode != 0
    assert not target["killed"].exists() and not target["stopped"].exists()
    # Ctrl-C: the writer removed its partial file on the way out
    assert b"KeyboardInterrupt" in errors["stopped"]
    assert list(target["stopped"].parent.iterdir()) == []
    # SIGKILL: no clean-up is possible; the partial stays, and is refused if opened
    assert list(target["killed"].parent.iterdir()) == [partial["killed"]]
    with pytest.raises(StorageError, match=str(partial["killed"])):
        open_run(partial["killed"])


def test_ctrl_c_is_held_until_the_writer_can_stop(tmp_path, monkeypatch):
    from bucksim.io import hdf5 as storage

    seen = []
    original = storage._RunWriter.append

    def append(self, *cols):
        original(self, *cols)
        if len(seen) == 1:
            signal.raise_signal(signal.SIGINT)
            seen.append("went on")  # only reached if the Ctrl-C was held, not raised here
        seen.append(len(cols[0]))

    monkeypatch.setattr(storage._RunWriter, "append", append)
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        with pytest.raises(KeyboardInterrupt):
            simulate_to_file(rail(), tmp_path / "rail.h5", chunk_cycles=300)
        assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # restored
    finally:
        signal.signal(signal.SIGINT, previous)
    assert seen[1] == "went on" and len(seen) == 3  # stopped at the next chunk
    assert list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------------- refusals

def spoil(saved, tmp_path, edit):
    path = tmp_path / "spoiled.h5"
    shutil.copyfile(saved, path)
    with h5py.File(path, "r+") as f:
        edit(f)
    return path


def refused(path, *words):
    with pytest.raises(StorageError) as info:
        open_run(path)
    message = str(info.value)
    assert str(path) in message
    for word in words:
        assert word in message, message
    return message


def test_refuses_non_hdf5_file(tmp_path):
    path = tmp_path / "notes.h5"
    path.write_text("schema = 1\ntitle = 'not a run'\n")
    refused(path, "not an HDF5 file")


def test_refuses_truncated_file(saved, tmp_path):
    path = tmp_path / "cut.h5"
    data = saved.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    refused(path, "truncated")


def test_refuses_foreign_hdf5_file(tmp_path):
    path = tmp_path / "foreign.h5"
    with h5py.File(path, "w") as f:
        f["signal"] = np.arange(10.0)
    refused(path, "not a bucksim run", "layout_version")


def test_refuses_newer_layout_politely(saved, tmp_path):
    path = spoil(saved, tmp_path, lambda f: f.attrs.__setitem__("layout_version", 99))
    refused(path, "layout version 99", "reads layout version 1", "upgrade")


def test_refuses_incomplete_file(saved, tmp_path):
    path = spoil(saved, tmp_path, lambda f: f.attrs.__setitem__("complete", False))
    refused(path, "incomplete")


def test_refuses_stale_matrices(saved, tmp_path):
    def edit(f):
        f["systems/matrices"][0, 0, 0] *= 1.01
    refused(spoil(saved, tmp_path, edit), "stale or foreign")


def test_refuses_missing_column(saved, tmp_path):
    def edit(f):
        del f["segments/dt"]
    refused(spoil(saved, tmp_path, edit), "corrupt", "/segments/dt")


def test_refuses_ragged_columns(saved, tmp_path):
    def edit(f):
        f["segments/x0_vC"].resize((5,))
    refused(spoil(saved, tmp_path, edit), "corrupt", "differ in length")


def test_refuses_unknown_system_ids(saved, tmp_path):
    def edit(f):
        f["segments/system"][3] = 999
    refused(spoil(saved, tmp_path, edit), "corrupt", "system ids")


def test_missing_file_is_file_not_found(tmp_path):
    with pytest.raises(FileNotFoundError, match="no such run file"):
        open_run(tmp_path / "absent.h5")
