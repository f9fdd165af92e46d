"""Post-processing against the engine: summary() of a long run beside its simulate.

Simulates the bundled demo rail (forced PWM, node capacitance: six segments a
period) for 2,000,000 periods from rest, then times ``Run.summary()`` on it;
the ratio is the figure (issue target: at most 0.2). Then the same for a closed-loop
rail behind an input filter (``scenarios/input_filter_undamped.toml``: a type III
loop, the filter's states, a load step; every segment a length of its own, so no
two share their moment blocks).

Run:  python benchmarks/bench_summary.py [--cycles N]
"""

from __future__ import annotations

import argparse
import os
import time

import bucksim
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH, load_scenario, replace_key

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=2_000_000)
    a = ap.parse_args(argv)
    sc = replace_key(load_scenario(DEFAULT_SCENARIO_PATH), "run.cycles", a.cycles)
    bucksim.simulate(replace_key(sc, "run.cycles", 100)).summary()   # compile or load
    t = time.perf_counter()
    run = bucksim.simulate(sc)
    t_sim = time.perf_counter() - t
    t = time.perf_counter()
    summary = run.summary()
    t_sum = time.perf_counter() - t
    print("| measurement | figure |\n| --- | --- |")
    print(f"| `simulate`, {a.cycles} periods ({len(run.segments)} segments) | {t_sim:.2f} s |")
    print(f"| `summary()` of that run (transients over the whole run) | {t_sum:.2f} s |")
    print(f"| ratio summary / simulate | {t_sum / t_sim:.2f} |")
    print(f"| start-up: overshoot {summary.transients[0].overshoot_percent:.2f} %, "
          f"settles in {summary.transients[0].settling_time:.4g} s | |")
    closed_loop()


def closed_loop():
    """summary() / simulate of the closed-loop rail behind its input filter."""
    sc = load_scenario(os.path.join(REPO, "scenarios", "input_filter_undamped.toml"))
    bucksim.simulate(replace_key(sc, "run.duration", "20 us")).summary()   # compile or load
    t = time.perf_counter()
    run = bucksim.simulate(sc)
    t_sim = time.perf_counter() - t
    t = time.perf_counter()
    run.summary()
    t_sum = time.perf_counter() - t
    print(f"| `simulate`, closed loop behind an input filter ({len(run.segments)} segments, "
          f"{run.stage.n} states) | {t_sim:.2f} s |")
    print(f"| `summary()` of that run | {t_sum:.2f} s |")
    print(f"| ratio summary / simulate, closed loop | {t_sum / t_sim:.2f} |")


if __name__ == "__main__":
    main()
