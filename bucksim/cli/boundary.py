"""``bucksim boundary``: where the inductor current reverses, or DCM begins, at light load.

The verb was called ``reverse``, which reads as reverse recovery or reverse
polarity as easily as reverse current; ``reverse`` still works for this release
as a documented alias (with a note on stderr) and goes in the next.
"""

from __future__ import annotations

import os
import sys

from bucksim.cli.common import emit, print_json
from bucksim.errors import ScenarioError, SimulationError
from bucksim.model.scenario import load_scenario


def register(subparsers):
    """Add the ``boundary`` verb (alias ``reverse``) to the ``bucksim`` command."""
    p = subparsers.add_parser(
        "boundary", aliases=["reverse"],
        help="the light-load boundary: where the inductor current reverses (forced PWM) or "
             "DCM begins, and how much charge goes back",
        description="Evaluate a scenario in periodic steady state at several load levels: "
                    "minimum inductor current, share of the period with negative current, "
                    "charge and energy returned to the supply per cycle, and the load below "
                    "which the current reverses (forced PWM) or the stage enters DCM "
                    "(diode emulation, asynchronous), in closed form and simulated.",
        epilog="Example: bucksim boundary scenarios/core_rail_1v0.toml "
               "--load '2 ohm' '0.5 ohm' '0.2 ohm' --json ('reverse' is the old name of "
               "this verb, kept for this release)")
    p.add_argument("file", help="scenario TOML file (open loop)")
    p.add_argument("--load", metavar="VALUE", nargs="+", action="extend",
                   help="load level(s): '0.3 A', '2 ohm', or a number in the scenario's "
                        "load unit (default: a spread around the boundary)")
    p.add_argument("--pfm-peak-current", metavar="A",
                   help="also say up to which load PFM with pulses of this peak current "
                        "runs below the clock (diode emulation or asynchronous; the "
                        "threshold is the scenario's own output voltage)")
    p.add_argument("--skip-min-on-time", metavar="S",
                   help="also say up to which load pulse skipping with pulses of this "
                        "on-time skips clock edges (same stages and threshold)")
    p.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    p.add_argument("--figure", metavar="PNG", help="also draw min iL vs load to this PNG")
    p.add_argument("--force", action="store_true", help="overwrite an existing --figure")
    p.set_defaults(func=_cmd_boundary)
    return p


def _cmd_boundary(args) -> int:
    from bucksim.studies.reverse import reverse_current  # loads the engine (numba)

    if getattr(args, "verb", None) == "reverse":
        print("bucksim: note: 'bucksim reverse' is now 'bucksim boundary'; the old name "
              "goes in the next release", file=sys.stderr)
    if args.figure and os.path.exists(args.figure) and not args.force:
        print(f"bucksim: error: {args.figure} exists; pass --force to overwrite it",
              file=sys.stderr)
        return 1
    try:
        scenario = load_scenario(args.file)
        result = reverse_current(scenario, load=args.load)
        modes = _light_starts(scenario, args.pfm_peak_current, args.skip_min_on_time)
    except (ScenarioError, SimulationError, OSError) as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return 1
    if not modes:
        emit(result, args.json)
    elif args.json:
        print_json({**result.to_dict(), **modes})
    else:   # the light-load lines join the report, above its closing caution
        *body, caution = result.table().split("\n")
        lines = [_pfm_text(modes["pfm"])] if "pfm" in modes else []
        lines += [_skip_text(modes["pulse_skipping"])] if "pulse_skipping" in modes else []
        print("\n".join(body + lines + ["", caution]))
    if args.figure:
        from bucksim.plotting import save_png  # matplotlib, only when drawing

        save_png(result.plot(), args.figure)
        print(f"bucksim: wrote {args.figure}", file=sys.stderr)
    return 0


def _light_starts(scenario, peak, min_on) -> dict:
    """Where PFM hands over to the clock (:func:`bucksim.studies.light_rows.pfm_range`)
    and where pulse skipping stops skipping (:func:`~bucksim.studies.light_rows.skip_range`),
    for the options given: ``{"pfm": ..., "pulse_skipping": ...}``."""
    from bucksim.model.units import parse_quantity
    from bucksim.studies.light_modes import check_light_strategy, light_threshold
    from bucksim.studies.light_rows import pfm_range, skip_range

    out = {}
    if peak is not None:
        check_light_strategy(scenario, "PFM")
        ipk = parse_quantity(peak, "A", "--pfm-peak-current")
        out["pfm"] = {"peak_current": ipk,
                      **pfm_range(scenario, ipk, light_threshold(scenario, None))}
    if min_on is not None:
        check_light_strategy(scenario, "pulse skipping")
        t_min = parse_quantity(min_on, "s", "--skip-min-on-time")
        out["pulse_skipping"] = {"min_on_time": t_min,
                                 **skip_range(scenario, t_min, light_threshold(scenario, None))}
    return out


def _skip_text(skip) -> str:
    from bucksim.model.units import format_si
    line = (f"pulse skipping with {format_si(skip['min_on_time'], 's')} pulses skips clock "
            f"edges up to Io = {format_si(skip['closed_form'], 'A')} (closed form 0.5 Ip "
            "(t_min + L Ip / Vo) fs, lossless charge balance)")
    if skip["exact"] is None:
        return line + f"; on the exact stage: {skip['note']}"
    return line + f"; on the exact stage up to {format_si(skip['exact'], 'A')}"


def _pfm_text(pfm) -> str:
    from bucksim.model.units import format_si
    line = (f"PFM with {format_si(pfm['peak_current'], 'A')} pulses runs below the clock up "
            f"to Io = {format_si(pfm['closed_form'], 'A')} (closed form 0.5 Ipk (ton + toff) "
            "fs, lossless charge balance)")
    if pfm["frequency"] is None:
        return line + f"; the exact stage has no PFM state there: {pfm['note']}"
    return line + f"; the exact stage pulses at {format_si(pfm['frequency'], 'Hz')} there"
