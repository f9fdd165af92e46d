"""The command line's start: ``bucksim --help``, ``import bucksim``, a warm ``bucksim run``
and the first run from an empty numba cache, with each kernel's compile time.

Every figure is the best of a few new Python processes started as ``python -m bucksim``
(not through a shell shim, which adds its own 0.1 to 0.3 s), with bytecode cached the way
an installed package has it (``PYTHONPYCACHEPREFIX`` in a temporary folder, so nothing
is written into the checkout). Two floors put the figures in proportion: a bare
interpreter, and the cheapest numba program (numpy, scipy.linalg, numba and one cached
trivial kernel), which any command that runs a kernel pays. The first run uses an empty
``NUMBA_CACHE_DIR`` in a temporary folder and records every compilation (``Dispatcher.
compile``, its own time without the kernels compiled inside it); a second run on that
cache checks that it is warm and prints no notice.

Run:  python benchmarks/bench_cli.py [--repeats 5] [--no-cold] [--tree PATH] [--against PATH]

``--tree`` measures another checkout (its ``bucksim`` package first on the path);
``--against`` a second one in turn with it, e.g. a ``git worktree`` of an earlier revision,
for a before/after comparison in one run (the empty-cache run is of ``--tree`` only).
"""

from __future__ import annotations

import argparse
import itertools
import json
import os
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = "scenarios/core_rail_1v0.toml"
NOTICE = "bucksim: compiling kernels once"
FLOOR = "floor: numpy + scipy.linalg + numba + one cached trivial kernel"

_TRIVIAL_KERNEL = """
from numba import njit
@njit(cache=True)
def f(x):
    return x + 1.0
"""


def environment(tree: Path, pyc: Path, numba_cache: Path | None = None) -> dict:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
    env.update(PYTHONPYCACHEPREFIX=str(pyc), PYTHONPATH=str(tree))
    env.pop("NUMBA_CACHE_DIR", None)
    if numba_cache is not None:
        env["NUMBA_CACHE_DIR"] = str(numba_cache)
    return env


def timed(cmd, env, cwd):
    """Wall time [s] of one run of ``cmd``, and its stderr."""
    t = time.perf_counter()
    out = subprocess.run(cmd, env=env, cwd=cwd, stdout=subprocess.DEVNULL,
                         stderr=subprocess.PIPE, text=True, check=True)
    return time.perf_counter() - t, out.stderr


def cases(tmp: Path) -> list[tuple[str, list[str]]]:
    py = sys.executable
    (tmp / "k").mkdir(exist_ok=True)
    (tmp / "k" / "trivial.py").write_text(_TRIVIAL_KERNEL)
    floor_cmd = [py, "-c", f"import sys; sys.path.insert(0, {str(tmp / 'k')!r}); "
                           "import scipy.linalg, trivial; trivial.f(1.0)"]
    bucksim = [py, "-m", "bucksim"]
    no_freeze = [py, "-c", "import sys; from bucksim.cli.main import main; "
                           "sys.exit(main(sys.argv[1:]))", "run", SCENARIO]
    return [("bare interpreter (`python -c pass`)", [py, "-c", "pass"]),
            (FLOOR, floor_cmd),
            ("`bucksim --help`", [*bucksim, "--help"]),
            ("`import bucksim`", [py, "-c", "import bucksim"]),
            ("`bucksim run` (bundled default scenario, 2000 periods)", [*bucksim, "run"]),
            (f"`bucksim run {SCENARIO}` (3000 periods)", [*bucksim, "run", SCENARIO]),
            ("the same run, called as `main(argv)` (exit collections not skipped)", no_freeze)]


def warm_figures(trees: list[Path], tmp: Path, repeats: int) -> dict[str, list[float]]:
    """Best of ``repeats`` for every case in every tree, the trees taking turns run by run
    (a load that comes and goes then weighs on all of them alike)."""
    envs = [environment(tree, tmp / f"pyc{i}") for i, tree in enumerate(trees)]
    rows = cases(tmp)
    for (_, cmd), (tree, env) in itertools.product(rows, zip(trees, envs, strict=True)):
        subprocess.run(cmd, env=env, cwd=tree, stdout=subprocess.DEVNULL,   # warm up
                       stderr=subprocess.DEVNULL, check=True)
    best = {name: [float("inf")] * len(trees) for name, _ in rows}
    for _ in range(repeats):
        for name, cmd in rows:
            for i, (tree, env) in enumerate(zip(trees, envs, strict=True)):
                seconds, err = timed(cmd, env, tree)
                if NOTICE in err:
                    raise SystemExit(f"a warm run printed the compile notice: {err!r}")
                best[name][i] = min(best[name][i], seconds)
    return best


