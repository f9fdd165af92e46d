"""``bucksim plot``: draw the waveforms of a stored run to a PNG."""

from __future__ import annotations

import math
import os
import sys

from bucksim.cli.common import int_option
from bucksim.errors import ScenarioError, StorageError
from bucksim.model.units import parse_quantity


def parse_window(text: str):
    """``"START:STOP"`` [s] (prefixes allowed: ``"1 ms:1.02 ms"``) -> ``(start, stop)``."""
    parts = text.split(":")
    if len(parts) != 2:
        raise ScenarioError("--window", "must be START:STOP in s, e.g. '1 ms:1.02 ms'", text)
    start, stop = (parse_quantity(p.strip(), "s", "--window") for p in parts)
    if not (math.isfinite(start) and math.isfinite(stop) and stop > start):
        raise ScenarioError("--window", "must have STOP > START (finite, in s)", text)
    return start, stop


#: Resolution bounds of ``bucksim plot --dpi``: screen figures use about 100,
#: print 300 to 600 (common practice); 1200 dpi on the 8 x 6 in figure is already
#: 69 megapixels, about 280 MB of image buffer.
MIN_DPI, MAX_DPI = 10, 1200


def register(subparsers):
    """Add the ``plot`` verb to the ``bucksim`` command."""
    p = subparsers.add_parser(
        "plot", help="draw stored waveforms to a PNG",
        description="Draw the waveforms of a run stored with `bucksim run --out` (inductor "
                    "current, switch node, output voltage, ...) stacked over time, with a "
                    "band showing the conduction state.",
        epilog="Example: bucksim plot rail.h5 --signals iL,vsw,vo "
               "--window '4.99 ms:5 ms' --out rail.png")
    p.add_argument("file", help="stored run (HDF5)")
    p.add_argument("--signals", default="iL,vsw,vo",
                   help="comma-separated signals (default iL,vsw,vo)")
    p.add_argument("--window", metavar="START:STOP", help="time window in s (default: all)")
    p.add_argument("--out", required=True, metavar="FIG.png", help="PNG file to write")
    p.add_argument("--dpi", type=int_option(MIN_DPI, MAX_DPI), default=100,
                   help=f"pixels per inch, {MIN_DPI} to {MAX_DPI} (default 100)")
    p.add_argument("--force", action="store_true", help="overwrite an existing --out")
    p.set_defaults(func=_cmd_plot)
    return p


def _cmd_plot(args) -> int:
    from bucksim.plotting import save_png, waveform_figure  # matplotlib
    from bucksim.waveforms import open_run  # the engine (numba)

    if os.path.exists(args.out) and not args.force:
        print(f"bucksim: error: {args.out} exists; pass --force to overwrite it",
              file=sys.stderr)
        return 1
    try:
        signals = [s.strip() for s in args.signals.split(",") if s.strip()]
        window = parse_window(args.window) if args.window else None
        run = open_run(args.file)
        fig = waveform_figure(run, signals, window)
    except (ScenarioError, StorageError, ValueError) as exc:
        print(f"bucksim: error: {exc}", file=sys.stderr)
        return 1
    except OSError as exc:
        where = f"{exc.filename}: {exc.strerror}" if exc.filename and exc.strerror else exc
        print(f"bucksim: error: {where}", file=sys.stderr)
        return 1
    save_png(fig, args.out, dpi=args.dpi)
    print(f"bucksim: wrote {args.out}", file=sys.stderr)
    return 0
