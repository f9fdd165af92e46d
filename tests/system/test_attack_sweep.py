"""Sweep defects found by review and attack: BLAS threads, orphaned workers, size
guards, scalar values, unstable points, resume over files that are not sweeps.

Stages are the small rails of ``test_sweep.py`` (invented numbers).

References
----------
.. [FL] Floquet theory of periodic orbits (e.g. Khalil, *Nonlinear Systems*,
   3rd ed., 2002, sec. 2.9 on Poincare maps, from memory): a periodic orbit
   whose monodromy matrix has an eigenvalue of modulus > 1 is unstable.
.. [CP] Common practice: peak-current mode above half duty without slope
   compensation oscillates subharmonically (the current-loop multiplier is
   -D / (1 - D), of modulus > 1 for D > 0.5).
.. [LX] Linux ``proc(5)``: ``/proc/self/maps`` lists the shared libraries
   mapped into a process; OpenBLAS exports ``*_get_num_threads`` (its own
   documented interface).
"""

from __future__ import annotations

import dataclasses
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.errors import ScenarioError
from bucksim.sweeps.plan import SweepError, sweep
from bucksim.sweeps.table import SweepTable
from tests.system.test_sweep import RAIL_TOML, rail

REPO = Path(__file__).resolve().parents[2]
LINUX = sys.platform.startswith("linux")


def _env(**extra):
    """A child environment without the test session's BLAS pinning."""
    env = {k: v for k, v in os.environ.items()
           if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")}
    env["PYTHONPATH"] = os.pathsep.join([str(REPO),
                                         env.get("PYTHONPATH", "")])
    env.update(extra)
    return env


# ----------------------------------------------------------------------------- BLAS threads

# What a point sees: the thread count of every OpenBLAS mapped into the
# process [LX], read independently of bucksim's own control code.
PROBE = textwrap.dedent("""\
    import ctypes, json, os

    def blas_threads():
        paths = sorted({line.split(maxsplit=5)[5].strip() for line in open("/proc/self/maps")
                        if len(line.split(maxsplit=5)) == 6 and "openblas" in line.lower()})
        out = {}
        for path in paths:
            lib = ctypes.CDLL(path)
            for name in ("openblas_get_num_threads", "scipy_openblas_get_num_threads",
                         "scipy_openblas_get_num_threads64_"):
                f = getattr(lib, name, None)
                if f is not None:
                    f.restype = ctypes.c_int
                    out[os.path.basename(path)] = f()
                    break
        return out
    """)

RECORDER = PROBE + textwrap.dedent("""\
    import bucksim.sweeps.execute as _exec  # light: loads no numerical library
    _real = _exec.run_point

    def _recording(*args):
        row = _real(*args)   # the point has now used every library it needs
        with open(os.environ["BLAS_LOG"], "a") as f:
            f.write(json.dumps({"pid": os.getpid(), "threads": blas_threads()}) + "\\n")
        return row

    _exec.run_point = _recording  # also in spawned workers (they import __main__)

    if __name__ == "__main__":
        from tests.system.test_sweep import rail
        from bucksim.sweeps.plan import sweep
        vary = {"load.resistance": [1.0, 2.5, 6.0, 9.0]}
        sweep(rail(), vary, workers=1, progress=False)
        sweep(rail(), vary, workers=2, batch=1, progress=False)
        print(json.dumps(blas_threads()))    # after the sweeps: the caller's count is back
    """)


@pytest.mark.skipif(not LINUX, reason="reads /proc/self/maps")
def test_every_blas_runs_one_thread_wherever_a_point_runs(tmp_path):
    script = tmp_path / "record.py"
    script.write_text(RECORDER, encoding="utf-8")
    log = tmp_path / "blas.jsonl"
    # two threads by default, so one thread is something the sweep must set
    out = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                         check=False, timeout=300,
                         env=_env(OPENBLAS_NUM_THREADS="2", BLAS_LOG=str(log),
                                  PYTHONPATH=str(REPO)))
    assert out.returncode == 0, out.stderr[-3000:]
    records = [json.loads(line) for line in log.read_text().splitlines()]
    assert len(records) == 8
    assert len({r["pid"] for r in records}) >= 2          # the caller and pool workers
    for r in records:
        assert r["threads"], r                            # numpy's and scipy's OpenBLAS
        assert set(r["threads"].values()) == {1}, r
    after = json.loads(out.stdout.strip().splitlines()[-1])
    assert after and set(after.values()) == {2}, after


