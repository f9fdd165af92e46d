"""The table a sweep produces: one row per point, one typed column per quantity.

Columns, in this order:

``point``
    Index of the point in the sweep's documented order (0-based).
``draw``
    Monte Carlo draw index (only when the sweep has draws).
inputs
    The varied scenario keys, dotted as in a scenario file
    (``inductor.inductance``), in SI base units.
summary
    The flattened summary of the point's periodic steady state
    (``power.loss``, ``devices.high_side.rms``, ``output_voltage.ripple``, ...),
    in the order the summary lists them; booleans (``reverse_current``) are
    stored as 1.0 / 0.0 so a failed point can hold NaN.
``steady.iterations``, ``steady.residual``, ``steady.method``, ``steady.max_floquet``
    How the periodic state was found (``max_floquet`` = largest ``|multiplier|``).
``error``
    Empty for a good point; otherwise why it failed (its metrics are NaN).

Numeric columns are float64 (``point`` and ``draw`` int64), text columns are
``str``. CSV cells hold floats as the shortest text that reads back to the
same float, so a table survives CSV exactly; HDF5 holds one 1-D dataset per
column with text as UTF-8.
"""

from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

INT_COLUMNS = ("point", "draw")
STEADY_COLUMNS = ("steady.iterations", "steady.residual", "steady.method", "steady.max_floquet")
TAIL_COLUMNS = STEADY_COLUMNS + ("error",)
TEXT_COLUMNS = ("steady.method", "error")

# First parts of the scenario keys (schema 1): a column whose dotted name starts
# with one of them is an input. No summary key starts with one (the summary
# says "inductor_current", never "inductor.").
SCENARIO_SECTIONS = ("schema", "title", "supply", "switching", "inductor", "output_capacitor",
                     "high_side", "low_side", "load", "control", "run")

# Units of scenario keys by their last name, for the HDF5 ``units`` attribute.
_INPUT_UNITS = {
    "voltage": "V", "vf": "V", "gate_voltage": "V", "reference": "V",
    "resistance": "ohm", "dcr": "ohm", "esr": "ohm", "rds_on": "ohm", "r": "ohm",
    "inductance": "H", "capacitance": "F", "coss": "F", "frequency": "Hz",
    "current": "A", "initial_current": "A", "initial_voltage": "V",
    "time": "s", "rise_time": "s", "fall_time": "s", "dead_time": "s", "soft_start": "s",
    "duration": "s", "qg": "C", "qrr": "C", "duty": "1", "slope_compensation": "V/s",
    "volume": "m^3", "area": "m^2", "k": "W/m^3",
}


def is_input(name):
    """Whether column ``name`` is a scenario key (an input of the sweep)."""
    return name.split(".", 1)[0].split("[", 1)[0] in SCENARIO_SECTIONS


def column_unit(name):
    """SI unit of a column for the HDF5 ``units`` attribute (``""``: a count or text;
    ``"1"``: a ratio); ``None`` when not known."""
    parts = name.split(".")
    last = parts[-1].split("[", 1)[0]
    if is_input(name):
        return _INPUT_UNITS.get(last)
    head = parts[0]
    if name in ("point", "draw", "conduction_mode", "error", "steady.iterations", "steady.method",
                "window.cycles", "reverse_current"):
        return ""
    if name in ("efficiency", "energy_balance_error", "steady.residual", "steady.max_floquet"):
        return "1"
    if head == "window":
        return "s"
    if head == "output_voltage":
        return "V"
    if head == "inductor_current":
        return "A"
    if head == "power":
        return "W"
    if head == "devices":
        if "flux_density" in parts:
            return "T"
        if last in ("rms", "mean"):
            return "A"
        return "W"  # conduction_loss, switching_loss, core_loss and the switching parts
    return None


def flatten(tree, prefix=""):
    """``{"power": {"loss": 1.0}}`` -> ``{"power.loss": 1.0}``; booleans -> 1.0 / 0.0."""
    out = {}
    for key, value in tree.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            out.update(flatten(value, name + "."))
        elif isinstance(value, list):
            continue  # per-event lists (transients) have no place in a flat row
        elif isinstance(value, bool):
            out[name] = 1.0 if value else 0.0
        elif value is None:
            out[name] = math.nan
        else:
            out[name] = value
    return out


def _is_number(v):
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)


def _cell(value):
    """CSV text of one value; floats round-trip exactly through ``repr``."""
    if value is None:
        return ""
    if isinstance(value, (float, np.floating)):
        return repr(float(value))
    return str(value)


