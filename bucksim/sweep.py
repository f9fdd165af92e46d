"""Parameter and Monte Carlo sweeps of a scenario's periodic steady state.

Each point is the base scenario with one or more keys replaced (dotted keys
as in a scenario file, applied with :func:`bucksim.scenario.replace_key`),
solved for its periodic steady state and summarised over
``run.summary_cycles`` switching periods started from it. The result is a
:class:`~bucksim.sweep_table.SweepTable` with one row per point.

Point order (the ``point`` column):

* grid: the Cartesian product of the ``vary`` values, the first key
  outermost and the last key changing fastest (as :func:`itertools.product`);
* Monte Carlo: ``monte_carlo`` draws of the ``tolerance`` keys; with a grid as
  well, every grid point is run with the same draws (grid outer, draw inner),
  so grid points are compared under identical part spreads.

Draws are made up front in the calling process with
``numpy.random.Generator(PCG64(seed))``, one vector of ``monte_carlo`` values
per tolerance key in the order given, so results do not depend on how many
workers run them. A key with tolerance ``("uniform", t)`` takes
``nominal * (1 + u)``, ``u`` uniform on ``[-t, t]``; ``("normal", s)`` takes
``nominal * (1 + s z)``, ``z`` standard normal (``t``, ``s`` relative).

A point that fails (invalid scenario, no steady state, ...) keeps its row,
with the reason in ``error`` and NaN metrics; the sweep goes on.

Results are appended to ``out`` (CSV) batch by batch as they finish, so a
killed sweep keeps its finished points; ``resume=True`` reads that file, checks
it belongs to the same sweep, runs only the missing points and rewrites the
file sorted by point.

Process pools use the ``spawn`` start method: a script that calls
:func:`sweep` with ``workers > 1`` must guard its top level with
``if __name__ == "__main__":``.
"""

from __future__ import annotations

import contextlib
import csv
import itertools
import math
import sys
import time
from pathlib import Path

import numpy as np

from .sweep_table import SweepTable, format_rows, is_input

MAX_BATCH = 256  # points per task: bounds what a killed sweep can lose


class SweepError(ValueError):
    """A sweep cannot run as asked (bad keys or values, a table from another sweep)."""


# ----------------------------------------------------------------------------- planning

def _plain(value):
    """numpy scalars to Python numbers (the scenario checks ``isinstance(v, float)``)."""
    return value.item() if isinstance(value, np.generic) else value


def nominal_value(scenario, key):
    """The scenario's value at dotted ``key`` (SI base units); ``None`` when unset."""
    from .keylines import parse_key_path
    from .scenario import scenario_to_dict

    node = scenario_to_dict(scenario)
    for part in parse_key_path(key):
        try:
            node = node[part]
        except (KeyError, IndexError, TypeError):
            return None
    return node


def _check_key(scenario, key, values):
    """Refuse a key that no value of its list can be set to (a typo, a wrong section)."""
    from .errors import ScenarioError
    from .scenario import replace_key

    first = None
    for v in values:
        try:
            replace_key(scenario, key, v)
            return
        except ScenarioError as exc:
            first = first or exc
    raise SweepError(f"{key}: no value of the sweep gives a valid scenario; the first "
                     f"fails with: {first}")


def draw_factors(tolerance, n, seed):
    """Relative factors ``{key: ndarray (n,)}`` for ``n`` Monte Carlo draws.

    Parameters
    ----------
    tolerance : dict
        ``{key: ("uniform", t) | ("normal", s) | t}`` (a bare number is uniform);
        ``t``, ``s`` relative (0.1 = 10 %).
    n : int
        Number of draws.
    seed : int
        Seed of ``numpy.random.Generator(PCG64(seed))``.
    """
    rng = np.random.Generator(np.random.PCG64(seed))
    out = {}
    for key, spec in tolerance.items():
        if isinstance(spec, (tuple, list)) and len(spec) != 2:
            raise SweepError(f"tolerance {key}: expected (distribution, relative width), "
                             f"got {spec!r}")
        kind, width = spec if isinstance(spec, (tuple, list)) else ("uniform", spec)
        if kind not in ("uniform", "normal"):
            raise SweepError(f"tolerance {key}: distribution must be 'uniform' or 'normal', "
                             f"got {kind!r}")
        if isinstance(width, bool) or not isinstance(width, (int, float)) or \
                not math.isfinite(width) or width < 0:
            raise SweepError(f"tolerance {key}: relative width must be a number >= 0 "
                             f"(0.1 = 10 %), got {width!r}")
        if kind == "uniform":
            out[key] = 1.0 + rng.uniform(-width, width, size=n)
        else:
            out[key] = 1.0 + width * rng.standard_normal(size=n)
    return out


