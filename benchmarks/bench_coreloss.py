"""Core loss (iGSE) of a long, ringing window against the run that made it, in one process.

The case is the hardest the bundled scenarios hold for the core-loss quadrature: the
radio rail with its controller supply (``scenarios/radio_rail_3v3_controller_supply.toml``)
pulse skipping at 10 mA with 80 ns pulses, where the node rings after every pulse and
``diL/dt`` has tens of zeros a pulse. The window is the last ``--cycles`` clock periods
of a closed-loop run of twice that many. Printed: the time of ``simulate``, of the
summary and of its core loss alone, best of ``--repeat``, with the quadrature's size
(pieces, zeros of ``diL/dt``, quadrature nodes).

Run:  python benchmarks/bench_coreloss.py [--cycles N] [--repeat K]
"""

from __future__ import annotations

import argparse
import os
import time

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=2500)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    import numpy as np

    import bucksim
    from bucksim.analysis import coreloss_nodes as nodes
    from bucksim.analysis.coreloss import _decayed_end, core_loss
    from bucksim.analysis.windows import window_pieces
    from bucksim.simulation import simulate
    from bucksim.studies.pulse_skipping import pulse_skipping_scenario

    sc = bucksim.load_scenario(os.path.join(REPO, "scenarios",
                                            "radio_rail_3v3_controller_supply.toml"))
    ps = pulse_skipping_scenario(sc, 80e-9, 3.3, cycles=2 * args.cycles)
    x0 = np.array([0.0, 3.3, 3.3])
    simulate(ps, x0=x0)                                   # compile and warm up
    best = {"simulate": np.inf, "summary": np.inf, "core loss": np.inf}
    for _ in range(args.repeat):
        t = time.perf_counter()
        run = simulate(ps, x0=x0)
        best["simulate"] = min(best["simulate"], time.perf_counter() - t)
        t0 = (2 * args.cycles - args.cycles) * ps.period
        t = time.perf_counter()
        run.summary(cycles=args.cycles)
        best["summary"] = min(best["summary"], time.perf_counter() - t)
        idx, ta, tb = window_pieces(run, t0)[:3]
        t = time.perf_counter()
        core_loss(run, idx, ta, tb)
        best["core loss"] = min(best["core loss"], time.perf_counter() - t)
    slope = nodes.Slope(run)
    alpha = sc.inductor.core.alpha
    tc = _decayed_end(run, idx, ta, tb, alpha)
    seg, a, b, kind, _, zeros = nodes.intervals(slope, run, idx, ta, tc, alpha)
    n_nodes = nodes.adaptive_nodes(slope, seg, a, b, kind, alpha)[0].shape[0]
    print(f"window: {args.cycles} clock periods, {idx.shape[0]} pieces, {zeros.shape[0]} "
          f"zeros of diL/dt, {n_nodes} quadrature nodes")
    print("| step | time [s] | ratio to simulate |")
    print("| --- | --- | --- |")
    for k, v in best.items():
        print(f"| {k} | {v:.3f} | {v / best['simulate']:.2f} |")


if __name__ == "__main__":
    main()