BIT_IDENTITY = textwrap.dedent("""\
    import sys
    import numpy as np
    from tests.system.test_sweep import rail
    from bucksim.sweeps.plan import sweep

    if __name__ == "__main__":
        vary = {"load.resistance": [0.7, 3.0, 20.0], "inductor.inductance": [2.2e-6, 10e-6]}
        out = sys.argv[1]
        sweep(rail(), vary, workers=1, progress=False, out=out + "/serial.csv")
        sweep(rail(), vary, workers=2, batch=1, progress=False, out=out + "/pool.csv")
        sweep(rail(), vary, cluster="local", workers=2, progress=False, out=out + "/dask.csv")
    """)


def test_rows_are_bit_identical_in_process_in_a_pool_and_on_dask(tmp_path):
    pytest.importorskip("distributed")
    script = tmp_path / "identity.py"
    script.write_text(BIT_IDENTITY, encoding="utf-8")
    out = subprocess.run([sys.executable, str(script), str(tmp_path)], capture_output=True,
                         text=True, check=False, timeout=300, env=_env(OPENBLAS_NUM_THREADS="2"))
    assert out.returncode == 0, out.stderr[-3000:]
    serial = SweepTable.read_csv(tmp_path / "serial.csv")
    assert len(serial) == 6 and not serial.failed.any()
    for name in ("pool", "dask"):
        other = SweepTable.read_csv(tmp_path / f"{name}.csv")
        assert other.columns == serial.columns, name
        for c in serial.columns:
            a, b = serial.column(c), other.column(c)
            if a.dtype.kind == "f":
                same = (a == b) | (np.isnan(a) & np.isnan(b))  # bit for bit, not approx
                assert same.all(), (name, c, a[~same], b[~same])
            else:
                assert (a == b).all(), (name, c)
        assert (tmp_path / f"{name}.csv").read_bytes() == (tmp_path / "serial.csv").read_bytes()


# ----------------------------------------------------------------------------- orphans

ORPHAN = textwrap.dedent("""\
    import numpy as np
    from tests.system.test_sweep import rail
    from bucksim.sweeps.plan import sweep

    if __name__ == "__main__":
        sweep(rail(), {"load.resistance": list(np.linspace(1.0, 2.0, 2000))}, workers=2,
              batch=1, progress=False)
    """)


def test_pool_workers_exit_when_the_sweep_is_killed(tmp_path):
    psutil = pytest.importorskip("psutil")
    script = tmp_path / "orphan.py"
    script.write_text(ORPHAN, encoding="utf-8")
    proc = subprocess.Popen([sys.executable, str(script)], env=_env(OPENBLAS_NUM_THREADS="1"),
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    parent = psutil.Process(proc.pid)
    kids = []
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and proc.poll() is None:
            kids = [k for k in parent.children(recursive=True)
                    if "multiprocessing" in " ".join(k.cmdline())
                    and "resource_tracker" not in " ".join(k.cmdline())]
            if len(kids) >= 2:
                break
            time.sleep(0.1)
        assert len(kids) >= 2, "the pool never started"
        kids = parent.children(recursive=True)  # the workers and the resource tracker
        time.sleep(1.0)                          # the workers are busy with points
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        _, alive = psutil.wait_procs(kids, timeout=10)
        assert not alive, [(k.pid, " ".join(k.cmdline())) for k in alive]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=30)
        for k in kids:
            try:
                k.kill()
            except psutil.Error:
                pass


# ----------------------------------------------------------------------------- size guards

def test_oversized_grid_is_refused_before_it_is_built():
    big = {"load.resistance": list(np.linspace(1.0, 2.0, 100_000)),
           "inductor.inductance": list(np.linspace(2e-6, 9e-6, 100_000))}
    with pytest.raises(ScenarioError) as err:
        sweep(rail(), big, workers=1, progress=False)
    text = str(err.value)
    assert "10000000000 points" in text and "would need about" in text, text
    assert "load.resistance" in text, text


