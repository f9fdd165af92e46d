"""The ``bucksim sweep`` verb: a grid or Monte Carlo sweep of a scenario file.

``register(subparsers)`` adds the verb to the ``bucksim`` command;
:func:`main` runs it on its own (``main(["rail.toml", "--vary", ...])``).
Nothing heavy is imported until the verb runs.
"""

from __future__ import annotations

import argparse
import sys

EXIT_OK, EXIT_USER, EXIT_INTERNAL, EXIT_INTERRUPTED = 0, 1, 2, 130

DESCRIPTION = """\
Run a scenario at many parameter values and tabulate each point's periodic
steady state: the summary metrics (losses, RMS currents, ripple, efficiency)
over run.summary_cycles periods, plus how the steady state was found.

Grid: each --vary gives a key and its values; the points are every
combination, the first --vary outermost. Monte Carlo: --monte-carlo N draws
the --tolerance keys around their scenario values (seeded, reproducible).
A point that fails keeps its row with the reason in the "error" column.

Rows are appended to --out as they finish; after an interruption, the same
command with --resume runs only the missing points."""

EPILOG = """\
values:
  KEY=START:STOP:N     N values from START to STOP (linear; --log KEY: geometric)
  KEY=V1,V2,...        the values listed
  Values are SI numbers or strings with prefix and unit, e.g. "1 uH:10 uH:5".
tolerances:
  KEY=10%  (uniform, +-10 %)   KEY=uniform:10%   KEY=normal:5% (sigma 5 %)

Example:
  bucksim sweep scenarios/core_rail_1v0.toml --vary load.resistance=0.05:1:20 \\
      --vary "inductor.inductance=100 nH:470 nH:5" --log load.resistance --out eff.csv
  bucksim sweep rail.toml --monte-carlo 500 --tolerance inductor.inductance=20% \\
      --tolerance output_capacitor.capacitance=normal:10% --seed 7 --out spread.h5"""


def _add_arguments(p):
    p.add_argument("file", help="scenario TOML file")
    p.add_argument("--vary", action="append", default=[], metavar="KEY=START:STOP:N",
                   help="scenario key and its values (repeatable; see below)")
    p.add_argument("--log", action="append", default=[], metavar="KEY",
                   help="space this --vary key's START:STOP:N values geometrically")
    p.add_argument("--monte-carlo", type=int, metavar="N", help="number of random draws")
    p.add_argument("--tolerance", action="append", default=[], metavar="KEY=10%",
                   help="relative spread of a key for --monte-carlo (repeatable)")
    # integers argparse refuses plainly, naming the option
    from bucksim.cli.common import int_option
    p.add_argument("--seed", type=int_option(0), default=0,
                   help="seed of the draws, an integer >= 0 (default 0)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local processes, or worker processes of --cluster local "
                        "(default: one per CPU; 1 runs in this process)")
    p.add_argument("--cluster", metavar="ADDRESS|local",
                   help="run on a Dask cluster: a scheduler address (tcp://host:8786) or "
                        "'local' to start one here (needs pip install bucksim[cluster])")
    p.add_argument("--batch", type=int, metavar="N",
                   help="points per task (default: about four tasks per worker, at most 256)")
    p.add_argument("--out", metavar="FILE",
                   help="table file: .csv, or .h5 (HDF5, with its CSV progress file "
                        "beside it); default: CSV on stdout at the end")
    p.add_argument("--resume", action="store_true",
                   help="continue the interrupted sweep in --out")
    p.add_argument("--force", action="store_true",
                   help="overwrite an existing --out table (otherwise refused)")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bar and no summary line")


