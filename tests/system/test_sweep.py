"""Sweeps: the same rows wherever they run, seeded draws, failed points, resume, physics.

Stages are our own small rails (invented numbers); each point is summarised
over 5 periods so the file stays fast.

References
----------
.. [EM] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 2 (from memory): CCM inductor current ripple
   (peak to peak) dI = Vo (1 - D) / (L fs), independent of the load.
.. [CP] Common practice (derived, no single source): inductor RMS
   sqrt(Io^2 + dI^2/12) and capacitor RMS dI / sqrt(12) for a triangular
   ripple; conduction loss I_rms^2 R; in forced PWM the inductor current
   reverses each period when Io < dI / 2.
.. [NP] numpy.random: ``Generator(PCG64(seed))`` is the reference generator
   the sweep documents for its draws; uniform on [a, b] has variance
   (b - a)^2 / 12 (probability textbooks).
"""

from __future__ import annotations

import csv
import dataclasses
import itertools
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.model import parts as p
from bucksim.sweeps.plan import SweepError, draw_factors, sweep
from bucksim.sweeps.table import SweepTable

REPO = Path(__file__).resolve().parents[2]
SUMMARY_CYCLES = 5


def rail(*, strategy="forced-pwm", dead_time=(20e-9, 20e-9), rds=0.01, dcr=0.01, esr=0.005,
         vf=0.7, inductance=4.7e-6, resistance=2.0, duty=0.3):
    """12 V to ~3.5 V, 500 kHz, 47 uF (invented demo numbers)."""
    return p.Scenario(
        title="sweep test rail", supply=p.Supply(12.0),
        switching=p.Switching(500e3, strategy, dead_time),
        inductor=p.Inductor(inductance, dcr), output_capacitor=p.Capacitor(47e-6, esr),
        high_side=p.Mosfet(rds, p.Diode(vf, 0.01, section="high_side"), section="high_side"),
        low_side=p.Mosfet(rds, p.Diode(vf, 0.01, section="low_side"), section="low_side"),
        load=p.Load(resistance), control=p.Control(duty=duty),
        run=p.RunSettings(cycles=100, summary_cycles=SUMMARY_CYCLES))


RAIL_TOML = """\
schema = 1
title = "sweep test rail (invented numbers)"
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
rds_on = "10 mohm"
body_diode = { vf = "0.7 V", r = "10 mohm" }
[load]
resistance = "2 ohm"
[control]
mode = "open-loop"
duty = 0.3
[run]
cycles = 100
summary_cycles = 5
"""

GRID = {"load.resistance": list(np.geomspace(0.5, 40.0, 20)),
        "inductor.inductance": list(np.linspace(2.2e-6, 10e-6, 10))}


@pytest.fixture(scope="session")
def dask_cluster():
    distributed = pytest.importorskip("distributed")
    # the scheduler's HTTP server would otherwise want port 8787, which another
    # cluster on this shared machine may hold (a harmless but noisy warning)
    cluster = distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=2,
                                       dashboard_address=None,
                                       scheduler_kwargs={"dashboard_address": ":0"})
    yield cluster
    cluster.close()


@pytest.fixture(scope="module")
def grid_serial():
    return sweep(rail(), GRID, workers=1, progress=False)


# ----------------------------------------------------------------------------- executors

