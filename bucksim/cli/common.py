"""What every verb of the ``bucksim`` command shares: the parser class, option types,
exit codes, JSON output, the progress bar and the summary printout.

Data go to stdout, messages to stderr. Exit codes: 0 success, 1 user error
(bad scenario or option, missing or unreadable file, a run that diverged or
whose loop did not settle, a refusal), 2 internal error (a bug: please report
it).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from importlib import resources

from bucksim.engine.status import STATUS_DIVERGED as STATUS_DIVERGED
from bucksim.errors import SimulationError

EXIT_OK, EXIT_USER, EXIT_INTERNAL = 0, 1, 2


class ArgumentParser(argparse.ArgumentParser):
    """argparse without prefix matching, and with usage errors as user errors.

    Prefix matching would read ``--out`` as ``--output-voltage`` where both
    exist, so every option must be spelt in full. A usage error prints the
    usage and exits with :data:`EXIT_USER` (argparse's own code, 2, is this
    tool's internal-error code). Sub-parsers are made of this class too.
    """

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("allow_abbrev", False)
        super().__init__(*args, **kwargs)

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


class UserError(Exception):
    """A refusal of the command's arguments (exit 1, no traceback)."""


class progress_bar:
    """A tqdm bar on stderr for long runs; silent off a terminal or with --quiet."""

    def __init__(self, total, quiet):
        self.total, self.quiet, self.bar = total, quiet, None

    def __enter__(self):
        if self.quiet or self.total < 100_000:
            return None
        from tqdm import tqdm
        self.bar = bar = tqdm(total=self.total, unit="cycle", unit_scale=True, disable=None,
                              file=sys.stderr, leave=False)

        def update(done, total):
            bar.update(done - bar.n)
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


def refuse_overwrite(path, force):
    if os.path.exists(path) and not force:
        raise FileExistsError(f"{path} exists; pass --force to overwrite it")


def non_finite(data, key=""):
    """Dotted keys of the non-finite numbers in a nested dict/list."""
    if isinstance(data, dict):
        return [k for name, v in data.items() for k in non_finite(v, f"{key}.{name}".lstrip("."))]
    if isinstance(data, (list, tuple)):
        return [k for i, v in enumerate(data) for k in non_finite(v, f"{key}[{i}]")]
    if isinstance(data, float) and not math.isfinite(data):
        return [key]
    return []


def print_summary(summary, scenario, n_segments, path, args):
    data = summary.to_dict()
    bad = non_finite(data)
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


