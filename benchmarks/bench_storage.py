"""Run files: peak memory and time of streaming a long run to HDF5 vs. keeping it.

Each case runs in its own Python process, so its peak resident memory
(``resource.getrusage(...).ru_maxrss``) is its own:

1. baseline: imports (h5py too) and a 10-cycle warm-up only (kernels loaded);
2. in memory: ``simulate`` (all segments kept), then ``Run.save``;
3. streamed: ``simulate_to_file`` (segments appended chunk by chunk);
4. streamed with ``compression="gzip"`` (archives);

then ``open_run`` of the streamed file with its summary (the whole table in
memory) and ``summarize_file`` of it (block by block, what ``bucksim run
--stream`` and ``bucksim report`` do). The scenario is a 12 V -> 3.3 V
forced-PWM rail with dead time (invented demo values), 1e6 cycles by default.

Run:  python benchmarks/bench_storage.py [--cycles N] [--no-gzip] [--json out.json]

Prints a Markdown table for the README.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def rail(cycles: int):
    """A 12 V -> 3.3 V, 500 kHz forced-PWM rail (invented demo values)."""
    from bucksim.model.parts import (Capacitor, Control, Diode, Inductor, Load,  # noqa: I001
                               Mosfet, RunSettings, Scenario, Supply, Switching)
    return Scenario(
        "bench storage", Supply(12.0), Switching(500e3, "forced-pwm", (20e-9, 25e-9)),
        Inductor(4.7e-6, 0.012), Capacitor(47e-6, 0.004),
        Mosfet(0.012, Diode(0.75, 0.02, section="high_side.body_diode"), section="high_side"),
        Mosfet(0.006, Diode(0.75, 0.02, section="low_side.body_diode"), section="low_side"),
        Load(0.66), Control(duty=0.285), RunSettings(cycles=cycles))


def peak_rss_mb() -> float:
    """Peak resident memory of this process [MB] (Linux reports KiB, macOS bytes)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / 2**20 if sys.platform == "darwin" else peak / 2**10


def child(case: str, cycles: int, path: str) -> dict:
    """One measured case, inside a fresh process; returns its figures."""
    import h5py  # noqa: F401  (every case pays for the HDF5 library, baseline too)

    from bucksim.analysis.stored import summarize_file
    from bucksim.simulation import simulate, simulate_to_file
    from bucksim.waveforms import open_run

    simulate(rail(10))  # load or compile the kernels outside the timed part
    out = {"case": case}
    t = time.perf_counter()
    if case == "memory":
        run = simulate(rail(cycles))
        out["simulate_s"] = time.perf_counter() - t
        t = time.perf_counter()
        report = run.save(path)
        out["write_s"] = time.perf_counter() - t
    elif case.startswith("stream"):
        report = simulate_to_file(rail(cycles), path,
                                  compression="gzip" if case == "stream-gzip" else None)
        out["write_s"] = time.perf_counter() - t
    elif case == "open":
        run = open_run(path)
        run.summary()
        out["open_s"] = time.perf_counter() - t
        report = {"n_segments": len(run.segments)}
    elif case == "summarize":
        summarize_file(path)
        out["open_s"] = time.perf_counter() - t
        report = {"n_segments": 0}
    else:
        report = {"n_segments": 0}
    out["total_s"] = time.perf_counter() - t
    out["n_segments"] = report["n_segments"]
    out["peak_rss_mb"] = peak_rss_mb()
    if case in ("memory", "stream", "stream-gzip"):
        out["file_mb"] = os.path.getsize(path) / 2**20
    return out


def measure(case: str, cycles: int, path: str) -> dict:
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        [REPO] + ([os.environ["PYTHONPATH"]] if os.environ.get("PYTHONPATH") else [])))
    proc = subprocess.run([sys.executable, __file__, "--child", case, "--cycles", str(cycles),
                           "--path", path], env=env, capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        raise SystemExit(f"case {case!r} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def fmt(value, spec=".2f"):
    return "-" if value is None else format(value, spec)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=1_000_000)
    ap.add_argument("--no-gzip", action="store_true", help="skip the (slow) gzip case")
    ap.add_argument("--json", help="also write the figures to this file")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--path", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child, args.cycles, args.path)))
        return 0

    folder = tempfile.mkdtemp(prefix="storage_bench_")
    try:
        files = {"memory": "saved.h5", "stream": "streamed.h5", "stream-gzip": "packed.h5",
                 "open": "streamed.h5", "summarize": "streamed.h5", "baseline": "none.h5"}
        cases = ["baseline", "memory", "stream", "open", "summarize"] + ([] if args.no_gzip
                                                            else ["stream-gzip"])
        rows = [measure(c, args.cycles, os.path.join(folder, files[c])) for c in cases]
    finally:
        shutil.rmtree(folder, ignore_errors=True)

    base = rows[0]["peak_rss_mb"]
    labels = {"baseline": "baseline (imports, warm-up)", "memory": "in memory + Run.save",
              "stream": "simulate_to_file", "stream-gzip": "simulate_to_file, gzip",
              "open": "open_run + summary (streamed file)",
              "summarize": "summarize_file (streamed file, in blocks)"}
    n_seg = max(r["n_segments"] for r in rows)
    print(f"Run files, {args.cycles:.3g} forced-PWM cycles ({n_seg:,} segments); "
          f"{platform.processor() or platform.machine()}, Python {platform.python_version()}\n")
    print("| case | simulate [s] | write [s] | open [s] | peak RSS [MB] | above baseline [MB] "
          "| file [MB] |")
    print("| --- | ---: | ---: | ---: | ---: | ---: | ---: |")
    for r in rows:
        print(f"| {labels[r['case']]} | {fmt(r.get('simulate_s'))} | {fmt(r.get('write_s'))} "
              f"| {fmt(r.get('open_s'))} | {r['peak_rss_mb']:.0f} "
              f"| {r['peak_rss_mb'] - base:.0f} | {fmt(r.get('file_mb'), '.1f')} |")
    print("\nwrite [s] for simulate_to_file includes the simulation (they overlap).")
    if args.json:
        with open(args.json, "w") as f:
            json.dump({"cycles": args.cycles, "rows": rows}, f, indent=2)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