def test_grid_order_and_rows_are_the_points(grid_serial):
    t = grid_serial
    assert len(t) == 200 and not t.failed.any(), t.column("error")[t.failed][:3]
    assert np.array_equal(t.column("point"), np.arange(200))
    # documented order: itertools.product, first key outermost
    want = list(itertools.product(*GRID.values()))
    got = list(zip(t.column("load.resistance"), t.column("inductor.inductance"), strict=True))
    assert got == want
    # a row is that point's own result: recompute two points directly
    from bucksim.model.scenario import replace_key
    from bucksim.steady.solve import steady_state
    for i in (0, 137):
        sc = rail()
        for key, v in zip(GRID, want[i], strict=True):
            sc = replace_key(sc, key, v)
        ss = steady_state(sc)
        run = bucksim.simulate(dataclasses.replace(sc, run=dataclasses.replace(
            sc.run, cycles=SUMMARY_CYCLES, initial_current=ss.x[0], initial_voltage=ss.x[1])))
        s = run.summary(cycles=SUMMARY_CYCLES).to_dict()
        assert t.column("power.loss")[i] == s["power"]["loss"]
        assert t.column("devices.high_side.rms")[i] == s["devices"]["high_side"]["rms"]
        assert t.column("output_voltage.ripple")[i] == s["output_voltage"]["ripple"]
        assert t.column("steady.iterations")[i] == ss.iterations
        assert t.column("steady.max_floquet")[i] == np.max(np.abs(ss.floquet))


def test_processes_and_dask_give_identical_rows(grid_serial, dask_cluster):
    procs = sweep(rail(), GRID, workers=2, progress=False)
    dask = sweep(rail(), GRID, cluster=dask_cluster.scheduler_address, progress=False)
    for other in (procs, dask):
        assert other.columns == grid_serial.columns
        for c in grid_serial.columns:
            a, b = grid_serial.column(c), other.column(c)
            assert a.dtype == b.dtype, c
            assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), c
        assert other.equals(grid_serial)


def test_local_cluster_and_any_executor_give_identical_rows():
    from concurrent.futures import ThreadPoolExecutor
    vary = {"load.resistance": [1.0, 2.5, 6.0], "inductor.inductance": [3.3e-6, 6.8e-6]}
    ref = sweep(rail(), vary, workers=1, progress=False)
    local = sweep(rail(), vary, cluster="local", workers=1, progress=False)
    with ThreadPoolExecutor(2) as ex:
        threads = sweep(rail(), vary, cluster=ex, batch=1, progress=False)
    assert local.equals(ref) and threads.equals(ref)


def test_missing_dask_names_the_extra(monkeypatch):
    from bucksim.sweeps.execute import Runner
    monkeypatch.setitem(sys.modules, "distributed", None)  # import now fails
    with pytest.raises(ImportError, match=r"pip install bucksim\[cluster\]"):
        Runner(cluster="local")