class Plan:
    """The points of a sweep: ``inputs`` (keys) and ``points`` [(index, draw, values)]."""

    def __init__(self, inputs, points, has_draw):
        self.inputs = inputs
        self.points = points
        self.has_draw = has_draw

    def __len__(self):
        return len(self.points)


def plan_points(scenario, vary=None, monte_carlo=None, tolerance=None, seed=0):
    """Enumerate a sweep's points in the documented order (see the module notes)."""
    vary = {k: [_plain(v) for v in vals] for k, vals in (vary or {}).items()}
    for key, vals in vary.items():
        if not vals:
            raise SweepError(f"vary {key}: needs at least one value")
        _check_key(scenario, key, vals)
    grid_keys = list(vary)
    grid = list(itertools.product(*vary.values())) if vary else [()]
    draws = None
    if monte_carlo is not None:
        if isinstance(monte_carlo, bool) or not isinstance(monte_carlo, int) or monte_carlo < 1:
            raise SweepError(f"monte_carlo: must be an integer >= 1, got {monte_carlo!r}")
        if not tolerance:
            raise SweepError("monte_carlo: needs tolerance={key: ('uniform', 0.1), ...}")
        both = [k for k in tolerance if k in vary]
        if both:
            raise SweepError(f"{both[0]}: is both varied and given a tolerance; choose one")
        nominals = {}
        for key in tolerance:
            nom = nominal_value(scenario, key)
            if isinstance(nom, bool) or not isinstance(nom, (int, float)):
                raise SweepError(f"tolerance {key}: needs a numeric value in the scenario to "
                                 f"spread around, found {nom!r}")
            nominals[key] = float(nom)
        factors = draw_factors(tolerance, monte_carlo, seed)
        draws = [{k: nominals[k] * float(factors[k][j]) for k in tolerance}
                 for j in range(monte_carlo)]
    elif tolerance:
        raise SweepError("tolerance: given without monte_carlo=N (the number of draws)")
    if not vary and draws is None:
        raise SweepError("nothing to sweep: give vary={key: values} and/or monte_carlo=N "
                         "with tolerance={key: ...}")
    inputs = grid_keys + (list(tolerance) if draws is not None else [])
    points = []
    for combo in grid:
        values = dict(zip(grid_keys, combo))
        for j, d in enumerate(draws if draws is not None else [None]):
            point_values = dict(values, **d) if d is not None else values
            points.append((len(points), j if d is not None else None, point_values))
    return Plan(inputs, points, draws is not None)


def batch_size(n, slots, batch=None):
    """Points per task: about four tasks per slot, at most :data:`MAX_BATCH`."""
    if batch is not None:
        if isinstance(batch, bool) or not isinstance(batch, int) or batch < 1:
            raise SweepError(f"batch: must be an integer >= 1 (points per task), got {batch!r}")
        return batch
    return max(1, min(MAX_BATCH, math.ceil(n / (4 * max(1, slots)))))


# ----------------------------------------------------------------------------- files

