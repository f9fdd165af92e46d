"""``bucksim cache clear``: remove numba's cached compiled kernels."""

from __future__ import annotations

import pathlib
import sys

from bucksim.cli.common import EXIT_OK


def register(sub):
    c = sub.add_parser("cache", help="manage the compiled-kernel cache",
                       description="Remove numba's cached compiled kernels (after editing the "
                                   "engine's helpers in another module).",
                       epilog="Example: bucksim cache clear")
    c.add_argument("action", choices=["clear"])
    c.set_defaults(func=_cmd_cache)



def _cmd_cache(args) -> int:
    root = pathlib.Path(__file__).resolve().parents[1]   # the bucksim package
    removed = 0
    for d in root.rglob("__pycache__"):
        for f in d.glob("*.nb[ic]"):
            f.unlink()
            removed += 1
    print(f"removed {removed} compiled-kernel cache files under {root}", file=sys.stderr)
    return EXIT_OK