def test_oversized_monte_carlo_is_refused_before_drawing():
    with pytest.raises(ScenarioError, match=r"monte_carlo.*would need about"):
        sweep(rail(), monte_carlo=10**11, tolerance={"inductor.inductance": 0.1},
              workers=1, progress=False)


def test_cli_refuses_an_oversized_axis_before_making_it(tmp_path, capsys):
    from bucksim.cli.sweep import main
    scen = tmp_path / "rail.toml"
    scen.write_text(RAIL_TOML, encoding="utf-8")
    code = main([str(scen), "--vary", "load.resistance=1:2:100000000000", "--workers", "1",
                 "--quiet"])
    err = capsys.readouterr().err
    assert code == 1, err
    assert "--vary load.resistance" in err and "would need about" in err, err
    assert "Traceback" not in err


def test_points_too_big_for_the_workers_are_refused_up_front():
    # one point of 3e8 summary cycles would keep ~1e11 B of segments (limits.run_bytes)
    sc = rail()
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, cycles=300_000_000,
                                                         summary_cycles=300_000_000))
    with pytest.raises(ScenarioError, match=r"run\.summary_cycles.*would need about"):
        sweep(sc, {"load.resistance": [1.0, 2.0]}, workers=2, progress=False)


# ----------------------------------------------------------------------------- values

def test_a_scalar_value_is_a_one_point_axis():
    one = sweep(rail(), {"load.resistance": 2.5}, workers=1, progress=False)
    listed = sweep(rail(), {"load.resistance": [2.5]}, workers=1, progress=False)
    text = sweep(rail(), {"load.resistance": "2.5 ohm"}, workers=1, progress=False)
    text_listed = sweep(rail(), {"load.resistance": ["2.5 ohm"]}, workers=1, progress=False)
    assert len(one) == 1 and not one.failed.any()
    assert one.equals(listed) and text.equals(text_listed)
    assert text.column("efficiency")[0] == one.column("efficiency")[0]


@pytest.mark.parametrize("bad", [{"a": 1}, {1.0, 2.0}, None, object()])
def test_values_that_are_not_a_list_are_refused_by_key(bad):
    with pytest.raises(SweepError, match=r"vary load\.resistance: expected"):
        sweep(rail(), {"load.resistance": bad}, workers=1, progress=False)


def test_vary_that_is_not_a_mapping_is_refused():
    with pytest.raises(SweepError, match=r"vary: expected a dict"):
        sweep(rail(), [("load.resistance", [1.0])], workers=1, progress=False)


# ----------------------------------------------------------------------------- unstable points

def test_unstable_operating_point_carries_its_reason():
    # [CP] peak-current mode at D = 0.79 without slope compensation is unstable;
    # the shipped compensation (200 kV/s) makes it stable [FL]
    sc = bucksim.load_scenario(REPO / "scenarios" / "pcm_rail_3v3_high_duty.toml")
    t = sweep(sc, {"control.slope_compensation": [0.0, 2e5]}, workers=1, progress=False)
    mu = t.column("steady.max_floquet")
    assert mu[0] > 1.0 > mu[1]
    err = t.column("error")
    assert "unstable" in err[0] and "Floquet" in err[0], err[0]
    assert err[1] == ""
    assert list(t.failed) == [True, False]
    assert np.isnan(t.column("efficiency")[0]) and np.isfinite(t.column("efficiency")[1])


# ----------------------------------------------------------------------------- resume

def _stored_run(path):
    sc = rail()
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, cycles=10))
    bucksim.simulate(sc).save(path)
    return path.read_bytes()


def test_resume_over_a_stored_run_is_refused(tmp_path, capsys):
    from bucksim.cli.sweep import main
    scen = tmp_path / "rail.toml"
    scen.write_text(RAIL_TOML, encoding="utf-8")
    target = tmp_path / "x.h5"
    before = _stored_run(target)
    args = [str(scen), "--vary", "load.resistance=1,2", "--workers", "1", "--quiet",
            "--out", str(target), "--resume"]
    assert main(args) == 1
    err = capsys.readouterr().err
    assert str(target) in err and "Traceback" not in err, err
    assert target.read_bytes() == before
    assert not (tmp_path / "x.csv").exists()
    # a progress file beside it does not make the stored run a sweep table
    (tmp_path / "x.csv").write_text("", encoding="utf-8")
    assert main(args) == 1
    err = capsys.readouterr().err
    assert str(target) in err and "not a sweep table" in err, err
    assert target.read_bytes() == before


