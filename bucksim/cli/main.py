"""The ``bucksim`` command.

Each verb lives in its own module of :mod:`bucksim.cli` and registers its
sub-parser here. Data go to stdout, messages to
stderr. Exit codes: 0 success, 1 user error (bad scenario or option, missing
or unreadable file, a run that diverged or whose loop did not settle, a
refusal), 2 internal error (a bug: please report it).
"""

from __future__ import annotations

import argparse
import gc
import os
import sys
import traceback
import warnings

from bucksim.cli import boundary, cache, compare, crosscheck, plot, run, sweep
from bucksim.cli.common import EXIT_INTERNAL, EXIT_OK, EXIT_USER, ArgumentParser, UserError
from bucksim.errors import ScenarioError, SimulationError, StorageError
from bucksim.version import package_version

#: The verbs that run numba kernels (the others, and ``--help``, never import numba).
ENGINE_VERBS = frozenset({"run", "report", "crosscheck", "sweep", "boundary", "reverse",
                          "compare", "plot"})


def build_parser() -> argparse.ArgumentParser:
    p = ArgumentParser(
        prog="bucksim",
        description="Exact cycle-by-cycle simulation of buck converter power stages.",
        epilog="Example: bucksim run scenarios/core_rail_1v0.toml --json")
    p.add_argument("--version", action="version", version=f"bucksim {package_version()}")
    sub = p.add_subparsers(dest="verb", metavar="VERB")
    for verb in (run, crosscheck, cache, sweep, boundary, compare, plot):
        verb.register(sub)
    return p


class _PlainWarnings:
    """Show each warning once, as one plain line on stderr (no source line)."""

    def __init__(self):
        self.seen = set()

    def __call__(self, message, category, filename, lineno, file=None, line=None):
        text = str(message)
        if text not in self.seen:
            self.seen.add(text)
            print(f"bucksim: warning: {text}", file=sys.stderr)


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USER
    with warnings.catch_warnings():
        warnings.simplefilter("always", UserWarning)
        warnings.showwarning = _PlainWarnings()
        code = _dispatch(args)
    if argv is None:
        # Called as the command, so the process ends next. Its last garbage collections
        # would walk every object numba and scipy created (0.5 s of a 2 s run, measured in
        # benchmarks/bench_cli.py); frozen objects are skipped. Files are closed already.
        gc.freeze()
    return code


def _dispatch(args) -> int:
    try:
        with cache.compile_notice(args.verb in ENGINE_VERBS):
            return args.func(args)
    except (ScenarioError, StorageError, SimulationError, UserError) as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return EXIT_USER
    except MemoryError as exc:
        detail = f" ({exc})" if str(exc) else ""
        print(f"bucksim: error: out of memory{detail}: the job needs more memory than this "
              "machine has; shorten the run (run.cycles, run.duration) or stream it "
              "(bucksim run --stream --out RUN.h5)", file=sys.stderr)
        return EXIT_USER
    except BrokenPipeError:  # `bucksim run ... | head`: the reader left, not an error
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK
    except OSError as exc:  # missing file, folder, permissions, full disk: say which
        print(f"bucksim: error: {_os_message(exc)}", file=sys.stderr)
        return EXIT_USER
    except KeyboardInterrupt:
        print("bucksim: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal error: say so, keep the traceback
        traceback.print_exc()
        print(f"bucksim: internal error: {exc!r} (please report it)", file=sys.stderr)
        return EXIT_INTERNAL


def _os_message(exc: OSError) -> str:
    if exc.filename is not None and exc.strerror:
        return f"{exc.filename}: {exc.strerror}"
    return str(exc)


if __name__ == "__main__":
    sys.exit(main())
