"""Cold start of the command line on a warm numba cache.

Times ``bucksim run`` end to end (new Python process each time) on the
bundled demo rail cut to 1000 cycles, and ``bucksim --help``.

Run:  python benchmarks/bench_cli.py
"""

from __future__ import annotations

import subprocess
import sys
import time


def timed(args, repeats=5):
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        subprocess.run([sys.executable, "-m", "bucksim", *args], check=True,
                       stdout=subprocess.DEVNULL)
        best = min(best, time.perf_counter() - t)
    return best


def main():
    timed(["run", "--cycles", "1000"], repeats=1)   # warm the numba cache
    run = timed(["run", "--cycles", "1000"])
    helptime = timed(["--help"])
    print("| command | wall time (best of 5) |\n| --- | --- |")
    print(f"| `bucksim run --cycles 1000` (demo rail, warm cache) | {run:.2f} s |")
    print(f"| `bucksim --help` | {helptime:.2f} s |")


if __name__ == "__main__":
    main()