def test_api_resume_over_a_stored_run_is_refused(tmp_path):
    target = tmp_path / "x.h5"
    before = _stored_run(target)
    with pytest.raises(SweepError, match="x.h5"):
        sweep(rail(), {"load.resistance": [1.0]}, workers=1, progress=False, out=target,
              resume=True)
    assert target.read_bytes() == before


def test_resume_with_force_is_refused(tmp_path, capsys):
    from bucksim.cli.sweep import main
    scen = tmp_path / "rail.toml"
    scen.write_text(RAIL_TOML, encoding="utf-8")
    out = tmp_path / "s.csv"
    args = [str(scen), "--vary", "load.resistance=1,2", "--workers", "1", "--quiet",
            "--out", str(out)]
    assert main(args) == 0
    before = out.read_bytes()
    capsys.readouterr()
    assert main([*args, "--resume", "--force"]) == 1
    err = capsys.readouterr().err
    assert "--resume" in err and "--force" in err and "Traceback" not in err, err
    assert out.read_bytes() == before


def test_threadpoolctl_limits_are_applied_and_restored_when_installed(monkeypatch):
    # threadpoolctl (when installed) reaches BLAS builds the ctypes lookup does not
    # know; its documented API: ThreadpoolController().limit(limits, user_api) applies
    # at once, restore_original_limits() undoes it
    import types

    from bucksim import threads
    from bucksim.sweeps import execute as sweep_exec

    calls = []

    class Limiter:
        def restore_original_limits(self):
            calls.append(("restore",))

    class Controller:
        def limit(self, limits, user_api):
            calls.append(("set", limits, user_api))
            return Limiter()

    monkeypatch.setitem(sys.modules, "threadpoolctl",
                        types.SimpleNamespace(ThreadpoolController=Controller))
    monkeypatch.setattr(threads, "_controller", None)
    monkeypatch.setattr(threads, "_scan_key", None)     # the next entry scans again
    with sweep_exec.serial_blas():
        with sweep_exec.serial_blas():      # nested (Dask threads): applied once
            assert calls == [("set", 1, "blas")]
        assert calls == [("set", 1, "blas")]
    assert calls == [("set", 1, "blas"), ("restore",)]


def test_resume_onto_a_file_that_is_not_a_sweep_csv_leaves_it_untouched(tmp_path, capsys):
    # a resume used to cut the file at its last newline before reading its header
    from bucksim.cli.sweep import main
    scen = tmp_path / "rail.toml"
    scen.write_text(RAIL_TOML, encoding="utf-8")
    for name, content in (("run.csv", None), ("notes.csv", b"\n\nsome notes, no newline")):
        target = tmp_path / name
        if content is None:
            before = _stored_run(target)        # an HDF5 run under a .csv name
        else:
            target.write_bytes(content)
            before = content
        code = main([str(scen), "--vary", "load.resistance=1,2", "--workers", "1", "--quiet",
                     "--out", str(target), "--resume"])
        err = capsys.readouterr().err
        assert code == 1, err
        assert str(target) in err and "not a sweep's CSV table" in err, err
        assert target.read_bytes() == before


def test_a_loop_that_does_not_settle_is_the_rows_error(monkeypatch):
    # the settled run's own status and message (simulation.STATUS_LOOP_UNSETTLED)
    # reach the row, as for any run that does not complete
    from bucksim import simulation

    real = simulation.simulate_settled

    def unsettled(scenario, *args, **kwargs):
        run = real(scenario, *args, **kwargs)
        run.status = simulation.STATUS_LOOP_UNSETTLED
        run.message = "control loop did not settle: (test)"
        return run

    monkeypatch.setattr(simulation, "simulate_settled", unsettled)
    t = sweep(rail(), {"load.resistance": [2.0]}, workers=1, progress=False)
    err = t.column("error")[0]
    assert "control loop did not settle" in err and "status 3" in err, err
    assert "efficiency" not in t.columns    # no metrics from a run that did not settle
    assert np.isfinite(t.column("steady.max_floquet")[0])