def child_trace(argv) -> None:
    """In the child process: run the command, recording every numba compilation."""
    from numba.core import dispatcher

    original, log, stack = dispatcher.Dispatcher.compile, [], []

    def compile_(self, sig):
        before, t = len(self.overloads), time.perf_counter()
        stack.append(0.0)
        try:
            return original(self, sig)
        finally:
            spent, inner = time.perf_counter() - t, stack.pop()
            if stack:
                stack[-1] += spent
            func = self.py_func
            if len(self.overloads) > before and func.__module__.startswith("bucksim."):
                log.append({"kernel": f"{func.__module__[8:]}.{func.__qualname__}",
                            "own": spent - inner, "total": spent, "signature": str(sig)})

    dispatcher.Dispatcher.compile = compile_
    from bucksim.cli.main import main

    t = time.perf_counter()
    code = main(argv)
    print(json.dumps({"exit": code, "seconds": time.perf_counter() - t, "log": log}),
          file=sys.stderr)


def cold_figures(tree: Path, tmp: Path) -> dict:
    cache = tmp / "numba-cache"
    env = environment(tree, tmp / "pyc", cache)
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child-trace", "run", SCENARIO]
    t = time.perf_counter()
    out = subprocess.run(cmd, env=env, cwd=tree, stdout=subprocess.DEVNULL,
                         stderr=subprocess.PIPE, text=True, check=True)
    wall = time.perf_counter() - t
    lines = out.stderr.strip().splitlines()
    data = json.loads(lines[-1])
    data["wall"], data["notices"] = wall, [ln for ln in lines[:-1] if NOTICE in ln]
    data["warm_after"], err = timed([sys.executable, "-m", "bucksim", "run", SCENARIO],
                                    env, tree)
    data["warm_notice"] = NOTICE in err
    return data


def _short(sig: str) -> str:
    sig = re.sub(r"Array\((\w+), (\d), 'C', False, aligned=True\)", r"\1[\2d]", sig)
    sig = re.sub(r"array\((\w+), (\d)d, C\)", r"\1[\2d]", sig)
    sig = sig.replace("float64", "f8").replace("int64", "i8").replace("int32", "i4")
    return sig if len(sig) <= 70 else sig[:67] + "..."


def print_cold(data: dict) -> None:
    log = sorted(data["log"], key=lambda r: -r["own"])
    counts: dict[str, int] = {}
    for r in log:
        counts[r["kernel"]] = counts.get(r["kernel"], 0) + 1
    print(f"\nFirst run from an empty numba cache (`bucksim run {SCENARIO}`): "
          f"{data['wall']:.1f} s wall, {sum(r['own'] for r in log):.1f} s compiling "
          f"{len(log)} specialisations of {len(counts)} kernels; the notice: "
          f"{data['notices'] or 'none'}; the next run {data['warm_after']:.2f} s "
          f"({'a notice' if data['warm_notice'] else 'no notice'}).\n")
    print("| kernel | own compile time [s] | with the kernels it calls [s] | argument types |")
    print("| --- | --- | --- | --- |")
    for r in log:
        if r["own"] >= 0.2:
            n = counts[r["kernel"]]
            twice = f" (one of {n})" if n > 1 else ""
            print(f"| `{r['kernel']}`{twice} | {r['own']:.2f} | {r['total']:.2f} | "
                  f"`{_short(r['signature'])}` |")
    small = [r for r in log if r["own"] < 0.2]
    print(f"| {len(small)} smaller ones | {sum(r['own'] for r in small):.2f} | | |")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--no-cold", action="store_true", help="skip the empty-cache run")
    ap.add_argument("--tree", type=Path, default=ROOT, help="checkout to measure")
    ap.add_argument("--against", type=Path, help="a second checkout, measured in turn")
    ap.add_argument("--child-trace", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child_trace is not None:
        return child_trace(args.child_trace)
    trees = [t.resolve() for t in (args.tree, args.against) if t is not None]
    with tempfile.TemporaryDirectory(prefix="bench-cli-") as tmp:
        best = warm_figures(trees, Path(tmp), args.repeats)
        print(f"Command line on a warm numba cache, best of {args.repeats} (trees in turn):\n")
        heads = " | ".join(f"{t} [s] | / numba floor" for t in trees)
        print(f"| command | {heads} |\n|{' --- |' * (1 + 2 * len(trees))}")
        for name, seconds in best.items():
            cells = " | ".join(f"{s:.2f} | {s / f:.2f}"
                               for s, f in zip(seconds, best[FLOOR], strict=True))
            print(f"| {name} | {cells} |")
        if not args.no_cold:
            print_cold(cold_figures(trees[0], Path(tmp)))


if __name__ == "__main__":
    main()
