"""Compare the ``bucksim run --json`` summaries of every bundled scenario at two revisions.

Usage::

    python tools/compare_json.py REV [--scenarios scenarios/*.toml]

Checks out ``REV`` into a temporary git worktree, runs ``python -m bucksim run
FILE --json`` for each bundled scenario with that tree first on ``sys.path``
and again with the working tree, and compares the two outputs byte for byte.
A restructure that changes no behaviour must print ``identical`` for every
scenario. Exit code 0 when all are identical, 1 otherwise.

``--rtol R`` compares the parsed JSON instead: numbers within ``R`` relative
(``1e-300`` absolute), keys that only one side has are listed, not counted.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def summary_json(tree: Path, scenario: Path) -> str:
    env = dict(os.environ, PYTHONPATH=str(tree), OPENBLAS_NUM_THREADS="1",
               OMP_NUM_THREADS="1", MPLBACKEND="Agg")
    out = subprocess.run([sys.executable, "-m", "bucksim", "run", str(scenario), "--json",
                          "--quiet"], cwd=tree, env=env, capture_output=True, text=True,
                         check=False, timeout=1800)
    return f"exit {out.returncode}\n{out.stdout}"


def numeric_diff(a, b, rtol, path=""):
    """Lines naming every number of ``a`` and ``b`` that differ by more than ``rtol``."""
    if isinstance(a, dict) and isinstance(b, dict):
        out = [f"  only on one side: {path}.{k}" for k in sorted(set(a) ^ set(b))]
        for k in a.keys() & b.keys():
            out += numeric_diff(a[k], b[k], rtol, f"{path}.{k}")
        return out
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        return [line for i, (x, y) in enumerate(zip(a, b, strict=True))
                for line in numeric_diff(x, y, rtol, f"{path}[{i}]")]
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        if a == b or math.isclose(a, b, rel_tol=rtol, abs_tol=1e-300):
            return []
        return [f"  DIFFERS {path}: {a!r} -> {b!r}"]
    return [] if a == b else [f"  DIFFERS {path}: {a!r} -> {b!r}"]


def verdict_of(a: str, b: str, rtol: float | None) -> tuple[bool, list[str]]:
    if rtol is None:
        return a == b, []
    code_a, _, text_a = a.partition("\n")
    code_b, _, text_b = b.partition("\n")
    if code_a != code_b:
        return False, [f"  {code_a} -> {code_b}"]
    try:
        lines = numeric_diff(json.loads(text_a), json.loads(text_b), rtol)
    except json.JSONDecodeError:
        return a == b, []
    return not any("DIFFERS" in line for line in lines), lines


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("rev",
                        help="git revision to compare against (e.g. the commit before a move)")
    parser.add_argument("--scenarios", nargs="*", type=Path,
                        default=[ROOT / "bucksim" / "data" / "default.toml",
                                 *sorted((ROOT / "scenarios").glob("*.toml"))])
    parser.add_argument("--rtol", type=float, default=None,
                        help="compare numbers within this relative tolerance")
    args = parser.parse_args(argv)
    same = True
    with tempfile.TemporaryDirectory(prefix="bucksim-rev-") as tmp:
        old = Path(tmp) / "tree"
        subprocess.run(["git", "worktree", "add", "--detach", str(old), args.rev], cwd=ROOT,
                       check=True, capture_output=True)
        try:
            for sc in args.scenarios:
                a = summary_json(old, sc.resolve())
                b = summary_json(ROOT, sc.resolve())
                ok, lines = verdict_of(a, b, args.rtol)
                verdict = ("identical" if a == b else "within") if ok else "DIFFERENT"
                same &= ok
                print(f"{verdict:<10} {sc.name}", flush=True)
                for line in lines:
                    print(line)
        finally:
            subprocess.run(["git", "worktree", "remove", "--force", str(old)], cwd=ROOT,
                           check=False, capture_output=True)
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
