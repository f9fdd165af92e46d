"""``bucksim crosscheck``: the closed-form loss budget beside the waveform integrals."""

from __future__ import annotations

from bucksim.cli.common import EXIT_OK, default_scenario_path, int_option, print_json
from bucksim.model.scenario import load_scenario


def register(sub):
    cc = sub.add_parser("crosscheck", help="closed-form loss budget vs waveform integrals",
                        description="Compare the textbook loss budget of a scenario (DCM "
                                    "closed forms in DCM) with the exact waveform integrals, "
                                    "item by item: each row says what the closed form "
                                    "neglects and the tolerance that covers it; a row "
                                    "beyond it is marked '!' (JSON: 'flagged').",
                        epilog="Example: bucksim crosscheck scenarios/core_rail_1v0.toml")
    cc.add_argument("file", nargs="?", help="scenario TOML file (default: bundled demo)")
    cc.add_argument("--json", action="store_true", help="print the comparison as JSON")
    cc.add_argument("--summary-cycles", type=int_option(1), help="window width in periods")
    cc.set_defaults(func=_cmd_crosscheck)


def _cmd_crosscheck(args) -> int:
    from bucksim.analysis.crosscheck import crosscheck  # loads the engine (numba)

    path = args.file or default_scenario_path()
    scenario = load_scenario(path)
    result = crosscheck(scenario, cycles=args.summary_cycles)
    if args.json:
        print_json(result.to_dict())
    else:
        print(f"{scenario.title}  ({path})\n")
        print(result.table())
    return EXIT_OK
