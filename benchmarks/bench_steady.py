"""Periodic steady state: shooting-Newton against brute-force settling.

For output filters of increasing Q (open loop, forced PWM and diode
emulation), counts the switching periods each method simulates to reach the
periodic state to 1e-9 relative, and the Newton updates taken.

Run:  python benchmarks/bench_steady.py
"""

from __future__ import annotations

import dataclasses
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import bucksim
from bucksim.steady.solve import steady_state
from tests.references.stage_solver import buck_scenario


def brute_force_cycles(sc, target, tol=1e-9, chunk=500, limit=2_000_000):
    """Periods simulated from the averaged start until within tol of the periodic state."""
    x = np.array([0.0, 0.0])
    done = 0
    while done < limit:
        run = bucksim.simulate(dataclasses.replace(sc, run=dataclasses.replace(
            sc.run, cycles=chunk, initial_current=x[0], initial_voltage=x[1])))
        # states at every cycle start in this chunk
        k = np.arange(chunk) * sc.period
        xs = run.at(k)
        scale = np.maximum(np.abs(target), 1e-12)
        ok = np.nonzero(np.all(np.abs(xs - target) <= tol * scale, axis=1))[0]
        if ok.shape[0]:
            return done + int(ok[0])
        x = run.x_end
        done += chunk
    return limit


def main():
    print("| filter Q | strategy | shooting periods | Newton updates | brute-force periods "
          "| ratio | shooting time |\n| --- | --- | --- | --- | --- | --- | --- |")
    for R, strategy in ((5.0, "forced-pwm"), (10.0, "forced-pwm"), (20.0, "diode-emulation")):
        L, C = 4.7e-6, 100e-6
        sc = buck_scenario(vin=12.0, duty=0.3, frequency=500e3, inductance=L, capacitance=C,
                           dcr=1e-3, esr=1e-3, rds_hs=2e-3, rds_ls=2e-3, resistance=R,
                           strategy=strategy, dead_time=(10e-9, 10e-9), cycles=1)
        q = R / np.sqrt(L / C)   # parallel-loaded LC (circuit theory)
        t = time.perf_counter()
        ss = steady_state(sc)
        dt = time.perf_counter() - t
        n_brute = brute_force_cycles(sc, ss.x)
        print(f"| {q:.1f} | {strategy} | {ss.cycles} | {ss.iterations} | {n_brute} | "
              f"{n_brute / ss.cycles:.0f}x | {1e3 * dt:.1f} ms |")


if __name__ == "__main__":
    main()
