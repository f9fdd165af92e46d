"""The files of a sweep: table paths, the CSV progress file, and resume checks.

Rows are appended to the CSV progress file batch by batch as they finish, so
a killed sweep keeps its finished points. A resume reads that file back,
checks it belongs to the same sweep (same input columns, same values at each
point) and refuses any file that is not this sweep's table, so that no other
file is ever overwritten by a resume.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

from bucksim.errors import SweepError
from bucksim.sweeps.table import SweepTable, format_rows, is_input


def _error(text):
    return SweepError(text)


def out_paths(out):
    """``(csv, hdf5)`` paths for ``out``: a ``.h5``/``.hdf5`` name also gets a CSV
    progress file beside it (same stem)."""
    if out is None:
        return None, None
    out = Path(out)
    if out.suffix.lower() in (".h5", ".hdf5"):
        return out.with_suffix(".csv"), out
    return out, None


def is_sweep_hdf5(path):
    """Whether ``path`` is an HDF5 sweep table (written by :meth:`SweepTable.to_hdf5`)."""
    try:
        import h5py

        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
    except (OSError, ValueError):
        return False
    if isinstance(fmt, bytes):
        fmt = fmt.decode("utf-8", "replace")
    return fmt == "bucksim sweep table"


def check_resume_target(csv_path, h5_path):
    """Refuse a resume that would overwrite a file that is not this sweep's table.

    The HDF5 table is rewritten at the end of a sweep: a resume may do that
    only when the file there is a sweep table with its CSV progress file
    beside it. A stored run (or any other file) under that name is refused.
    """
    if csv_path is None:
        raise _error("resume: needs out=<the CSV file of the interrupted sweep>")
    if h5_path is None or not h5_path.exists():
        return
    if h5_path.is_dir():
        raise _error(f"{h5_path}: is a folder, not a sweep table")
    if not is_sweep_hdf5(h5_path):
        raise _error(f"{h5_path}: cannot resume: this file is not a sweep table (a "
                         f"stored run, or another program's file); resuming would overwrite "
                         f"it. Choose another --out name")
    if not csv_path.exists():
        raise _error(f"{h5_path}: cannot resume: its progress file {csv_path} is "
                         f"missing, so there is nothing to resume from; to run the sweep "
                         f"again and overwrite {h5_path}, drop --resume and pass --force")


def _same(a, b):
    """Equal as numbers when both read as numbers (NaN equals NaN), else as text."""
    try:
        x, y = float(a), float(b)
    except (TypeError, ValueError):
        return str(a) == str(b)
    return x == y or (math.isnan(x) and math.isnan(y))


def read_progress(path, plan):
    """Rows already in ``path`` that belong to ``plan``; refuses a file of another sweep.

    A last line cut short by a kill is dropped (and cut from the file, so
    appending continues on a clean line).

    Returns
    -------
    (header, rows) : (list of str or None, list of dict)
        ``header`` is ``None`` when the file is missing or empty.
    """
    path = Path(path)
    if not path.exists():
        return None, []
    if path.is_dir():
        raise _error(f"{path}: is a folder, not a sweep's CSV table")
    data = path.read_bytes()
    try:
        header = next(csv.reader([data.split(b"\n", 1)[0].decode("utf-8")]), None)
    except (UnicodeDecodeError, csv.Error):
        raise _error(f"{path}: cannot resume: not a sweep's CSV table (not UTF-8 "
                         f"text)") from None
    if not header:
        if data.strip():
            raise _error(f"{path}: cannot resume: not a sweep's CSV table (its first "
                             f"line is empty)")
        return None, []
    have_inputs = [c for c in header if is_input(c)]
    if have_inputs != plan.inputs or ("draw" in header) != plan.has_draw:
        raise _error(f"{path}: cannot resume: its input columns are "
                         f"{have_inputs or 'none'}, this sweep varies {plan.inputs}"
                         + (" with Monte Carlo draws" if plan.has_draw else ""))
    # only now that the file is this sweep's: drop a last line cut short by a kill
    if data and not data.endswith(b"\n"):
        cut = data.rfind(b"\n") + 1
        with open(path, "r+b") as f:
            f.truncate(cut)
    try:
        table = SweepTable.read_csv(path)
    except ValueError as exc:
        raise _error(f"cannot resume: {exc}") from None
    rows = {}
    for row in table.rows:
        i = int(row["point"])
        if not 0 <= i < len(plan):
            raise _error(f"{path}: cannot resume: point {i} is outside this sweep "
                             f"of {len(plan)} points")
        _, draw, values = plan.points[i]
        if plan.has_draw and row["draw"] != draw:
            raise _error(f"{path}: cannot resume: point {i} is draw {row['draw']} there, "
                             f"draw {draw} here")
        for key, want in values.items():
            if not _same(row.get(key), want):
                raise _error(f"{path}: cannot resume: point {i} has {key} = "
                                 f"{row.get(key)!r} there, this sweep asks {want!r}")
        rows.setdefault(i, row)
    return header, list(rows.values())


class ProgressFile:
    """Appends finished rows to a CSV file and flushes, one write per batch."""

    def __init__(self, path, header=None, rows=()):
        self.path = Path(path)
        self.rows = list(rows)
        self.columns = list(header) if header else None
        if self.columns is None:
            self.path.write_bytes(b"")  # a fresh sweep starts a fresh file

    def append(self, rows):
        self.rows.extend(rows)
        names = dict.fromkeys(k for r in rows for k in r)
        if self.columns is None or any(k not in self.columns for k in names):
            # first batch, or a batch with new columns: rewrite with all rows
            table = SweepTable.from_rows(self.rows)
            self.columns = table.columns
            table.to_csv(self.path)
            return
        with open(self.path, "a", newline="", encoding="utf-8") as f:
            f.write(format_rows(self.columns, rows))
            f.flush()
