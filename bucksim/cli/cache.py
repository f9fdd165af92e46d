"""``bucksim cache clear`` (remove numba's cached compiled kernels) and the one-line notice
the command prints when numba has to compile them (an empty or stale cache)."""

from __future__ import annotations

import contextlib
import hashlib
import os
import pathlib
import sys

from bucksim.cli.common import EXIT_OK

#: Compile time [s] of the kernels a ``bucksim run`` calls from Python (each with the
#: kernels it calls), from an empty cache on the project's 2-core machine
#: (``python benchmarks/bench_cli.py``): the notice adds those not loaded yet.
COMPILE_SECONDS = {
    "bucksim.engine.bounds.system_bounds": 2.0,
    "bucksim.engine.bounds.current_row_norms": 0.6,
    "bucksim.engine.bounds.third_norms": 0.8,
    "bucksim.engine.bounds.row_norms": 0.3,
    "bucksim.engine.cycles.run_cycles": 65.0,
    "bucksim.engine.kernels.evaluate": 4.0,
    "bucksim.analysis.pruned._candidates": 2.0,
    "bucksim.analysis.drift_integrals.drift_integrals": 2.0,
}


def register(sub):
    c = sub.add_parser("cache", help="manage the compiled-kernel cache",
                       description="Remove numba's cached compiled kernels (after editing the "
                                   "engine's helpers in another module).",
                       epilog="Example: bucksim cache clear")
    c.add_argument("action", choices=["clear"])
    c.set_defaults(func=_cmd_cache)


def _cmd_cache(args) -> int:
    root = pathlib.Path(__file__).resolve().parents[1]   # the bucksim package
    removed = sum(_remove_cached(d) for d in root.rglob("__pycache__"))
    where = str(root)
    user_dir = os.environ.get("NUMBA_CACHE_DIR")
    if user_dir:
        removed += sum(_remove_cached(d) for d in user_cache_folders(user_dir))
        where += f" and {user_dir} (NUMBA_CACHE_DIR)"
    print(f"removed {removed} compiled-kernel cache files under {where}", file=sys.stderr)
    return EXIT_OK


def user_cache_folders(user_dir) -> list[pathlib.Path]:
    """The folders numba keeps bucksim's kernels in under ``NUMBA_CACHE_DIR``: one per
    source folder, named ``<folder name>_<sha1 of its absolute path>``."""
    package = pathlib.Path(os.path.abspath(__file__)).parents[1]   # as numba spells it
    folders = [package, *(p for p in package.rglob("*")
                          if p.is_dir() and p.name != "__pycache__")]
    return [pathlib.Path(user_dir) / f"{d.name}_{hashlib.sha1(str(d).encode()).hexdigest()}"
            for d in folders]


def _remove_cached(folder: pathlib.Path) -> int:
    files = list(folder.glob("*.nb[ic]")) if folder.is_dir() else []
    for f in files:
        f.unlink()
    return len(files)


def compile_estimate() -> int:
    """Seconds the kernels of :data:`COMPILE_SECONDS` not loaded in this process yet take
    to compile (rounded: a notice, not a promise)."""
    total = 0.0
    for name, seconds in COMPILE_SECONDS.items():
        module, _, func = name.rpartition(".")
        kernel = getattr(sys.modules.get(module), func, None)
        if not getattr(kernel, "overloads", None):
            total += seconds
    return max(1, round(total / 5) * 5) if total >= 10 else max(1, round(total))


@contextlib.contextmanager
def compile_notice(active: bool = True):
    """While active, say once on stderr that the kernels are being compiled.

    numba broadcasts a ``numba:compile`` event only when it compiles (a kernel missing
    from its cache, or cached from a changed source file); loading from the cache is
    silent. So the notice costs nothing on a warm run and needs no look at the cache.
    Only bucksim's own kernels count (numba compiles some of its own helpers on use).
    """
    if not active:
        yield
        return
    from numba.core import event  # numba: only for the verbs that run the engine

    class Notice(event.Listener):
        said = False

        def on_start(self, ev):
            func = getattr((ev.data or {}).get("dispatcher"), "py_func", None)
            if self.said or not getattr(func, "__module__", "").startswith("bucksim."):
                return
            self.said = True
            print(f"bucksim: compiling kernels once, about {compile_estimate()} s",
                  file=sys.stderr, flush=True)

        def on_end(self, ev):
            pass

    with event.install_listener("numba:compile", Notice()):
        yield
