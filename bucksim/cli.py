"""The ``bucksim`` command.

Heavy imports (numba, scipy, h5py, matplotlib) happen inside the verb that
needs them, so ``bucksim --help`` stays fast. Data go to stdout, messages to
stderr. Exit codes: 0 success, 1 user error (bad scenario, missing file),
2 internal error.
"""

from __future__ import annotations

import argparse
import json
import sys
from importlib import resources

EXIT_OK, EXIT_USER, EXIT_INTERNAL = 0, 1, 2

DEFAULT_SCENARIO = "default.toml"


def default_scenario_path() -> str:
    """Path of the bundled default scenario (run by ``bucksim run`` with no file)."""
    return str(resources.files("bucksim") / "data" / DEFAULT_SCENARIO)


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version("bucksim")
    except PackageNotFoundError:
        return "0.0.0+source"


def _cmd_run(args) -> int:
    import bucksim

    path = args.file or default_scenario_path()
    scenario = bucksim.load_scenario(path)
    if args.cycles is not None:
        from dataclasses import replace
        scenario = replace(scenario, run=replace(scenario.run, cycles=args.cycles, duration=None))
    if args.out:
        _refuse_overwrite(args.out, args.force)
    compression = "gzip" if args.archive else None
    with _progress_bar(scenario.n_cycles, args.quiet) as progress:
        if args.stream:
            if not args.out:
                raise FileNotFoundError("--stream needs --out RUN.h5 (the segments go there)")
            from .storage import open_run, simulate_to_file
            simulate_to_file(scenario, args.out, compression, progress=progress)
            run = open_run(args.out)
        else:
            run = bucksim.simulate(scenario, progress=progress)
    if not run.success:
        print(f"bucksim: {path}: {run.message}", file=sys.stderr)
    if args.out and not args.stream:
        run.save(args.out, compression=compression)
    if args.out:
        print(f"bucksim: wrote {args.out}", file=sys.stderr)
    _print_summary(run, path, args)
    return EXIT_OK if run.success else EXIT_USER


class _progress_bar:
    """A tqdm bar on stderr for long runs; silent off a terminal or with --quiet."""

    def __init__(self, total, quiet):
        self.total, self.quiet, self.bar = total, quiet, None

    def __enter__(self):
        if self.quiet or self.total < 100_000:
            return None
        from tqdm import tqdm
        self.bar = tqdm(total=self.total, unit="cycle", unit_scale=True, disable=None,
                        file=sys.stderr, leave=False)

        def update(done, total):
            self.bar.update(done - self.bar.n)
        return update

    def __exit__(self, *exc):
        if self.bar is not None:
            self.bar.close()
        return False