def register(subparsers):
    """Add the ``sweep`` verb to the ``bucksim`` command's sub-parsers."""
    p = subparsers.add_parser("sweep", help="sweep parameters or Monte Carlo a scenario",
                              description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    _add_arguments(p)
    p.set_defaults(func=run_command)
    return p


def build_parser():
    """Stand-alone parser, the same as ``bucksim sweep``."""
    p = argparse.ArgumentParser(prog="bucksim sweep", description=DESCRIPTION, epilog=EPILOG,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    _add_arguments(p)
    p.set_defaults(func=run_command)
    return p


def main(argv=None) -> int:
    """Run ``bucksim sweep`` with ``argv`` (the arguments after ``sweep``)."""
    args = build_parser().parse_args(argv)
    try:
        return run_command(args)
    except Exception as exc:  # an internal error: say so, keep the traceback
        import traceback
        traceback.print_exc()
        print(f"bucksim: internal error: {exc!r} (please report it)", file=sys.stderr)
        return EXIT_INTERNAL


# ----------------------------------------------------------------------------- parsing

def _split_assignment(option, text):
    from bucksim.errors import SweepError

    key, sep, rhs = text.partition("=")
    key, rhs = key.strip(), rhs.strip()
    if not sep or not key or not rhs:
        example = ("inductor.inductance=1uH:10uH:5" if option == "--vary"
                   else "inductor.inductance=10%")
        raise SweepError(f"{option} {text!r}: expected KEY=VALUES, e.g. {example}")
    return key, rhs


def _number(scenario, key, text):
    """A value of ``key`` from text: a plain number, or a prefixed string checked
    against the key's unit by the scenario reader itself."""
    from bucksim.errors import ScenarioError
    from bucksim.model.scenario import replace_key
    from bucksim.sweeps.plan import SweepError, nominal_value

    try:
        return float(text)
    except ValueError:
        pass
    try:
        value = nominal_value(replace_key(scenario, key, text), key)
    except ScenarioError as exc:
        raise SweepError(f"--vary {key}: value {text!r} is not usable: {exc}") from None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SweepError(f"--vary {key}: value {text!r} is not a number")
    return float(value)


def _refuse_too_many_values(key, n):
    """Refuse an axis of ``n`` values before making it, when its points alone would
    not fit (:func:`bucksim.sweeps.plan.check_sweep_size`)."""
    from bucksim.sweeps.plan import check_sweep_size

    check_sweep_size([(key, n)], names=CLI_NAMES)


CLI_NAMES = ("--vary", "--monte-carlo")


def parse_vary(scenario, specs, log_keys=()):
    """``["KEY=START:STOP:N", "KEY=V1,V2"]`` -> ``{key: [values]}`` [SI base units]."""
    import numpy as np

    from bucksim.errors import SweepError

    out = {}
    for spec in specs:
        key, rhs = _split_assignment("--vary", spec)
        if key in out:
            raise SweepError(f"--vary {key}: given twice")
        parts = rhs.split(":")
        if len(parts) == 3:
            start, stop = (_number(scenario, key, t.strip()) for t in parts[:2])
            try:
                n = int(parts[2])
            except ValueError:
                n = 0
            if n < 1:
                raise SweepError(f"--vary {key}: N must be an integer >= 1 in START:STOP:N, "
                                 f"got {parts[2]!r}")
            _refuse_too_many_values(key, n)
            if key in log_keys:
                if start <= 0 or stop <= 0:
                    raise SweepError(f"--log {key}: START and STOP must be > 0 for geometric "
                                     f"spacing, got {start!r} and {stop!r}")
                values = np.geomspace(start, stop, n)
            else:
                values = np.linspace(start, stop, n)
            out[key] = [float(v) for v in values]
        elif len(parts) == 1:
            out[key] = [_number(scenario, key, t.strip()) for t in rhs.split(",")]
        else:
            raise SweepError(f"--vary {key}: expected START:STOP:N or V1,V2,..., got {rhs!r}")
    for key in log_keys:
        if key not in out:
            raise SweepError(f"--log {key}: not one of the --vary keys ({', '.join(out)})")
    return out


def _fraction(key, text):
    from bucksim.errors import SweepError

    t = text.strip()
    scale = 1.0
    if t.endswith("%"):
        t, scale = t[:-1].strip(), 0.01
    try:
        value = float(t) * scale
    except ValueError:
        raise SweepError(f"--tolerance {key}: expected a relative width such as 10% or 0.1, "
                         f"got {text!r}") from None
    if not value >= 0:
        raise SweepError(f"--tolerance {key}: width must be >= 0, got {text!r}")
    return value


def parse_tolerance(specs):
    """``["KEY=10%", "KEY=normal:5%"]`` -> ``{key: (distribution, relative width)}``."""
    from bucksim.errors import SweepError

    out = {}
    for spec in specs:
        key, rhs = _split_assignment("--tolerance", spec)
        kind, sep, width = rhs.partition(":")
        if not sep:
            kind, width = "uniform", rhs
        kind = kind.strip()
        if kind not in ("uniform", "normal"):
            raise SweepError(f"--tolerance {key}: distribution must be uniform or normal, "
                             f"got {kind!r}")
        out[key] = (kind, _fraction(key, width))
    return out


# ----------------------------------------------------------------------------- running

def run_command(args) -> int:
    """The ``sweep`` verb on parsed ``args``; returns the exit code."""
    from bucksim.errors import ScenarioError
    from bucksim.model.scenario import load_scenario
    from bucksim.sweeps.files import out_paths
    from bucksim.sweeps.plan import SweepError, check_sweep_size, sweep

    try:
        scenario = load_scenario(args.file)
        vary = parse_vary(scenario, args.vary, args.log)
        tolerance = parse_tolerance(args.tolerance) if args.tolerance else None
        check_sweep_size([(k, len(v)) for k, v in vary.items()], args.monte_carlo,
                         names=CLI_NAMES)
        if args.resume and args.force:
            raise SweepError("--resume and --force contradict each other: --resume keeps the "
                             "finished points in --out, --force overwrites them; give one")
        if args.resume and not args.out:
            raise SweepError("--resume: needs --out FILE (the table of the interrupted sweep)")
        if args.out and not args.resume and not args.force:
            for path in out_paths(args.out):
                if path is not None and path.exists():
                    raise SweepError(f"--out: {path} exists; pass --force to overwrite it, "
                                     "or --resume to complete the sweep it holds")
        if args.out and args.force and not args.resume:
            for path in out_paths(args.out):
                if path is not None and path.exists():
                    path.unlink()
        table = sweep(scenario, vary, monte_carlo=args.monte_carlo, tolerance=tolerance,
                      seed=args.seed, workers=args.workers, cluster=args.cluster,
                      out=args.out, resume=args.resume, batch=args.batch,
                      progress=False if args.quiet else None)
    except (ScenarioError, SweepError, ImportError, ConnectionError, FileNotFoundError,
            IsADirectoryError, PermissionError) as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return EXIT_USER
    except KeyboardInterrupt:
        where = f"; finished points are in {out_paths(args.out)[0]}, rerun with --resume" \
            if args.out else ""
        print(f"bucksim: interrupted{where}", file=sys.stderr)
        return EXIT_INTERRUPTED
    if not args.out:
        sys.stdout.write(table.csv_text())
        sys.stdout.flush()
    if not args.quiet:
        failed = table.failed
        dest = f" -> {args.out}" if args.out else ""
        print(f"bucksim sweep: {len(table)} points ({table.resumed} resumed), "
              f"{int(failed.sum())} failed, {table.elapsed:.1f} s{dest}", file=sys.stderr)
        if failed.any():
            i = int(failed.argmax())
            print(f"  first failure: point {int(table.column('point')[i])}: "
                  f"{table.column('error')[i]}", file=sys.stderr)
    return EXIT_OK