def test_importing_sweep_starts_no_cluster():
    code = ("import sys, bucksim.sweeps.plan, bucksim.sweeps.execute, bucksim.cli.sweep; "
            "print(sorted(m for m in ('distributed', 'dask') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env=_env(), check=True).stdout
    assert out.strip() == "[]"


# ----------------------------------------------------------------------------- Monte Carlo

TOL = {"inductor.inductance": ("uniform", 0.2), "output_capacitor.capacitance": ("normal", 0.1)}


def test_monte_carlo_draws_are_seeded():
    a = sweep(rail(), monte_carlo=6, tolerance=TOL, seed=11, workers=1, progress=False)
    b = sweep(rail(), monte_carlo=6, tolerance=TOL, seed=11, workers=1, progress=False)
    c = sweep(rail(), monte_carlo=6, tolerance=TOL, seed=12, workers=1, progress=False)
    assert a.equals(b)
    assert not np.array_equal(a.column("inductor.inductance"), c.column("inductor.inductance"))
    assert not np.array_equal(a.column("power.loss"), c.column("power.loss"))
    # [NP] the documented draw order: one vector per key, keys in the order given
    rng = np.random.Generator(np.random.PCG64(11))
    want_l = 4.7e-6 * (1.0 + rng.uniform(-0.2, 0.2, size=6))
    want_c = 47e-6 * (1.0 + 0.1 * rng.standard_normal(size=6))
    assert np.array_equal(a.column("inductor.inductance"), want_l)
    assert np.array_equal(a.column("output_capacitor.capacitance"), want_c)
    assert np.array_equal(a.column("draw"), np.arange(6))
    rel = a.column("inductor.inductance") / 4.7e-6 - 1.0
    assert np.all(np.abs(rel) <= 0.2)
    assert not a.failed.any()


def test_uniform_draws_fill_their_bounds():
    f = draw_factors({"k": ("uniform", 0.1)}, 20000, seed=3)["k"] - 1.0
    assert f.min() >= -0.1 and f.max() <= 0.1
    assert f.min() < -0.099 and f.max() > 0.099
    # [NP] variance of uniform on [-t, t] is t^2 / 3; 20000 draws: ~1 % standard error
    assert np.var(f) == pytest.approx(0.1 ** 2 / 3, rel=0.04)
    assert abs(np.mean(f)) < 0.002


def test_grid_with_draws_reuses_the_draws():
    t = sweep(rail(), {"load.resistance": [1.0, 4.0]}, monte_carlo=3,
              tolerance={"inductor.inductance": 0.1}, seed=5, workers=1, progress=False)
    assert list(t.column("load.resistance")) == [1.0, 1.0, 1.0, 4.0, 4.0, 4.0]
    ls = t.column("inductor.inductance")
    assert np.array_equal(ls[:3], ls[3:])
    with pytest.raises(SweepError, match="inductor.inductance"):
        sweep(rail(), {"inductor.inductance": [1e-6]}, monte_carlo=2,
              tolerance={"inductor.inductance": 0.1}, workers=1, progress=False)


# ----------------------------------------------------------------------------- failures

@pytest.fixture(scope="module")
def with_failures(tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "fail.csv"
    vary = {"inductor.inductance": [-1e-6, 4.7e-6], "load.resistance": [1.0, 3.0]}
    return sweep(rail(), vary, workers=1, out=out, progress=False), out, vary


def test_failed_point_keeps_its_row(with_failures):
    t, out, _ = with_failures
    err = t.column("error")
    bad = t.column("inductor.inductance") < 0
    assert list(bad) == [True, True, False, False]
    for e in err[bad]:
        assert "inductor.inductance" in e and "-1e-06" in e
    assert np.all(np.isnan(t.column("power.loss")[bad]))
    assert np.all(err[~bad] == "")
    assert np.all(np.isfinite(t.column("power.loss")[~bad]))
    assert np.all(t.column("efficiency")[~bad] > 0.5)
    assert SweepTable.read_csv(out).equals(t)


def test_columns_that_appear_midway(tmp_path):
    """A supply resistance adds its own device row to the summary at some points only."""
    out = tmp_path / "rs.csv"
    vary = {"supply.resistance": [0.0, 0.05, 0.0, 0.1]}
    t = sweep(rail(), vary, workers=1, batch=1, out=out, progress=False)
    rms = t.column("devices.supply.rms")
    assert np.isnan(rms[0]) and np.isnan(rms[2]) and np.all(rms[[1, 3]] > 0)
    assert SweepTable.read_csv(out).equals(t)
    # resume a file that lacks the last point
    lines = out.read_text(encoding="utf-8").splitlines(keepends=True)
    out.write_text("".join(lines[:-1]), encoding="utf-8")
    again = sweep(rail(), vary, workers=1, out=out, resume=True, progress=False)
    assert again.resumed == 3 and again.equals(t)


def test_unknown_key_is_refused_up_front():
    with pytest.raises(SweepError, match="inductor.inductanse"):
        sweep(rail(), {"inductor.inductanse": [1e-6]}, workers=1, progress=False)


def test_resume_refuses_another_sweep(with_failures):
    _, out, vary = with_failures
    other = dict(vary, **{"load.resistance": [1.0, 5.0]})
    with pytest.raises(SweepError, match="load.resistance"):
        sweep(rail(), other, workers=1, out=out, resume=True, progress=False)
    with pytest.raises(SweepError, match="input columns"):
        sweep(rail(), {"load.resistance": [1.0]}, workers=1, out=out, resume=True,
              progress=False)


def test_hdf5_one_dataset_per_column(with_failures, tmp_path):
    import h5py
    t, _, _ = with_failures
    path = tmp_path / "t.h5"
    t.to_hdf5(path)
    with h5py.File(path, "r") as f:
        assert [str(c) for c in f.attrs["columns"]] == t.columns
        for c in t.columns:
            ds = f[c]
            assert ds.ndim == 1 and ds.shape[0] == len(t)
            if t.column(c).dtype.kind == "U":
                assert h5py.check_string_dtype(ds.dtype).encoding == "utf-8"
                assert ds.asstr()[()].tolist() == t.column(c).tolist()
            else:
                assert np.array_equal(ds[()], t.column(c), equal_nan=ds.dtype.kind == "f")
        assert f["power.loss"].attrs["units"] == "W"
        assert f["inductor.inductance"].attrs["units"] == "H"
    assert SweepTable.read_hdf5(path).equals(t)


# ----------------------------------------------------------------------------- CLI, resume

def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    env["OPENBLAS_NUM_THREADS"] = "1"
    return env


def _data_rows(path):
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        return 0
    return max(0, text.count("\n") - 1)


def test_cli_kill_and_resume(tmp_path, capsys):
    from bucksim.cli.sweep import main
    scen = tmp_path / "rail.toml"
    scen.write_text(RAIL_TOML, encoding="utf-8")
    args = [str(scen), "--vary", "load.resistance=0.5:40:30", "--log", "load.resistance",
            "--vary", "inductor.inductance=2.2 uH:10 uH:5", "--batch", "3"]
    total = 150
    out = tmp_path / "killed.csv"
    code = "import sys; from bucksim.cli.sweep import main; sys.exit(main(sys.argv[1:]))"
    proc = subprocess.Popen([sys.executable, "-c", code, *args, "--workers", "1", "--quiet",
                             "--out", str(out)], env=_env(), stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 120
        while _data_rows(out) < 12 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.005)
        proc.send_signal(signal.SIGKILL)
    finally:
        _, err = proc.communicate()   # waits and closes the pipe
    had = _data_rows(out)
    if proc.returncode == 0 or had >= total:
        pytest.fail(f"the sweep finished before it was killed: {err!r}")
    assert proc.returncode == -signal.SIGKILL
    assert 0 < had < total
    # a write cut short by the kill leaves half a line: resume must drop it
    with open(out, "a", encoding="utf-8") as f:
        f.write("149,40.0,1e-05,0.0,1.9")
    capsys.readouterr()
    assert main([*args, "--workers", "2", "--out", str(out), "--resume"]) == 0
    assert f"({had} resumed)" in capsys.readouterr().err
    ref = tmp_path / "ref.csv"
    assert main([*args, "--workers", "1", "--quiet", "--out", str(ref)]) == 0
    a, b = SweepTable.read_csv(out), SweepTable.read_csv(ref)
    assert len(a) == total and np.array_equal(a.column("point"), np.arange(total))
    assert a.equals(b)
    assert out.read_bytes() == ref.read_bytes()
    # SI strings went through the scenario's own unit check
    assert sorted(set(a.column("inductor.inductance"))) == list(np.linspace(2.2e-6, 10e-6, 5))
    assert np.allclose(sorted(set(a.column("load.resistance"))), np.geomspace(0.5, 40, 30),
                       rtol=1e-15)


def test_cli_values_and_errors(tmp_path, capsys):
    import argparse

    from bucksim.cli.sweep import main, parse_tolerance, parse_vary, register
    sc = rail()
    v = parse_vary(sc, ["inductor.inductance=1 uH:10 uH:4", "load.resistance=1,2.5,4 ohm"])
    assert v["inductor.inductance"] == list(np.linspace(1e-6, 10e-6, 4))
    assert v["load.resistance"] == [1.0, 2.5, 4.0]
    with pytest.raises(SweepError, match="inductor.inductance.*1 uF"):
        parse_vary(sc, ["inductor.inductance=1 uF:10 uF:4"])   # wrong unit
    assert parse_tolerance(["a.b=10%", "c.d=normal:5%", "e.f=uniform:0.2"]) == {
        "a.b": ("uniform", 0.1), "c.d": ("normal", 0.05), "e.f": ("uniform", 0.2)}
    scen = tmp_path / "rail.toml"
    scen.write_text(RAIL_TOML, encoding="utf-8")
    assert main([str(scen), "--vary", "inductor.inductance=1 F:2 F:2", "--quiet"]) == 1
    assert "inductor.inductance" in capsys.readouterr().err
    # no --out: the table goes to stdout as CSV
    assert main([str(scen), "--vary", "load.resistance=1,2", "--workers", "1"]) == 0
    cap = capsys.readouterr()
    rows = list(csv.DictReader(cap.out.splitlines()))
    assert [r["load.resistance"] for r in rows] == ["1.0", "2.0"]
    assert "2 points (0 resumed), 0 failed" in cap.err
    # an HDF5 table, with its CSV progress file beside it
    assert main([str(scen), "--vary", "load.resistance=1,2", "--workers", "1", "--quiet",
                 "--out", str(tmp_path / "t.h5")]) == 0
    h5 = SweepTable.read_hdf5(tmp_path / "t.h5")
    assert h5.equals(SweepTable.read_csv(tmp_path / "t.csv")) and len(h5) == 2
    # the verb as the bucksim command will register it
    parser = argparse.ArgumentParser(prog="bucksim")
    register(parser.add_subparsers(dest="verb"))
    ns = parser.parse_args(["sweep", str(scen), "--vary", "load.resistance=1,2"])
    assert ns.func.__name__ == "run_command"
    with pytest.raises(SystemExit):
        main(["--help"])
    assert "bucksim sweep scenarios/" in capsys.readouterr().out


# ----------------------------------------------------------------------------- physics

def test_ripple_is_load_independent_and_losses_follow_rms():
    """Forced PWM, no dead time, 1 mohm parts: a grid over the load."""
    r_on, dcr, esr = 1e-3, 1e-3, 1e-3
    sc = rail(dead_time=(0.0, 0.0), rds=r_on, dcr=dcr, esr=esr)
    loads = [0.5, 1.0, 2.0, 4.0, 10.0, 20.0, 50.0, 100.0]
    t = sweep(sc, {"load.resistance": loads}, workers=1, progress=False)
    assert not t.failed.any()
    L, fs, D = 4.7e-6, 500e3, 0.3
    vo = t.column("output_voltage.mean")
    di = vo * (1 - D) / (L * fs)                                    # [EM] ch. 2
    np.testing.assert_allclose(t.column("inductor_current.ripple"), di, rtol=0.01)
    io = vo / np.array(loads)
    # [CP] forced PWM reverses when Io < dI / 2 (the grid keeps clear of the boundary)
    assert np.array_equal(t.column("reverse_current") == 1.0, io < di / 2)
    assert t.column("reverse_current")[-1] == 1.0 and t.column("reverse_current")[0] == 0.0
    # [CP] conduction losses from the triangular-ripple RMS values: with equal
    # channels, one of them carries iL at every instant
    il_rms2 = io ** 2 + di ** 2 / 12
    want = il_rms2 * (r_on + dcr) + di ** 2 / 12 * esr
    np.testing.assert_allclose(t.column("power.loss"), want, rtol=0.01)
    assert np.all(np.diff(t.column("power.loss")) < 0)   # lighter load, less I^2 R
    # [CP] efficiency varies across load and peaks inside the range: I^2 R at heavy
    # load; at light load the ripple's RMS loss stays while the output power falls
    eff = t.column("efficiency")
    assert 0 < int(np.argmax(eff)) < len(loads) - 1
    assert eff.max() - eff[0] > 2e-3 and eff.max() - eff[-1] > 1e-3
    assert np.all(eff < 1.0)