def emit(result, as_json: bool):
    """Print a result object: JSON of ``to_dict()`` or its readable ``table()``."""
    if as_json:
        json.dump(result.to_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(result.table())


def _refuse_overwrite(path, force):
    import os
    if os.path.exists(path) and not force:
        raise FileExistsError(f"{path} exists; pass --force to overwrite it")


def _print_summary(run, path, args):
    summary = run.summary(cycles=args.summary_cycles)
    if args.json:
        json.dump(summary.to_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sc = run.scenario
        print(f"{sc.title}  ({path})")
        print(f"{sc.switching.strategy}, {sc.n_cycles} cycles simulated, "
              f"{len(run.segments)} segments\n")
        print(summary.table())


def _cmd_report(args) -> int:
    from .storage import open_run
    run = open_run(args.file)
    _print_summary(run, args.file, args)
    return EXIT_OK


def _cmd_crosscheck(args) -> int:
    import bucksim
    from .crosscheck import crosscheck

    path = args.file or default_scenario_path()
    scenario = bucksim.load_scenario(path)
    result = crosscheck(scenario, cycles=args.summary_cycles)
    if args.json:
        json.dump(result.to_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(f"{scenario.title}  ({path})\n")
        print(result.table())
    return EXIT_OK


def _cmd_cache(args) -> int:
    import pathlib

    root = pathlib.Path(__file__).parent
    removed = 0
    for d in root.rglob("__pycache__"):
        for f in d.glob("*.nb[ic]"):
            f.unlink()
            removed += 1
    print(f"removed {removed} compiled-kernel cache files under {root}", file=sys.stderr)
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="bucksim",
        description="Exact cycle-by-cycle simulation of buck converter power stages.",
        epilog="Example: bucksim run scenarios/core_rail_1v0.toml --json")
    p.add_argument("--version", action="version", version=f"bucksim {_version()}")
    sub = p.add_subparsers(dest="verb", metavar="VERB")

    r = sub.add_parser("run", help="simulate a scenario and print its summary",
                       description="Simulate a scenario file (default: the bundled demo rail) "
                                   "and print the summary of its last switching periods.",
                       epilog="Example: bucksim run scenarios/aux_rail_5v_async.toml --json")
    r.add_argument("file", nargs="?", help="scenario TOML file (default: bundled demo)")
    r.add_argument("--json", action="store_true", help="print the summary as JSON on stdout")
    r.add_argument("--cycles", type=int, help="override run.cycles")
    r.add_argument("--summary-cycles", type=int, help="override run.summary_cycles")
    r.add_argument("--out", metavar="RUN.h5", help="store the waveforms (HDF5)")
    r.add_argument("--archive", action="store_true", help="compress the stored file (gzip)")
    r.add_argument("--force", action="store_true", help="overwrite an existing --out file")
    r.add_argument("--stream", action="store_true",
                   help="write segments to --out as they come (bounded memory for long runs)")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.set_defaults(func=_cmd_run)

    rep = sub.add_parser("report", help="summarise a stored run",
                         description="Print the summary of a run stored with `bucksim run --out`.",
                         epilog="Example: bucksim report rail.h5 --json")
    rep.add_argument("file", help="stored run (HDF5)")
    rep.add_argument("--json", action="store_true", help="print the summary as JSON on stdout")
    rep.add_argument("--summary-cycles", type=int, help="window width in periods")
    rep.set_defaults(func=_cmd_report)

    cc = sub.add_parser("crosscheck", help="closed-form loss budget vs waveform integrals",
                        description="Compare the textbook loss budget of a scenario with the "
                                    "exact waveform integrals, item by item.",
                        epilog="Example: bucksim crosscheck scenarios/core_rail_1v0.toml")
    cc.add_argument("file", nargs="?", help="scenario TOML file (default: bundled demo)")
    cc.add_argument("--json", action="store_true", help="print the comparison as JSON")
    cc.add_argument("--summary-cycles", type=int, help="window width in periods")
    cc.set_defaults(func=_cmd_crosscheck)

    c = sub.add_parser("cache", help="manage the compiled-kernel cache",
                       description="Remove numba's cached compiled kernels (after editing the "
                                   "engine's helpers in another module).",
                       epilog="Example: bucksim cache clear")
    c.add_argument("action", choices=["clear"])
    c.set_defaults(func=_cmd_cache)

    from .compare import register as register_compare
    from .plots import register as register_plot
    from .reverse import register as register_reverse
    from .sweep_cli import register as register_sweep
    register_sweep(sub)
    register_reverse(sub)
    register_compare(sub)
    register_plot(sub)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USER
    from .errors import ScenarioError
    try:
        return args.func(args)
    except ScenarioError as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return EXIT_USER
    except (FileNotFoundError, FileExistsError, IsADirectoryError, PermissionError) as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return EXIT_USER
    except BrokenPipeError:  # `bucksim run ... | head`: the reader left, not an error
        import os
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK
    except KeyboardInterrupt:
        print("bucksim: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal error: say so, keep the traceback available
        import traceback
        traceback.print_exc()
        print(f"bucksim: internal error: {exc!r} (please report it)", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