def _parse_cell(text):
    """A CSV cell back to a value: a float where it reads as one, else text."""
    try:
        return float(text)
    except ValueError:
        return text


@dataclass(init=False, eq=False, repr=False)
class SweepTable:
    """Rows of a sweep, stored as one numpy array per column.

    Attributes
    ----------
    columns : list of str
        Column names in order (see the module notes).
    elapsed : float
        Wall time of the sweep that produced it [s] (``nan`` when read from a file).
    resumed : int
        Points taken over from an earlier, interrupted run.

    Read a column with :meth:`column` (or ``table[name]``); :meth:`to_dict`,
    :meth:`to_pandas` and :meth:`plot` give the other views.
    """

    columns: list
    _data: dict
    elapsed: float
    resumed: int

    def __init__(self, columns, data):
        self.columns = list(columns)
        self._data = {name: data[name] for name in self.columns}
        lengths = {len(v) for v in self._data.values()}
        if len(lengths) > 1:
            raise ValueError(f"columns differ in length: {sorted(lengths)}")
        self.elapsed = math.nan
        self.resumed = 0

    # ---------------------------------------------------------------- building

    @classmethod
    def from_rows(cls, rows):
        """Table from row dicts, sorted by ``point``, columns in the documented order.

        A row may lack a key other rows have (a part present only at some
        points); its cell is NaN (numbers) or ``""`` (text).
        """
        rows = sorted(rows, key=lambda r: int(r["point"]))
        seen = {}
        for row in rows:
            for name in row:
                seen.setdefault(name, None)
        head = [c for c in INT_COLUMNS if c in seen]
        head += [c for c in seen if is_input(c)]
        tail = list(TAIL_COLUMNS)
        middle = [c for c in seen if c not in head and c not in tail]
        columns = head + middle + tail
        data = {}
        for name in columns:
            values = [row.get(name) for row in rows]
            data[name] = _as_array(name, values)
        return cls(columns, data)

    @classmethod
    def read_csv(cls, path):
        """Read a table written by :meth:`to_csv` (or a sweep's progress file)."""
        with open(path, newline="", encoding="utf-8") as f:
            reader = csv.reader(f)
            header = next(reader, None)
            if header is None:
                return cls.from_rows([])
            rows = [_row_from_cells(header, cells, path, n + 2)
                    for n, cells in enumerate(reader)]
        table = cls.from_rows(rows)
        if not rows:  # keep the file's columns
            table = cls(header, {c: _as_array(c, []) for c in header})
        return table

    @classmethod
    def read_hdf5(cls, path):
        """Read a table written by :meth:`to_hdf5`."""
        import h5py

        with h5py.File(path, "r") as f:
            columns = [str(c) for c in f.attrs["columns"]]
            data = {}
            for c in columns:
                ds = f[c]
                if ds.dtype.kind == "O":
                    data[c] = np.array(ds.asstr()[()].tolist(), dtype=str)
                else:
                    data[c] = ds[()]
        return cls(columns, data)

    # ---------------------------------------------------------------- access

    def __len__(self):
        return len(self._data[self.columns[0]]) if self.columns else 0

    def column(self, name):
        """The values of column ``name`` (a numpy array)."""
        try:
            return self._data[name]
        except KeyError:
            raise KeyError(f"no column {name!r} in the sweep table (columns: "
                           + ", ".join(self.columns) + ")") from None

    def __getitem__(self, name):
        return self.column(name)

    @property
    def rows(self):
        """The table as a list of row dicts (plain Python values)."""
        return [{c: self._data[c][i].item() for c in self.columns} for i in range(len(self))]

    @property
    def failed(self):
        """Boolean mask of the points that failed."""
        if "error" not in self._data:
            return np.zeros(len(self), dtype=bool)
        return self._data["error"] != ""

    def equals(self, other):
        """Exact equality of columns and values (NaN equals NaN)."""
        if self.columns != other.columns:
            return False
        for c in self.columns:
            a, b = self._data[c], other._data[c]
            if a.dtype.kind != b.dtype.kind or a.shape != b.shape:
                return False
            if a.dtype.kind == "f":
                if not np.array_equal(a, b, equal_nan=True):
                    return False
            elif not np.array_equal(a, b):
                return False
        return True

    def __repr__(self):
        return (f"<SweepTable {len(self)} points, {len(self.columns)} columns, "
                f"{int(self.failed.sum())} failed>")

    @property
    def inputs(self):
        """The input columns (varied scenario keys), in order."""
        return [c for c in self.columns if is_input(c)]

    # ---------------------------------------------------------------- views

    def to_dict(self) -> dict:
        """Plain values: ``columns`` in order, ``data`` (column -> list), ``elapsed``
        [s] and ``resumed``."""
        return {"columns": list(self.columns),
                "data": {c: self._data[c].tolist() for c in self.columns},
                "elapsed": float(self.elapsed), "resumed": int(self.resumed)}

    def to_pandas(self):
        """The table as a ``pandas.DataFrame``, columns in order and with their dtypes
        (pandas: the ``tables`` extra)."""
        from bucksim.frames import data_frame
        return data_frame({c: self._data[c] for c in self.columns})

    def plot(self, y: str, x: str | None = None, *, log: bool = False, **kw):
        """Figure: column ``y`` against the swept key ``x``, failed points left out.

        ``x`` defaults to the first input column whose value varies. Units of
        both come from :func:`column_unit` (see
        :func:`bucksim.plotting.column_figure`).
        """
        from bucksim.plotting import column_figure

        if x is None:
            varied = [c for c in self.inputs if np.unique(self.column(c)).shape[0] > 1]
            if not varied:
                raise ValueError("the sweep table has no varied input column to plot "
                                 f"against; give x= one of: {', '.join(self.columns)}")
            x = varied[0]
        for name in (x, y):
            if self.column(name).dtype.kind not in "fi":
                raise ValueError(f"column {name!r} holds text; plot needs a numeric column")
        return column_figure(self.column(x), self.column(y), x_label=x, y_label=y,
                             x_unit=column_unit(x), y_unit=column_unit(y), failed=self.failed,
                             log=log, **kw)

    # ---------------------------------------------------------------- writing

    def csv_text(self):
        """The table as CSV text (header line, then one line per point)."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(self.columns)
        cols = [self._data[c] for c in self.columns]
        for i in range(len(self)):
            w.writerow([_cell(col[i].item()) for col in cols])
        return buf.getvalue()

    def to_csv(self, path):
        """Write the table as CSV; written under a temporary name, then renamed."""
        _atomic_write(path, self.csv_text().encode("utf-8"))

    def to_hdf5(self, path, attrs=None):
        """Write one 1-D dataset per column (text as UTF-8) with a ``units`` attribute.

        The file attribute ``columns`` keeps the column order; ``attrs`` adds
        file attributes (e.g. the scenario). Written under a temporary name in
        the same folder, then renamed, so a reader never sees half a file.
        """
        import h5py

        path = Path(path)
        tmp = path.with_name(path.name + ".part")
        with h5py.File(tmp, "w") as f:
            f.attrs["columns"] = np.array(self.columns, dtype=h5py.string_dtype("utf-8"))
            f.attrs["format"] = "bucksim sweep table"
            for key, value in (attrs or {}).items():
                f.attrs[key] = value
            for c in self.columns:
                a = self._data[c]
                if a.dtype.kind == "U":
                    ds = f.create_dataset(c, data=a.astype(object),
                                          dtype=h5py.string_dtype("utf-8"))
                else:
                    ds = f.create_dataset(c, data=a)
                unit = column_unit(c)
                if unit is not None:
                    ds.attrs["units"] = unit
        os.replace(tmp, path)


def _as_array(name, values):
    # None and "" are empty cells: NaN in a numeric column, "" in a text column
    present = [v for v in values if v is not None and not (isinstance(v, str) and v == "")]
    if name in INT_COLUMNS:
        return np.array([int(v) for v in values], dtype=np.int64)
    if name in TEXT_COLUMNS or not present or not all(_is_number(v) for v in present):
        return np.array(["" if v is None else (v if isinstance(v, str) else _cell(v))
                         for v in values], dtype=str)
    return np.array([math.nan if v is None or isinstance(v, str) else float(v)
                     for v in values], dtype=np.float64)


def _row_from_cells(header, cells, path, line):
    if len(cells) != len(header):
        raise ValueError(f"{path}:{line}: has {len(cells)} fields, the header has "
                         f"{len(header)}")
    row = {}
    for name, text in zip(header, cells, strict=True):
        if name in TEXT_COLUMNS:
            row[name] = text
        elif name in INT_COLUMNS:
            row[name] = int(text)
        else:
            row[name] = _parse_cell(text) if text != "" else ""
    return row


def _atomic_write(path, data):
    path = Path(path)
    tmp = path.with_name(path.name + ".part")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def format_rows(columns, rows):
    """CSV lines (no header) for ``rows`` under ``columns``; a missing key is an empty cell."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    for row in rows:
        w.writerow([_cell(row.get(c)) for c in columns])
    return buf.getvalue()

