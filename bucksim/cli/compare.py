"""``bucksim compare``: the three switching strategies across load, with an optional load
profile."""

from __future__ import annotations

import os
import sys

import numpy as np

from bucksim.cli.common import emit
from bucksim.errors import ScenarioError, SimulationError
from bucksim.model.parts import Diode
from bucksim.model.units import parse_quantity
from bucksim.studies.levels import LoadLevel, load_kind, parse_level

#: Most load levels ``--loads START:STOP:N`` may ask for.
MAX_LOAD_POINTS = 1000


def parse_sweep(text: str, scenario, log: bool = False) -> list:
    """``"START:STOP:N"`` -> N load levels, evenly (or, with ``log``, geometrically) spaced."""
    parts = text.split(":")
    if len(parts) != 3:
        raise ScenarioError("--loads", "must be START:STOP:N, e.g. '0.1 A:15 A:12'", text)
    kind = load_kind(scenario)
    a = parse_level(parts[0].strip(), kind, "--loads START")
    b = parse_level(parts[1].strip(), kind, "--loads STOP")
    if a.key != b.key:
        raise ScenarioError("--loads", "START and STOP must both be currents or both "
                            "resistances", text)
    try:
        n = int(parts[2])
    except ValueError:
        n = 0
    if not 1 <= n <= MAX_LOAD_POINTS:
        raise ScenarioError("--loads N", f"must be an integer from 1 to {MAX_LOAD_POINTS} "
                            "(each level costs a steady-state solution per strategy; "
                            "split a larger sweep)", parts[2].strip())
    if log and (a.value <= 0 or b.value <= 0):
        raise ScenarioError("--loads", "must be > 0 at both ends for --log spacing", text)
    values = np.geomspace(a.value, b.value, n) if log else np.linspace(a.value, b.value, n)
    return [LoadLevel(a.key, float(v)) for v in values]


def parse_diode(text: str) -> Diode:
    """``"vf=0.45,r=0.02,qrr=0"`` (units allowed: ``vf=0.45V,r=20mohm``; also ``cj``,
    ``tau``, ``qrr_current`` as in a scenario's diode table) -> Diode."""
    units = {"vf": "V", "r": "ohm", "qrr": "C", "cj": "F", "tau": "s", "qrr_current": "A"}
    values = {}
    for part in filter(None, (p.strip() for p in text.split(","))):
        name, sep, value = part.partition("=")
        name = name.strip()
        if not sep or name not in units:
            raise ScenarioError(f"--diode {name or part}", "must be vf=..., r=..., qrr=..., "
                                "cj=..., tau=..., qrr_current=... (V, ohm, C, F, s, A)", part)
        values[name] = parse_quantity(value.strip(), units[name], f"--diode {name}")
    if "vf" not in values:
        raise ScenarioError("--diode vf", "is required (forward drop in V)", text)
    return Diode(values.pop("vf"), section="--diode", **values)


def register(subparsers):
    """Add the ``compare`` verb to the ``bucksim`` command."""
    p = subparsers.add_parser(
        "compare", help="asynchronous vs forced PWM vs diode emulation across load",
        description="Run the scenario's parts as an asynchronous stage, in forced PWM and "
                    "with diode emulation at each load level, in steady state with the duty "
                    "trimmed to hold the output voltage; print efficiency and losses, and "
                    "with a load profile the weighted efficiency, energy lost per day and "
                    "the best strategy.",
        epilog="Example: bucksim compare scenarios/core_rail_1v0.toml --loads '0.2 A:20 A:12' "
               "--log --profile rail_profile.toml --diode vf=0.45,r=0.02,qrr=0 "
               "--csv out.csv --figure eff.png")
    p.add_argument("file", help="scenario TOML file (open loop, low-side MOSFET)")
    p.add_argument("--loads", required=True, metavar="START:STOP:N",
                   help="sweep: N load levels from START to STOP ('0.1 A:15 A:12', "
                        "'10 ohm:0.1 ohm:8', or numbers in the scenario's load unit)")
    p.add_argument("--log", action="store_true",
                   help="space the loads geometrically and plot them on a log axis")
    p.add_argument("--profile", metavar="FILE",
                   help="load profile TOML: [[level]] load = \"0.3 A\", share = 0.7 "
                        "(default: [load] profile in the scenario, if any)")
    p.add_argument("--diode", metavar="vf=..,r=..,qrr=..,cj=..,tau=..,qrr_current=..",
                   help="freewheel diode of the asynchronous stage (default: the low-side "
                        "body diode)")
    p.add_argument("--fixed-duty", action="store_true",
                   help="keep the scenario's duty instead of holding its output voltage "
                        "(refused together with --output-voltage: a fixed duty holds no "
                        "voltage)")
    p.add_argument("--output-voltage", metavar="V",
                   help="output voltage to hold by trimming the duty (default: the "
                        "scenario's own)")
    pfm = p.add_mutually_exclusive_group()
    pfm.add_argument("--pfm-peak-current", metavar="A",
                     help="add a PFM row: pulses to this peak current on the diode-emulation "
                          "stage, idle until the output falls to the held voltage")
    pfm.add_argument("--pfm-on-time", metavar="S",
                     help="add a PFM row with pulses of this fixed on-time instead")
    p.add_argument("--skip-min-on-time", metavar="S",
                   help="add a pulse-skipping row: pulses of this on-time at the clock edges "
                        "where the output is below the held voltage (diode-emulation stage)")
    p.add_argument("--csv", metavar="OUT.csv", help="write every row to a CSV file")
    p.add_argument("--figure", metavar="PNG", help="draw efficiency vs load")
    p.add_argument("--breakdown", metavar="PNG",
                   help="draw the loss breakdown at the lightest, middle and heaviest load")
    p.add_argument("--force", action="store_true", help="overwrite existing output files")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.set_defaults(func=_cmd_compare)
    return p


