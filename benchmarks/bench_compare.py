"""``compare`` of 8 loads x 3 strategies on the accelerator-card rail, warm, in one process.

``scenarios/core_rail_1v0.toml`` (node capacitance, charge-control recovery; the duty
trimmed at each point to hold the scenario's own output voltage). A first compare at
two other loads compiles the kernels and warms the imports; the timed compare then
asks for loads it has not seen (no table or point from the warm-up is reused), best
of ``--repeat`` processes' worth of distinct load sets.

Run:  python benchmarks/bench_compare.py [--repeat K]
"""

from __future__ import annotations

import argparse
import os
import time

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    import numpy as np

    import bucksim
    from bucksim.studies.compare import compare

    sc = bucksim.load_scenario(os.path.join(REPO, "scenarios", "core_rail_1v0.toml"))
    compare(sc, ["7 A", "9 A"])                       # compile, import, warm
    best = np.inf
    for k in range(args.repeat):
        loads = [f"{v:.6g} A" for v in np.geomspace(1.0 + 0.01 * k, 20.0 - 0.01 * k, 8)]
        t = time.perf_counter()
        cmp = compare(sc, loads)
        best = min(best, time.perf_counter() - t)
        assert not cmp.failures, cmp.failures
    print(f"compare, 8 loads x 3 strategies, warm: {best:.2f} s (best of {args.repeat})")


if __name__ == "__main__":
    main()
