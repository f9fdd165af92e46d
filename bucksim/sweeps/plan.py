"""Parameter and Monte Carlo sweeps of a scenario's periodic steady state.

Each point is the base scenario with one or more keys replaced (dotted keys
as in a scenario file, applied with :func:`bucksim.model.scenario.replace_key`),
solved for its periodic steady state and summarised over
``run.summary_cycles`` switching periods started from it. The result is a
:class:`~bucksim.sweeps.table.SweepTable` with one row per point.

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

A ``vary`` value may be a list (any sequence) of values or a single value
(a number or a string such as ``"4.7 uH"``), which is a one-point axis; a
mapping, a set or anything else is refused naming the key.

A point that fails (invalid scenario, no steady state, an unstable steady
state, a run that does not complete or a loop that does not settle) keeps
its row, with the reason in ``error`` and NaN metrics; the sweep goes on.

Size: a sweep keeps every row in memory (about :data:`POINT_BYTES` a point,
measured) and each running point its own settled run. A sweep whose points
would not fit in the memory :func:`bucksim.engine.limits.memory_budget` allows, or
whose points run at once would not, is refused before anything is built,
naming the key and the figure it would need.

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
import itertools
import math
import sys
import time

import numpy as np

from bucksim.errors import SweepError
from bucksim.sweeps.files import ProgressFile, check_resume_target, out_paths, read_progress
from bucksim.sweeps.table import SweepTable

MAX_BATCH = 256  # points per task: bounds what a killed sweep can lose
#: Memory of one point in a sweep [B]: its plan entry, its row dict, its table
#: cells and CSV text. Measured with tracemalloc: 10 to 13.4 kB a point (58
#: columns, 100 to 400 points); rounded up for longer rows and error texts.
POINT_BYTES = 16_000



# ----------------------------------------------------------------------------- planning

def _plain(value):
    """numpy scalars to Python numbers (the scenario checks ``isinstance(v, float)``)."""
    return value.item() if isinstance(value, np.generic) else value


def nominal_value(scenario, key):
    """The scenario's value at dotted ``key`` (SI base units); ``None`` when unset."""
    from bucksim.model.keylines import parse_key_path
    from bucksim.model.scenario import scenario_to_dict

    node = scenario_to_dict(scenario)
    for part in parse_key_path(key):
        try:
            node = node[part]
        except (KeyError, IndexError, TypeError):
            return None
    return node


def _check_key(scenario, key, values):
    """Refuse a key that no value of its list can be set to (a typo, a wrong section)."""
    from bucksim.errors import ScenarioError
    from bucksim.model.scenario import replace_key

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

    def __init__(self, inputs, points, has_draw, axes=None):
        self.inputs = inputs
        self.points = points
        self.has_draw = has_draw
        self.axes = axes or {}  # {key: [values]} of the grid

    def __len__(self):
        return len(self.points)