def _cmd_compare(args) -> int:
    from bucksim.studies.compare import compare
    from bucksim.studies.profile import load_scenario_and_profile, read_profile

    def refuse(message):
        print(f"bucksim: error: {message}", file=sys.stderr)
        return 1

    if args.fixed_duty and args.output_voltage is not None:
        return refuse("--fixed-duty and --output-voltage contradict each other: a fixed duty "
                      "cannot hold an output voltage; give one of them")
    outputs = [(name, path) for name, path in (("--csv", args.csv), ("--figure", args.figure),
                                                ("--breakdown", args.breakdown)) if path]
    for i, (name, path) in enumerate(outputs):
        for other, other_path in outputs[i + 1:]:
            if os.path.realpath(path) == os.path.realpath(other_path):
                return refuse(f"{name} and {other} name the same file {path}: one output "
                              "would overwrite the other; give each its own file")
    for _, out in outputs:
        if os.path.exists(out) and not args.force:
            return refuse(f"{out} exists; pass --force to overwrite it")
    try:
        scenario, profile = load_scenario_and_profile(args.file)
        if args.profile:
            if profile is not None:
                print(f"bucksim: using {args.profile} instead of the scenario's load profile",
                      file=sys.stderr)
            profile = read_profile(args.profile, scenario)
        levels = parse_sweep(args.loads, scenario, args.log)
        diode = parse_diode(args.diode) if args.diode else None
        pfm = ({"peak_current": args.pfm_peak_current} if args.pfm_peak_current else
               {"on_time": args.pfm_on_time} if args.pfm_on_time else None)
        result = compare(scenario, levels, diode=diode, profile=profile,
                         output_voltage=args.output_voltage, regulate=not args.fixed_duty,
                         log=args.log, pfm=pfm,
                         pulse_skipping=({"min_on_time": args.skip_min_on_time}
                                         if args.skip_min_on_time else None))
    except (ScenarioError, SimulationError) as exc:
        return refuse(exc)
    except OSError as exc:
        return refuse(f"{exc.filename}: {exc.strerror}" if exc.filename and exc.strerror
                      else exc)
    failed = result.failures
    for row in failed:
        print(f"bucksim: point failed: {row.error}", file=sys.stderr)
    n_points = sum(len(rows) for rows in result.rows.values())
    if len([r for rows in result.rows.values() for r in rows if not r.ok]) == n_points:
        return refuse(f"{args.file}: no point of the comparison could be evaluated")
    emit(result, args.json)
    if args.csv:
        result.to_csv(args.csv)
        print(f"bucksim: wrote {args.csv}", file=sys.stderr)
    from bucksim.plotting import save_png  # matplotlib, only when drawing

    if args.figure:
        save_png(result.efficiency_figure(), args.figure)
        print(f"bucksim: wrote {args.figure}", file=sys.stderr)
    if args.breakdown:
        n = len(result.levels)
        picks = sorted({0, n // 2, n - 1})
        save_png(result.loss_breakdown_figure([result.levels[k] for k in picks]),
                 args.breakdown)
        print(f"bucksim: wrote {args.breakdown}", file=sys.stderr)
    if failed:
        print(f"bucksim: {len(failed)} point(s) failed (listed above); their rows hold "
              "the reason and no figures", file=sys.stderr)
    return 0
