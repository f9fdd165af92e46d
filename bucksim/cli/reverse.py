"""``bucksim reverse``: where and how much the inductor current reverses at light load.

The verb keeps its name for this release; it reads as reverse current, not
reverse recovery or polarity.
"""

from __future__ import annotations

import os
import sys

from bucksim.cli.common import emit
from bucksim.errors import ScenarioError, SimulationError
from bucksim.model.scenario import load_scenario


def register(subparsers):
    """Add the ``reverse`` verb to the ``bucksim`` command."""
    p = subparsers.add_parser(
        "reverse", help="where and how much the inductor current reverses at light load",
        description="Evaluate a scenario in periodic steady state at several load levels: "
                    "minimum inductor current, share of the period with negative current, "
                    "charge and energy returned to the supply per cycle, and the load below "
                    "which the current reverses (forced PWM) or the stage enters DCM "
                    "(diode emulation, asynchronous), in closed form and simulated.",
        epilog="Example: bucksim reverse scenarios/core_rail_1v0.toml "
               "--load '2 ohm' '0.5 ohm' '0.2 ohm' --json")
    p.add_argument("file", help="scenario TOML file (open loop)")
    p.add_argument("--load", metavar="VALUE", nargs="+", action="extend",
                   help="load level(s): '0.3 A', '2 ohm', or a number in the scenario's "
                        "load unit (default: a spread around the boundary)")
    p.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    p.add_argument("--figure", metavar="PNG", help="also draw min iL vs load to this PNG")
    p.add_argument("--force", action="store_true", help="overwrite an existing --figure")
    p.set_defaults(func=_cmd_reverse)
    return p


def _cmd_reverse(args) -> int:
    from bucksim.studies.reverse import reverse_current  # loads the engine (numba)

    if args.figure and os.path.exists(args.figure) and not args.force:
        print(f"bucksim: error: {args.figure} exists; pass --force to overwrite it",
              file=sys.stderr)
        return 1
    try:
        scenario = load_scenario(args.file)
        result = reverse_current(scenario, load=args.load)
    except (ScenarioError, SimulationError, OSError) as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return 1
    emit(result, args.json)
    if args.figure:
        from bucksim.plotting import save_png  # matplotlib, only when drawing

        save_png(result.plot(), args.figure)
        print(f"bucksim: wrote {args.figure}", file=sys.stderr)
    return 0
