"""``bucksim run`` and ``bucksim report``: simulate a scenario (or read a stored run) and
print its summary."""

from __future__ import annotations

import dataclasses
import sys

from bucksim.cli.common import (
    EXIT_OK,
    EXIT_USER,
    STATUS_DIVERGED,
    UserError,
    default_scenario_path,
    int_option,
    print_summary,
    progress_bar,
    refuse_overwrite,
)
from bucksim.model.scenario import load_scenario

# The engine and the stored-run readers load numba, scipy and h5py: each verb
# imports them when it runs, so `bucksim --help` stays fast.


def register(sub):
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



def _cmd_run(args) -> int:
    from bucksim.analysis.stored import summarize_file
    from bucksim.simulation import simulate, simulate_to_file

    path = args.file or default_scenario_path()
    scenario = load_scenario(path)
    if args.cycles is not None:
        rep = dataclasses.replace
        scenario = rep(scenario, run=rep(scenario.run, cycles=args.cycles, duration=None))
    if args.stream and not args.out:
        raise UserError("--stream needs --out RUN.h5 (the segments go there)")
    if args.out:
        refuse_overwrite(args.out, args.force)
    compression = "gzip" if args.archive else None
    with progress_bar(scenario.n_cycles, args.quiet) as progress:
        if args.stream:
            info = simulate_to_file(scenario, args.out, compression, progress=progress)
            status, message, n_segments = info["status"], info["message"], info["n_segments"]
        else:
            run = simulate(scenario, progress=progress)
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
        summary = summarize_file(args.out, args.summary_cycles)
    else:
        summary = run.summary(cycles=args.summary_cycles)
    print_summary(summary, scenario, n_segments, path, args)
    _warn_filter(scenario, summary, path)
    return EXIT_OK if status == 0 else EXIT_USER


def _warn_filter(scenario, summary, path):
    """Warn on stderr when a closed loop's input filter has a thin margin
    (:func:`bucksim.analysis.input_filter.filter_interaction`)."""
    if scenario.control.mode == "open-loop" or scenario.input_capacitor is None:
        return
    from bucksim.analysis.input_filter import filter_interaction

    # the power the converter takes (output and losses): the window may not hold whole
    # periods of a ringing filter, whose stored energy then moves the terminal power
    check = filter_interaction(scenario, summary.power.output + summary.power.loss)
    if check is not None and check.thin:
        print(f"bucksim: warning: {path}: {check.message()}", file=sys.stderr)


def _cmd_report(args) -> int:
    from bucksim.analysis.stored import read_run_info, summarize_file

    info = read_run_info(args.file)
    if info.status != 0:
        print(f"bucksim: {args.file}: {info.message}", file=sys.stderr)
    if info.status == STATUS_DIVERGED:
        print(f"bucksim: error: {args.file}: the stored run diverged; it has no summary",
              file=sys.stderr)
        return EXIT_USER
    summary = summarize_file(args.file, args.summary_cycles)
    print_summary(summary, info.scenario, info.n_segments, args.file, args)
    return EXIT_OK if info.status == 0 else EXIT_USER
