"""Compare the ``bucksim run --json`` summaries of every bundled scenario at two revisions.

Usage::

    python tools/compare_json.py REV [--scenarios scenarios/*.toml]

Checks out ``REV`` into a temporary git worktree, runs ``python -m bucksim run
FILE --json`` for each bundled scenario with that tree first on ``sys.path``
and again with the working tree, and compares the two outputs byte for byte.
A restructure that changes no behaviour must print ``identical`` for every
scenario. Exit code 0 when all are identical, 1 otherwise.
"""

from __future__ import annotations

import argparse
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


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("rev",
                        help="git revision to compare against (e.g. the commit before a move)")
    parser.add_argument("--scenarios", nargs="*", type=Path,
                        default=[ROOT / "bucksim" / "data" / "default.toml",
                                 *sorted((ROOT / "scenarios").glob("*.toml"))])
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
                verdict = "identical" if a == b else "DIFFERENT"
                same &= a == b
                print(f"{verdict:<10} {sc.name}", flush=True)
        finally:
            subprocess.run(["git", "worktree", "remove", "--force", str(old)], cwd=ROOT,
                           check=False, capture_output=True)
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