def out_paths(out):
    """``(csv, hdf5)`` paths for ``out``: a ``.h5``/``.hdf5`` name also gets a CSV
    progress file beside it (same stem)."""
    if out is None:
        return None, None
    out = Path(out)
    if out.suffix.lower() in (".h5", ".hdf5"):
        return out.with_suffix(".csv"), out
    return out, None


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
    data = path.read_bytes()
    if data and not data.endswith(b"\n"):
        cut = data.rfind(b"\n") + 1
        with open(path, "r+b") as f:
            f.truncate(cut)
    with open(path, newline="", encoding="utf-8") as f:
        header = next(csv.reader(f), None)
    if not header:
        return None, []
    have_inputs = [c for c in header if is_input(c)]
    if have_inputs != plan.inputs or ("draw" in header) != plan.has_draw:
        raise SweepError(f"{path}: cannot resume: its input columns are "
                         f"{have_inputs or 'none'}, this sweep varies {plan.inputs}"
                         + (" with Monte Carlo draws" if plan.has_draw else ""))
    try:
        table = SweepTable.read_csv(path)
    except ValueError as exc:
        raise SweepError(f"cannot resume: {exc}") from None
    rows = {}
    for row in table.rows:
        i = int(row["point"])
        if not 0 <= i < len(plan):
            raise SweepError(f"{path}: cannot resume: point {i} is outside this sweep "
                             f"of {len(plan)} points")
        _, draw, values = plan.points[i]
        if plan.has_draw and row["draw"] != draw:
            raise SweepError(f"{path}: cannot resume: point {i} is draw {row['draw']} there, "
                             f"draw {draw} here")
        for key, want in values.items():
            if not _same(row.get(key), want):
                raise SweepError(f"{path}: cannot resume: point {i} has {key} = "
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


# ----------------------------------------------------------------------------- the sweep

def sweep(scenario, vary=None, *, monte_carlo=None, tolerance=None, seed=0, workers=None,
          cluster=None, out=None, resume=False, batch=None, progress=None) -> SweepTable:
    """Run a grid and/or Monte Carlo sweep of ``scenario``'s periodic steady state.

    Parameters
    ----------
    scenario : Scenario
        The base scenario (open loop).
    vary : dict, optional
        ``{dotted key: sequence of values}`` [SI base units, or prefixed strings
        such as ``"4.7 uH"``]; the grid is their Cartesian product.
    monte_carlo : int, optional
        Number of random draws of the ``tolerance`` keys.
    tolerance : dict, optional
        ``{key: ("uniform", t) | ("normal", s)}``, relative (0.1 = 10 %).
    seed : int
        Seed of the draws.
    workers : int, optional
        Local processes (default ``os.cpu_count()``; 1 runs in this process),
        or the worker processes of ``cluster="local"``.
    cluster : None, "local", address, dask Client/cluster or Executor, optional
        Where batches run (see :class:`bucksim.sweep_exec.Runner`).
    out : path, optional
        CSV file written as points finish and rewritten sorted at the end; a
        ``.h5`` name writes the HDF5 table there and the CSV beside it.
    resume : bool
        Continue the sweep in ``out``: keep its finished points, run the rest.
    batch : int, optional
        Points per task (default about four tasks per worker, at most 256).
    progress : bool, optional
        ``False`` hides the progress bar (on stderr; shown only on a terminal).

    Returns
    -------
    SweepTable
        Sorted by point; ``elapsed`` [s] and ``resumed`` (points taken over) set.
    """
    from tqdm import tqdm

    from .sweep_exec import Runner

    t0 = time.perf_counter()
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int)
                                or workers < 1):
        raise SweepError(f"workers: must be an integer >= 1, got {workers!r}")
    plan = plan_points(scenario, vary, monte_carlo, tolerance, seed)
    batch_size(1, 1, batch)  # check it before any file is touched
    csv_path, h5_path = out_paths(out)
    header, done = None, []
    if resume:
        if csv_path is None:
            raise SweepError("resume: needs out=<the CSV file of the interrupted sweep>")
        header, done = read_progress(csv_path, plan)
    finished = {int(r["point"]) for r in done}
    pending = [p for p in plan.points if p[0] not in finished]
    log = ProgressFile(csv_path, header, done) if csv_path is not None else None
    new_rows = []
    bar = tqdm(total=len(plan), initial=len(done), unit="pt", desc="sweep", file=sys.stderr,
               disable=True if progress is False else None, dynamic_ncols=True)
    try:
        if pending:
            with Runner(workers, cluster) as runner:
                size = batch_size(len(pending), runner.slots, batch)
                batches = [pending[k:k + size] for k in range(0, len(pending), size)]
                with contextlib.closing(runner.run(scenario, batches)) as results:
                    for rows in results:
                        new_rows.extend(rows)
                        if log is not None:
                            log.append(rows)
                        bar.update(len(rows))
    finally:
        bar.close()
    table = SweepTable.from_rows(done + new_rows)
    if csv_path is not None:
        table.to_csv(csv_path)
    if h5_path is not None:
        table.to_hdf5(h5_path, attrs=_file_attrs(scenario, plan, seed, tolerance))
    table.elapsed = time.perf_counter() - t0
    table.resumed = len(done)
    return table


def _file_attrs(scenario, plan, seed, tolerance):
    import json

    import tomli_w

    from . import __version__
    from .scenario import scenario_to_dict

    attrs = {"bucksim_version": __version__, "title": scenario.title,
             "scenario_toml": tomli_w.dumps(scenario_to_dict(scenario)),
             "inputs": json.dumps(plan.inputs)}
    if scenario.source:
        attrs["source"] = str(scenario.source)
    if plan.has_draw:
        attrs["seed"] = int(seed)
        attrs["tolerance"] = json.dumps({k: list(v) if isinstance(v, (tuple, list))
                                         else ["uniform", v] for k, v in tolerance.items()})
    return attrs