def max_points():
    """Points a sweep may hold on this machine (see :data:`POINT_BYTES`)."""
    from bucksim.engine.limits import memory_budget

    return max(1, memory_budget() // POINT_BYTES)


def _axis(key, values, cap):
    """The values of one ``vary`` key as a list (a single value: one point).

    At most ``cap + 1`` values are taken from an iterator, so an endless or
    huge one is refused by the size check instead of filling the memory.
    """
    if isinstance(values, (str, bytes, int, float, np.generic)) or \
            (isinstance(values, np.ndarray) and values.ndim == 0):
        return [_plain(values.item() if isinstance(values, np.ndarray) else values)]
    expected = ("expected a list of values, or one value (a number or a string such as "
                "'4.7 uH')")
    if values is None or isinstance(values, (dict, set, frozenset)):
        raise SweepError(f"vary {key}: {expected}, got {values!r}")
    try:
        items = iter(values)
    except TypeError:
        raise SweepError(f"vary {key}: {expected}, got {values!r}") from None
    return [_plain(v) for v in itertools.islice(items, cap + 1)]


def check_sweep_size(axes, draws=None, names=("vary", "monte_carlo")):
    """Refuse a sweep whose points would not fit in memory, before any is built.

    Parameters
    ----------
    axes : list of (str, int)
        ``(key, number of values)`` of each grid axis.
    draws : int, optional
        Monte Carlo draws (each grid point runs all of them).
    names : (str, str)
        How the caller names the grid and the draws (``"--vary"`` and
        ``"--monte-carlo"`` on the command line), for the message.

    Raises
    ------
    ScenarioError
        Naming the largest factor, the number of points and the memory they
        would need (:func:`bucksim.engine.limits.refuse_if_too_big`).
    """
    from bucksim.engine.limits import memory_budget, refuse_if_too_big

    factors = [(f"{names[0]} {k}", f"{n} {k} values", n) for k, n in axes]
    if draws is not None:
        factors.append((names[1], f"{draws} draws", draws))
    if not factors:
        return
    n = math.prod(f[2] for f in factors)
    limit = max_points()
    if n <= limit:
        return
    key, _, count = max(factors, key=lambda f: f[2])
    refuse_if_too_big(n * POINT_BYTES, memory_budget(), key, count,
                      f"a sweep of {n} points ({' x '.join(f[1] for f in factors)}) at about "
                      f"{POINT_BYTES // 1000} kB a point",
                      remedy=f"split it into sweeps of at most {limit} points")


def plan_points(scenario, vary=None, monte_carlo=None, tolerance=None, seed=0):
    """Enumerate a sweep's points in the documented order (see the module notes)."""
    if vary is None:
        vary = {}
    if not isinstance(vary, dict):
        raise SweepError(f"vary: expected a dict {{dotted key: values}}, got {vary!r}")
    if monte_carlo is not None and (isinstance(monte_carlo, bool)
                                    or not isinstance(monte_carlo, int) or monte_carlo < 1):
        raise SweepError(f"monte_carlo: must be an integer >= 1, got {monte_carlo!r}")
    cap = max_points()
    vary = {k: _axis(k, vals, cap) for k, vals in vary.items()}
    check_sweep_size([(k, len(vals)) for k, vals in vary.items()], monte_carlo)
    for key, vals in vary.items():
        if not vals:
            raise SweepError(f"vary {key}: needs at least one value")
        _check_key(scenario, key, vals)
    grid_keys = list(vary)
    grid = list(itertools.product(*vary.values())) if vary else [()]
    draws = None
    if monte_carlo is not None:
        if not tolerance:
            raise SweepError("monte_carlo: needs tolerance={key: ('uniform', 0.1), ...}")
        if not isinstance(tolerance, dict):
            raise SweepError(f"tolerance: expected a dict {{dotted key: ('uniform', 0.1)}}, "
                             f"got {tolerance!r}")
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
        values = dict(zip(grid_keys, combo, strict=True))
        for j, d in enumerate(draws if draws is not None else [None]):
            point_values = dict(values, **d) if d is not None else values
            points.append((len(points), j if d is not None else None, point_values))
    return Plan(inputs, points, draws is not None, vary)


def batch_size(n, slots, batch=None):
    """Points per task: about four tasks per slot, at most :data:`MAX_BATCH`."""
    if batch is not None:
        if isinstance(batch, bool) or not isinstance(batch, int) or batch < 1:
            raise SweepError(f"batch: must be an integer >= 1 (points per task), got {batch!r}")
        return batch
    return max(1, min(MAX_BATCH, math.ceil(n / (4 * max(1, slots)))))


def _point_scenarios(scenario, vary):
    """The base scenario, and one per value of a key that changes a point's size."""
    from bucksim.errors import ScenarioError
    from bucksim.model.scenario import replace_key

    yield scenario
    for key, values in (vary or {}).items():
        if key.startswith("run.") or key == "switching.strategy":
            for v in values:
                try:
                    yield replace_key(scenario, key, v)
                except ScenarioError:
                    continue  # that point fails on its own, with its reason in its row


def check_points_fit(scenario, vary, at_once):
    """Refuse a sweep whose ``at_once`` concurrently running points would not fit.

    Each point keeps a settled run of ``run.summary_cycles`` periods
    (:func:`bucksim.engine.limits.run_bytes`); local workers run one point each at a
    time, in this machine's memory.
    """
    import dataclasses

    from bucksim.engine.limits import memory_budget, refuse_if_too_big, run_bytes
    from bucksim.model.stage import Stage

    worst, worst_sc = 0, scenario
    for sc in _point_scenarios(scenario, vary):
        settled = dataclasses.replace(sc, run=dataclasses.replace(
            sc.run, cycles=sc.run.summary_cycles, duration=None))
        try:
            n_states = Stage(settled).n
        except Exception:  # that point fails on its own, when it runs
            n_states = 2
        need = run_bytes(settled, n_states)
        if need > worst:
            worst, worst_sc = need, sc
    who = f"{at_once} points at once (one per worker)" if at_once > 1 else "one point"
    refuse_if_too_big(worst * at_once, memory_budget(), "run.summary_cycles",
                      worst_sc.run.summary_cycles,
                      f"{who}, each keeping {worst_sc.run.summary_cycles} settled cycles,",
                      worst_sc.source, "fewer run.summary_cycles"
                      + (", or fewer workers" if at_once > 1 else ""))


def _local_processes(workers, cluster, n_points):
    """Points that may run at once in this machine's memory."""
    import os

    if cluster is None or cluster == "local":
        return max(1, min(workers or os.cpu_count() or 1, n_points))
    return 1  # a remote cluster's memory is its own; an Executor: at least one here


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
        such as ``"4.7 uH"``]; the grid is their Cartesian product. A single
        value (number or string) is a one-point axis.
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
        Where batches run (see :class:`bucksim.sweeps.execute.Runner`).
    out : path, optional
        CSV file written as points finish and rewritten sorted at the end; a
        ``.h5`` name writes the HDF5 table there and the CSV beside it.
    resume : bool
        Continue the sweep in ``out``: keep its finished points, run the rest.
        Refused when ``out`` names an ``.h5`` file that is not a sweep table
        (a stored run) or whose CSV progress file is missing.
    batch : int, optional
        Points per task (default about four tasks per worker, at most 256).
    progress : bool, optional
        ``False`` hides the progress bar (on stderr; shown only on a terminal).

    Returns
    -------
    SweepTable
        Sorted by point; ``elapsed`` [s] and ``resumed`` (points taken over) set.

    Raises
    ------
    SweepError
        Bad keys, values or options; a resume onto a file that is not this
        sweep's table.
    ScenarioError
        The sweep's points, or its points running at once, would not fit in
        memory (naming the key and the figure).
    """
    t0 = time.perf_counter()
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int)
                                or workers < 1):
        raise SweepError(f"workers: must be an integer >= 1, got {workers!r}")
    plan = plan_points(scenario, vary, monte_carlo, tolerance, seed)
    batch_size(1, 1, batch)  # check it before any file is touched
    check_points_fit(scenario, plan.axes, _local_processes(workers, cluster, len(plan)))
    csv_path, h5_path = out_paths(out)
    header, done = None, []
    if resume:
        check_resume_target(csv_path, h5_path)
        header, done = read_progress(csv_path, plan)
    finished = {int(r["point"]) for r in done}
    pending = [p for p in plan.points if p[0] not in finished]
    log = ProgressFile(csv_path, header, done) if csv_path is not None else None
    new_rows = _run_pending(scenario, pending, workers, cluster, batch, log,
                            total=len(plan), initial=len(done), progress=progress)
    table = SweepTable.from_rows(done + new_rows)
    if csv_path is not None:
        table.to_csv(csv_path)
    if h5_path is not None:
        table.to_hdf5(h5_path, attrs=_file_attrs(scenario, plan, seed, tolerance))
    table.elapsed = time.perf_counter() - t0
    table.resumed = len(done)
    return table


def _run_pending(scenario, pending, workers, cluster, batch, log, *, total, initial, progress):
    """Run the pending points in batches; rows as they finish, logged to ``log``."""
    from tqdm import tqdm

    from bucksim.sweeps.execute import Runner

    new_rows = []
    bar = tqdm(total=total, initial=initial, unit="pt", desc="sweep", file=sys.stderr,
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
    return new_rows


def _file_attrs(scenario, plan, seed, tolerance):
    import json

    import tomli_w

    from bucksim.model.scenario import scenario_to_dict
    from bucksim.version import package_version

    attrs = {"bucksim_version": package_version(), "title": scenario.title,
             "scenario_toml": tomli_w.dumps(scenario_to_dict(scenario)),
             "inputs": json.dumps(plan.inputs)}
    if scenario.source:
        attrs["source"] = str(scenario.source)
    if plan.has_draw:
        attrs["seed"] = int(seed)
        attrs["tolerance"] = json.dumps({k: list(v) if isinstance(v, (tuple, list))
                                         else ["uniform", v] for k, v in tolerance.items()})
    return attrs
