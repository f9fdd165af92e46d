"""The ``bucksim`` command.

Heavy imports (numba, scipy, h5py, matplotlib) happen inside the verb that
needs them, so ``bucksim --help`` stays fast. Data go to stdout, messages to
stderr. Exit codes: 0 success, 1 user error (bad scenario or option, missing
or unreadable file, a run that diverged or whose loop did not settle, a
refusal), 2 internal error (a bug: please report it).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from importlib import resources

EXIT_OK, EXIT_USER, EXIT_INTERNAL = 0, 1, 2

#: Engine status of a run whose state diverged (see :class:`bucksim.engine.EngineResult`).
STATUS_DIVERGED = 1


class ArgumentParser(argparse.ArgumentParser):
    """argparse without prefix matching, and with usage errors as user errors.

    Prefix matching would read ``--out`` as ``--output-voltage`` where both
    exist, so every option must be spelt in full. A usage error prints the
    usage and exits with :data:`EXIT_USER` (argparse's own code, 2, is this
    tool's internal-error code). Sub-parsers are made of this class too.
    """

    def __init__(self, *args, allow_abbrev=False, **kwargs):
        super().__init__(*args, allow_abbrev=allow_abbrev, **kwargs)

    def error(self, message):
        self.print_usage(sys.stderr)
        self.exit(EXIT_USER, f"{self.prog}: error: {message}\n")


def int_option(low: int, high: int | None = None):
    """An argparse ``type`` for an integer in ``[low, high]``; the refusal names the range
    (argparse adds the option's name)."""
    def parse(text):
        try:
            value = int(text, 10)
        except (TypeError, ValueError):
            value = None
        if value is None or value < low or (high is not None and value > high):
            span = f">= {low}" if high is None else f"from {low} to {high}"
            raise argparse.ArgumentTypeError(f"must be an integer {span}, got {text!r}")
        return value
    parse.__name__ = "integer"
    return parse


def json_ready(value):
    """``value`` with every non-finite float replaced by None (JSON has no NaN)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if hasattr(value, "dtype") and getattr(value, "shape", None) == ():  # numpy scalar
        return json_ready(value.item())
    return value


def print_json(data):
    """Strict JSON on stdout: NaN and infinities become null."""
    json.dump(json_ready(data), sys.stdout, indent=2, allow_nan=False)
    sys.stdout.write("\n")

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
    if args.stream and not args.out:
        raise _UserError("--stream needs --out RUN.h5 (the segments go there)")
    if args.out:
        _refuse_overwrite(args.out, args.force)
    compression = "gzip" if args.archive else None
    with _progress_bar(scenario.n_cycles, args.quiet) as progress:
        if args.stream:
            from .storage import simulate_to_file
            info = simulate_to_file(scenario, args.out, compression, progress=progress)
            status, message, n_segments = info["status"], info["message"], info["n_segments"]
        else:
            run = bucksim.simulate(scenario, progress=progress)
            status, message, n_segments = run.status, run.message, len(run.segments)
    if status != 0:
        print(f"bucksim: {path}: {message}", file=sys.stderr)
    if args.out and not args.stream:
        run.save(args.out, compression=compression)
    if args.out:
        print(f"bucksim: wrote {args.out}", file=sys.stderr)
    if status == STATUS_DIVERGED:
        kept = f" (its segments up to the divergence are in {args.out})" if args.out else ""
        print(f"bucksim: error: {path}: the run diverged; it has no summary{kept}",
              file=sys.stderr)
        return EXIT_USER
    if args.stream:
        from .stored import summarize_file
        summary = summarize_file(args.out, args.summary_cycles)
    else:
        summary = run.summary(cycles=args.summary_cycles)
    _print_summary(summary, scenario, n_segments, path, args)
    return EXIT_OK if status == 0 else EXIT_USER


class _UserError(Exception):
    """A refusal of the command's arguments (exit 1, no traceback)."""


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
        print_json(result.to_dict())
    else:
        print(result.table())


def _refuse_overwrite(path, force):
    import os
    if os.path.exists(path) and not force:
        raise FileExistsError(f"{path} exists; pass --force to overwrite it")


def _non_finite(data, key=""):
    """Dotted keys of the non-finite numbers in a nested dict/list."""
    if isinstance(data, dict):
        return [k for name, v in data.items() for k in _non_finite(v, f"{key}.{name}".lstrip("."))]
    if isinstance(data, (list, tuple)):
        return [k for i, v in enumerate(data) for k in _non_finite(v, f"{key}[{i}]")]
    if isinstance(data, float) and not math.isfinite(data):
        return [key]
    return []


def _print_summary(summary, scenario, n_segments, path, args):
    from .errors import SimulationError

    data = summary.to_dict()
    bad = _non_finite(data)
    if bad:  # a diverged run must never print as a clean-looking table
        raise SimulationError(f"{path}: the summary holds non-finite values ("
                              + ", ".join(bad[:4]) + (", ..." if len(bad) > 4 else "")
                              + "): the run diverged or its states are out of range")
    if args.json:
        print_json(data)
    else:
        print(f"{scenario.title}  ({path})")
        print(f"{scenario.switching.strategy}, {scenario.n_cycles} cycles simulated, "
              f"{n_segments} segments\n")
        print(summary.table())


def _cmd_report(args) -> int:
    from .stored import read_run_info, summarize_file

    info = read_run_info(args.file)
    if info.status != 0:
        print(f"bucksim: {args.file}: {info.message}", file=sys.stderr)
    if info.status == STATUS_DIVERGED:
        print(f"bucksim: error: {args.file}: the stored run diverged; it has no summary",
              file=sys.stderr)
        return EXIT_USER
    summary = summarize_file(args.file, args.summary_cycles)
    _print_summary(summary, info.scenario, info.n_segments, args.file, args)
    return EXIT_OK if info.status == 0 else EXIT_USER


def _cmd_crosscheck(args) -> int:
    import bucksim

    from .crosscheck import crosscheck

    path = args.file or default_scenario_path()
    scenario = bucksim.load_scenario(path)
    result = crosscheck(scenario, cycles=args.summary_cycles)
    if args.json:
        print_json(result.to_dict())
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
    p = ArgumentParser(
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
    r.add_argument("--cycles", type=int_option(1), help="override run.cycles")
    r.add_argument("--summary-cycles", type=int_option(1), help="override run.summary_cycles")
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
    rep.add_argument("--summary-cycles", type=int_option(1), help="window width in periods")
    rep.set_defaults(func=_cmd_report)

    cc = sub.add_parser("crosscheck", help="closed-form loss budget vs waveform integrals",
                        description="Compare the textbook loss budget of a scenario with the "
                                    "exact waveform integrals, item by item.",
                        epilog="Example: bucksim crosscheck scenarios/core_rail_1v0.toml")
    cc.add_argument("file", nargs="?", help="scenario TOML file (default: bundled demo)")
    cc.add_argument("--json", action="store_true", help="print the comparison as JSON")
    cc.add_argument("--summary-cycles", type=int_option(1), help="window width in periods")
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
    import warnings

    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USER
    with warnings.catch_warnings():
        warnings.simplefilter("always", UserWarning)
        warnings.showwarning = _PlainWarnings()
        return _dispatch(args)


def _dispatch(args) -> int:
    from .errors import ScenarioError, SimulationError, StorageError
    try:
        return args.func(args)
    except (ScenarioError, StorageError, SimulationError, _UserError) as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return EXIT_USER
    except MemoryError as exc:
        detail = f" ({exc})" if str(exc) else ""
        print(f"bucksim: error: out of memory{detail}: the job needs more memory than this "
              "machine has; shorten the run (run.cycles, run.duration) or stream it "
              "(bucksim run --stream --out RUN.h5)", file=sys.stderr)
        return EXIT_USER
    except BrokenPipeError:  # `bucksim run ... | head`: the reader left, not an error
        import os
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK
    except OSError as exc:  # missing file, folder, permissions, full disk: say which
        print(f"bucksim: error: {_os_message(exc)}", file=sys.stderr)
        return EXIT_USER
    except KeyboardInterrupt:
        print("bucksim: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - an internal error: say so, keep the traceback
        import traceback
        traceback.print_exc()
        print(f"bucksim: internal error: {exc!r} (please report it)", file=sys.stderr)
        return EXIT_INTERNAL


def _os_message(exc: OSError) -> str:
    if exc.filename is not None and exc.strerror:
        return f"{exc.filename}: {exc.strerror}"
    return str(exc)


if __name__ == "__main__":
    sys.exit(main())
