"""Reading run files: the layout's names, and every check a file must pass.

The layout itself is described in :mod:`bucksim.io.hdf5`, which writes it;
this module reads it: :func:`open_run` (a whole :class:`~bucksim.waveforms.Run`),
:func:`open_run_file` and :func:`read_rows` (the header, then rows on demand,
as :mod:`bucksim.analysis.stored` does to summarise a long run in blocks). Every row
read is checked (:func:`check_rows`): a file no writer could have produced
is refused with a :class:`~bucksim.errors.StorageError` naming it.
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import json
import os
import re
import warnings

import numpy as np

from bucksim.engine.driver import EngineResult, TransitionTable
from bucksim.errors import ScenarioError, StepAfterEndWarning, StorageError
from bucksim.model.stage import CONTROLLER_UNIT, N_CONDUCTION, UNITS, Stage

__all__ = ["LAYOUT_VERSION", "RunHeader", "check_rows", "guarded_read", "read_run",
           "open_run_file", "read_rows"]

LAYOUT_VERSION = 1

#: Rows per HDF5 chunk: 512 KiB of float64, inside HDF5's default 1 MiB chunk cache.
CHUNK_ROWS = 1 << 16

#: Smallest chunk: short runs get a chunk near their length, as HDF5 stores whole chunks.
MIN_CHUNK_ROWS = 1 << 12

#: Rows per write or read of a column block (bounds the temporary copies).
_WRITE_ROWS = 16 * CHUNK_ROWS

COMPRESSIONS = (None, "gzip", "lzf")

_FIXED_COLUMNS = (("t0", np.float64, "s"), ("dt", np.float64, "s"),
                  ("conduction", np.int8, "1"), ("system", np.int32, "1"))

_RUN_ATTRS = ("t_end", "status", "message")


def _columns(state_names):
    """Segment-table columns ``(name, dtype, unit)`` for a stage with these states."""
    return _FIXED_COLUMNS + tuple((f"x0_{name}", np.float64, UNITS.get(name, CONTROLLER_UNIT))
                                  for name in state_names)


def read_run(path):
    """``(scenario, stage, table, EngineResult)`` of a run file.

    The file is one written by :func:`save_run` or :func:`simulate_to_file`.

    The scenario is rebuilt from its stored resolved values, the stage from
    the scenario, and the transition table is the stored one, so
    ``bucksim.open_run(p).summary()`` equals the summary of the run that was saved.
    Every segment row is checked as it is read (:func:`check_rows`).

    Raises
    ------
    FileNotFoundError
        If ``path`` does not exist.
    StorageError
        If the file is not HDF5, is truncated or corrupt, is not a bucksim
        run, is incomplete (or a writer's partial file), has a newer layout,
        its matrices do not belong to its scenario (stale or foreign file),
        or its segment rows hold values no writer produces (negative or
        non-finite lengths, times out of order, non-finite states). The
        message names the file.
    """
    with open_run_file(path) as (f, head):
        return guarded_read(head.path, _read, f, head.path)


@contextlib.contextmanager
def open_run_file(path):
    """Open a run file for reading: yields ``(h5py.File, RunHeader)``.

    The header is read and checked; segment rows are read on demand with
    :func:`read_rows` (wrap such reads in :func:`guarded_read`).
    """
    import h5py

    name = os.fspath(path)
    if not os.path.exists(name):
        raise FileNotFoundError(errno.ENOENT, "no such run file", name)
    if os.path.isdir(name):
        raise StorageError(name, "is a folder, not a run file")
    if _PARTIAL_NAME.fullmatch(os.path.basename(name)):
        raise StorageError(name, "is the partial file of a writer that has not finished "
                           "(still running, or stopped by a kill): it holds no complete run. "
                           "The finished file takes the name without the leading '.' and the "
                           "'.<hex>.partial' ending; a leftover partial file is safe to delete")
    if not h5py.is_hdf5(name):
        raise StorageError(name, "not an HDF5 file (no HDF5 signature); run files are HDF5")
    try:
        f = h5py.File(name, "r")
    except OSError as exc:
        if "lock" in str(exc).lower():
            raise StorageError(name, "is open for writing in another process (HDF5 file "
                               "lock); wait until its writer has finished") from None
        raise StorageError(name, f"truncated or corrupt HDF5 file ({_first_line(exc)})") from None
    with f:
        yield f, guarded_read(name, _read_header, f, name)


def guarded_read(path, read, *args):
    """``read(*args)``, with HDF5's low-level failures (a truncated or damaged file)
    turned into a StorageError naming ``path``."""
    try:
        return read(*args)
    except StorageError:
        raise
    except (OSError, KeyError, ValueError, TypeError) as exc:
        raise StorageError(path, f"corrupt run file ({_first_line(exc)})") from None


#: ``.NAME.<8 hex>.partial``: what :func:`_atomic_target` writes before the rename.
_PARTIAL_NAME = re.compile(r"\..+\.[0-9a-f]{8}\.partial")


def _first_line(exc):
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


def _corrupt(path, what):
    return StorageError(path, f"corrupt run file: {what}")


@dataclasses.dataclass(frozen=True)
class RunHeader:
    """The small parts of a run file, read and checked before any segment.

    Attributes
    ----------
    path : str
    scenario : Scenario
    stage : Stage
    table : TransitionTable
    n_segments : int
    t_end : float [s]
    x_end : ndarray   state at ``t_end``
    status : int
    message : str
    """

    path: str
    scenario: object
    stage: Stage
    table: TransitionTable
    n_segments: int
    t_end: float
    x_end: np.ndarray
    status: int
    message: str


def _read_header(f, path) -> RunHeader:
    attrs = f.attrs
    if "layout_version" not in attrs:
        raise StorageError(path, "not a bucksim run file (an HDF5 file without the "
                           "'layout_version' attribute)")
    version = attrs["layout_version"]
    if not isinstance(version, (int, np.integer)) or version < 1:
        raise _corrupt(path, f"layout_version = {version!r} is not a positive integer")
    if version > LAYOUT_VERSION:
        writer = attrs.get("bucksim_version", "an unknown version")
        raise StorageError(path, f"written with layout version {int(version)} (by bucksim "
                           f"{writer}); this bucksim reads layout version {LAYOUT_VERSION}: "
                           "upgrade bucksim to open it")
    complete = attrs.get("complete", False)
    if not (isinstance(complete, (bool, np.bool_)) and complete):
        raise StorageError(path, "incomplete run file: its writer stopped before finishing "
                           "('complete' is not set)")
    missing = [k for k in _RUN_ATTRS if k not in attrs]
    if missing:
        raise _corrupt(path, "missing file attribute(s) " + ", ".join(missing))
    # the small parts first: a stale or foreign file is refused before its segments are read
    table = _read_table(f, path)
    scenario = _read_scenario(f, path)
    stage = Stage(scenario)
    _check_table(path, attrs.get("bucksim_version", "an unknown version"), scenario, stage,
                 table)
    missing = [f"x_end_{n}" for n in stage.state_names if f"x_end_{n}" not in attrs]
    if missing:
        raise _corrupt(path, "missing file attribute(s) " + ", ".join(missing))
    status, t_end = attrs["status"], attrs["t_end"]
    if not isinstance(status, (int, np.integer)) or isinstance(status, (bool, np.bool_)):
        raise _corrupt(path, f"status = {status!r} is not an integer")
    if not isinstance(t_end, (float, np.floating)) or not np.isfinite(t_end):
        raise _corrupt(path, f"t_end = {t_end!r} is not a finite time in s")
    x_end = np.array([float(attrs[f"x_end_{n}"]) for n in stage.state_names])
    if int(status) != _DIVERGED and not np.all(np.isfinite(x_end)):
        raise _corrupt(path, "non-finite end state (x_end_*) in a run that did not diverge")
    n = _segment_count(f, path, stage.state_names)
    return RunHeader(path, scenario, stage, table, n, float(t_end), x_end, int(status),
                     str(attrs["message"]))


def _read(f, path):
    head = _read_header(f, path)
    cols = read_rows(f, head, 0, head.n_segments)
    result = EngineResult(cols["t0"], cols["dt"], cols["conduction"], cols["system"], cols["x0"],
                          x_end=head.x_end, t_end=head.t_end, status=head.status,
                          message=head.message)
    return head.scenario, head.stage, head.table, result


#: Engine status of a diverged run: its end state may be non-finite.
_DIVERGED = 1


def read_rows(f, head: RunHeader, start: int, stop: int, previous_t0: float | None = None):
    """Segment rows ``[start, stop)`` of an open run file, checked (see :func:`check_rows`).

    ``previous_t0`` is the start time of row ``start - 1`` when the caller
    reads the file in blocks, so the order is checked across blocks too.
    Returns the columns by name, with the states as ``x0`` (rows, n_states).
    """
    names = head.stage.state_names
    seg = f["segments"]
    stop = min(stop, head.n_segments)
    cols = {name: seg[name][start:stop] for name in ("t0", "dt", "conduction", "system")}
    # block by block into one array: the states are never held twice (HDF5's own
    # strided read into a column is far slower and not leaner)
    x0 = np.empty((max(stop - start, 0), len(names)))
    for j, name in enumerate(names):
        ds = seg[f"x0_{name}"]
        for a in range(start, stop, _WRITE_ROWS):
            b = min(a + _WRITE_ROWS, stop)
            x0[a - start:b - start, j] = ds[a:b]
    cols["x0"] = x0
    check_rows(head.path, cols, len(head.table.matrices), start, previous_t0)
    return cols


def check_rows(path, cols, n_sys: int, first_row: int = 0, previous_t0=None):
    """Refuse segment rows no writer produces: codes or ids out of range, non-finite
    or negative times, times out of order, non-finite states."""
    t0, dt, cond, system, x0 = (cols[k] for k in ("t0", "dt", "conduction", "system", "x0"))
    if not len(t0):
        return

    def where(bad):
        k = int(np.argmax(bad))
        return f"segment row {first_row + k}"

    if cond.min() < 0 or cond.max() >= N_CONDUCTION:
        raise _corrupt(path, f"conduction codes outside 0..{N_CONDUCTION - 1} "
                       f"({where((cond < 0) | (cond >= N_CONDUCTION))})")
    if system.min() < 0 or system.max() >= n_sys:
        raise _corrupt(path, f"system ids outside 0..{n_sys - 1} "
                       f"({where((system < 0) | (system >= n_sys))})")
    bad = ~np.isfinite(t0)
    if bad.any():
        raise _corrupt(path, f"non-finite start time t0 ({where(bad)})")
    bad = ~(dt >= 0) | ~np.isfinite(dt)
    if bad.any():
        k = int(np.argmax(bad))
        raise _corrupt(path, f"segment length dt = {dt[k]!r} s is not finite and >= 0 "
                       f"({where(bad)})")
    bad = ~np.all(np.isfinite(x0), axis=1)
    if bad.any():
        raise _corrupt(path, f"non-finite state x0 ({where(bad)})")
    if previous_t0 is not None and t0[0] < previous_t0:
        raise _corrupt(path, f"start times t0 out of order (segment row {first_row})")
    bad = np.diff(t0) < 0
    if bad.any():
        raise _corrupt(path, f"start times t0 out of order (segment row "
                       f"{first_row + 1 + int(np.argmax(bad))})")


def _dataset(f, path, key, ndim=None):
    import h5py

    ds = f.get(key)
    if not isinstance(ds, h5py.Dataset):
        raise _corrupt(path, f"dataset /{key} is missing")
    if ndim is not None and ds.ndim != ndim:
        raise _corrupt(path, f"/{key} has {ds.ndim} dimensions, expected {ndim}")
    return ds


def _segment_count(f, path, state_names) -> int:
    """Rows of the segment table, after checking its columns' names, types and lengths."""
    lengths = {}
    for name, dtype, _unit in _columns(state_names):
        ds = _dataset(f, path, f"segments/{name}", 1)
        if ds.dtype != dtype:
            raise _corrupt(path, f"/segments/{name} has type {ds.dtype}, "
                           f"expected {np.dtype(dtype)}")
        lengths[name] = ds.shape[0]
    if len(set(lengths.values())) > 1:
        raise _corrupt(path, "segment columns differ in length ("
                       + ", ".join(f"{k} {v}" for k, v in lengths.items()) + ")")
    return lengths["t0"]


def _read_table(f, path) -> TransitionTable:
    arrays = {}
    for name, ndim in (("matrices", 3), ("exponentials", 4), ("steps", 1)):
        ds = _dataset(f, path, f"systems/{name}", ndim)
        if ds.dtype != np.float64:
            raise _corrupt(path, f"/systems/{name} has type {ds.dtype}, expected float64")
        arrays[name] = ds[()]
    mats, exps, steps = arrays["matrices"], arrays["exponentials"], arrays["steps"]
    n_sys, m = mats.shape[0], mats.shape[1]
    # the state size itself is checked against the scenario's stage later
    if mats.shape[1:] != (m, m) or exps.shape != (n_sys, len(steps), m, m):
        raise _corrupt(path, f"/systems shapes do not fit: matrices {mats.shape}, "
                       f"exponentials {exps.shape}, steps {steps.shape}")
    attrs = f["systems"].attrs
    guard = attrs.get("guard")
    if not isinstance(guard, (float, np.floating)) or not guard > 0:
        raise _corrupt(path, "/systems has no positive float attribute 'guard'")
    gap = attrs.get("taylor_gap", steps[-1] if len(steps) else 0.0)
    if not isinstance(gap, (float, np.floating)) or not np.isfinite(gap) or gap < 0:
        raise _corrupt(path, f"/systems attribute 'taylor_gap' = {gap!r} is not a finite "
                       "float >= 0")
    if not (np.all(np.isfinite(mats)) and np.all(np.isfinite(exps))
            and np.all(np.isfinite(steps))):
        raise _corrupt(path, "/systems holds non-finite numbers")
    return TransitionTable(mats, exps, steps, float(guard), float(gap))


def _text(f, path, key):
    return _dataset(f, path, key).asstr()[()]


def _read_scenario(f, path):
    import tomli_w

    from bucksim.model.scenario import loads_scenario

    resolved = _text(f, path, "scenario/resolved")
    text = _text(f, path, "scenario/text")
    source = str(f["scenario"].attrs.get("source", ""))
    where = f"{path} (stored scenario)"
    try:
        with warnings.catch_warnings():
            # a stored run is what it is: a step past its end was for the file's author
            warnings.simplefilter("ignore", StepAfterEndWarning)
            if resolved:
                doc = json.loads(resolved)
                if not isinstance(doc, dict):
                    raise _corrupt(path, "/scenario/resolved is not a JSON object")
                scenario = loads_scenario(tomli_w.dumps(doc), source=where)
            elif text:
                scenario = loads_scenario(text, source=where)
            else:
                raise _corrupt(path, "the stored scenario is empty")
    except json.JSONDecodeError as exc:
        raise _corrupt(path, f"/scenario/resolved is not valid JSON ({exc})") from None
    except ScenarioError as exc:
        raise StorageError(path, f"the stored scenario is not accepted by this bucksim: "
                           f"{exc}") from None
    return dataclasses.replace(scenario, source=source or None, text=text or None)


def _check_table(path, writer, scenario, stage, table):
    """Refuse a transition table that does not belong to the stored scenario."""
    fresh = stage.matrices
    # a tolerance, not equality, so harmless reordering of the stage arithmetic
    # in a later bucksim does not orphan old files; foreign data differ grossly
    if (table.matrices.shape != fresh.shape
            or not np.allclose(table.matrices, fresh, rtol=1e-12, atol=0.0)):
        raise StorageError(path, "stale or foreign run file: its stored system matrices are "
                           "not those of its stored scenario's power stage (written by "
                           f"bucksim {writer} with a different stage model, or altered)")
    if len(table.steps) == 0 or not np.isclose(table.steps[0], scenario.period, rtol=1e-12,
                                               atol=0.0):
        raise StorageError(path, "stale or foreign run file: its transition table is not "
                           f"built on the scenario's period {scenario.period:.6g} s")
