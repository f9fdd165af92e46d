"""Run files: a :class:`~bucksim.waveforms.Run` in HDF5, written atomically.

Layout, ``layout_version = 1`` (all values SI base units)::

    /                    file attributes
        layout_version   int: 1
        bucksim_version  str: version that wrote the file
        created          str: ISO 8601 UTC time of writing
        t_end            float [s]: time reached
        status           int: 0 completed, 1 diverged
        message          str: the engine's status message
        x_end_iL         float [A]: inductor current at t_end
        x_end_vC         float [V]: capacitor voltage at t_end
        x_end_<name>     float [V]: each further state at t_end (analog loop: w1 .. wk, vref)
        complete         bool: set last; absent or False means an unfinished writer
    /segments            one 1-D dataset per column of the segment table, all of one
                         length, chunked (up to 65536 rows), resizable; attribute ``units``
        t0 [s] float64   dt [s] float64   conduction int8 (attribute ``names``)
        system int32     x0_iL [A] float64   x0_vC [V] float64
        x0_<name> [V] float64: each further state (analog loop: x0_w1 .. x0_wk, x0_vref)
    /systems             the engine's transition table, stored rather than recomputed
                         so evaluating a stored run is bit-identical to the run in memory
        matrices         (n_sys, m, m): augmented M_s, z' = M_s z, z = [iL, vC, ..., 1]
                         (m = 3, or 4 + k with an analog compensator of order k)
        exponentials     (n_sys, K, m, m): expm(M_s steps[k])
        steps            (K,) [s]: steps[k] = period 2**-k
        attribute guard  [s]: longest interval searched for a crossing in one piece
    /scenario
        resolved         scalar string: JSON of scenario_to_dict (SI base units;
                         non-finite numbers as ``Infinity``, as Python's json writes)
        text             scalar string: the scenario file's text, "" if built in Python
        attribute source str: the scenario file's path, "" if built in Python

Writers create ``.NAME.<random>.partial`` in the target folder and rename it to
``NAME`` only once ``complete`` is set and the data are on disk, so ``NAME``
never holds half a run. Ctrl-C or an exception removes the partial file; a
killed process (SIGKILL, power loss) can leave one behind, safe to delete.
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import json
import os
import secrets
import signal
import threading
from datetime import UTC, datetime

import numpy as np

from .engine import EngineResult, TransitionTable, build_table, integrate
from .errors import ScenarioError, StorageError
from .stage import CONDUCTION_NAMES, CONTROLLER_UNIT, N_CONDUCTION, Stage
from .waveforms import UNITS, Run

__all__ = ["LAYOUT_VERSION", "open_run", "save_run", "simulate_to_file"]

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


# ----------------------------------------------------------------------------- writing

def _filters(compression):
    if compression not in COMPRESSIONS:
        raise ValueError(f"compression must be one of {COMPRESSIONS}, got {compression!r}")
    if compression is None:
        return {}
    # shuffle groups bytes of equal significance: float columns compress far better
    return {"compression": compression, "shuffle": True}


@contextlib.contextmanager
def _atomic_target(path):
    """Yield a temporary path next to ``path``; rename it to ``path`` on success."""
    final = os.path.abspath(os.fspath(path))
    folder, name = os.path.split(final)
    if not os.path.isdir(folder):
        raise FileNotFoundError(errno.ENOENT, "folder for the run file does not exist", folder)
    tmp = os.path.join(folder, f".{name}.{secrets.token_hex(4)}.partial")
    try:
        yield tmp
        # data must reach the disk before the rename does, or a power cut could
        # leave a complete-looking name over missing blocks
        _fsync(tmp)
        os.replace(tmp, final)
    except BaseException:  # KeyboardInterrupt too: never leave the partial file
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    with contextlib.suppress(OSError):  # make the rename durable where the OS allows
        _fsync(folder)


def _fsync(path):
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class _InterruptLatch:
    """Holds a Ctrl-C until the writer can stop cleanly, then raises it there.

    Python raises KeyboardInterrupt in whatever bytecode runs next; inside a
    weakref or ctypes callback (h5py and numba run such) it is printed as
    "Exception ignored" and lost, so the run would go on. The latch only sets
    a flag, which the writer checks between chunks. A second Ctrl-C raises at
    once. Installed only over Python's default handler, in the main thread.
    """

    def __init__(self):
        self.pending = False
        self._previous = None

    def __enter__(self):
        if (threading.current_thread() is threading.main_thread()
                and signal.getsignal(signal.SIGINT) is signal.default_int_handler):
            self._previous = signal.signal(signal.SIGINT, self._note)
        return self

    def _note(self, signum, frame):
        if self.pending:
            raise KeyboardInterrupt
        self.pending = True

    def check(self):
        if self.pending:
            raise KeyboardInterrupt

    def __exit__(self, exc_type, exc, tb):
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)
        if exc_type is None:
            self.check()  # a Ctrl-C during the final rename: the file is whole; still stop


class _RunWriter:
    """Lays out an open, empty HDF5 file and appends segment chunks to it."""

    def __init__(self, f, scenario, table: TransitionTable, compression, expected_rows,
                 latch: _InterruptLatch, state_names):
        import h5py

        from . import __version__
        from .scenario import scenario_to_dict

        self.f = f
        f.attrs["layout_version"] = LAYOUT_VERSION
        f.attrs["complete"] = False
        f.attrs["bucksim_version"] = __version__
        f.attrs["created"] = datetime.now(UTC).isoformat(timespec="seconds")
        seg = f.create_group("segments")
        filters = _filters(compression)
        chunk = int(min(CHUNK_ROWS, max(MIN_CHUNK_ROWS, expected_rows)))
        self.columns = []
        self.state_names = tuple(state_names)
        for name, dtype, unit in _columns(self.state_names):
            ds = seg.create_dataset(name, shape=(0,), maxshape=(None,), dtype=dtype,
                                    chunks=(chunk,), **filters)
            ds.attrs["units"] = unit
            self.columns.append(ds)
        seg["conduction"].attrs["names"] = list(CONDUCTION_NAMES)
        sysg = f.create_group("systems")
        z_units = "SI (z = [" + ", ".join(f"{n} {UNITS.get(n, CONTROLLER_UNIT)}"
                                         for n in self.state_names) + ", 1])"
        for name, data, unit in (("matrices", table.matrices, z_units),
                                 ("exponentials", table.exponentials, z_units),
                                 ("steps", table.steps, "s")):
            sysg.create_dataset(name, data=np.asarray(data, dtype=np.float64))
            sysg[name].attrs["units"] = unit
        sysg.attrs["guard"] = float(table.guard)
        scg = f.create_group("scenario")
        text_type = h5py.string_dtype()
        scg.create_dataset("resolved", data=json.dumps(scenario_to_dict(scenario)),
                           dtype=text_type)
        scg.create_dataset("text", data=scenario.text or "", dtype=text_type)
        scg.attrs["source"] = scenario.source or ""
        self.n = 0
        self.latch = latch

    def append(self, t0, dt, conduction, system, x0):
        """Add segment rows (the engine's ``sink`` signature)."""
        self.latch.check()
        k = len(t0)
        if k == 0:
            return
        n = len(self.state_names)
        if x0.shape != (k, n):
            raise ValueError(f"x0 must have shape ({k}, {n}), got {x0.shape}")
        cols = (t0, dt, conduction, system) + tuple(x0[:, j] for j in range(x0.shape[1]))
        for ds, col in zip(self.columns, cols):
            ds.resize((self.n + k,))
            ds[self.n:] = col
        self.n += k

    def finish(self, t_end, x_end, status, message):
        """Write the run's end state, then mark the file complete."""
        attrs = self.f.attrs
        attrs["t_end"] = float(t_end)
        attrs["status"] = int(status)
        attrs["message"] = str(message)
        for j, name in enumerate(self.state_names):
            attrs[f"x_end_{name}"] = float(x_end[j])
        self.latch.check()
        attrs["complete"] = True


def _report(path, n, t_end, status, message):
    return {"path": os.fspath(path), "n_segments": int(n), "t_end": float(t_end),
            "status": int(status), "message": str(message)}


def save_run(run: Run, path, compression=None) -> dict:
    """Write ``run`` to the HDF5 file ``path`` (replaced atomically if it exists).

    Parameters
    ----------
    run : Run
    path : str or os.PathLike
    compression : None, "gzip" or "lzf"
        ``None`` (default) writes and reads fastest; ``"gzip"`` (with shuffle)
        is for archives (smallest, slowest); ``"lzf"`` (with shuffle) sits
        between. See ``benchmarks/bench_storage.py``.

    Returns
    -------
    dict
        ``path``, ``n_segments``, ``t_end`` [s], ``status``, ``message``.
    """
    import h5py

    _filters(compression)
    seg = run.segments
    with _InterruptLatch() as latch, _atomic_target(path) as tmp, h5py.File(tmp, "x") as f:
        writer = _RunWriter(f, run.scenario, run.table, compression, len(seg), latch,
                            run.stage.state_names)
        for a in range(0, len(seg), _WRITE_ROWS):
            b = a + _WRITE_ROWS
            writer.append(seg.t0[a:b], seg.dt[a:b], seg.conduction[a:b], seg.system[a:b],
                          seg.x0[a:b])
        writer.finish(run.t_end, run.x_end, run.status, run.message)
    return _report(path, len(seg), run.t_end, run.status, run.message)


def simulate_to_file(scenario, path, compression=None, *, chunk_cycles: int | None = None,
                     progress=None) -> dict:
    """Simulate ``scenario`` and stream its segments into the HDF5 file ``path``.

    Memory stays bounded by one engine chunk (``chunk_cycles`` periods,
    default the engine's) whatever the run length. The file is written
    atomically as by :func:`save_run` (``compression`` as there), and
    :func:`open_run` reads it the same. Open or closed loop; the initial
    state is the scenario's (``run.start = "steady-state"`` is not applied
    here).

    Returns
    -------
    dict
        ``path``, ``n_segments``, ``t_end`` [s], ``status``, ``message``.
    """
    import h5py

    _filters(compression)
    stage = Stage(scenario)
    table = build_table(stage.matrices, scenario.period)
    options = {} if chunk_cycles is None else {"chunk_cycles": int(chunk_cycles)}
    # nominal segments per cycle: 2 phases (asynchronous) or 4 (with dead times)
    rows = scenario.n_cycles * (2 if scenario.switching.strategy == "asynchronous" else 4)
    with _InterruptLatch() as latch, _atomic_target(path) as tmp, h5py.File(tmp, "x") as f:
        writer = _RunWriter(f, scenario, table, compression, rows, latch, stage.state_names)
        if scenario.control.mode == "open-loop":
            res = integrate(stage, table=table, sink=writer.append, progress=progress,
                            **options)
        else:
            from .control import design
            from .engine.controlled import integrate_closed_loop
            comp = None if stage.analog else design(scenario.control.compensator,
                                                    scenario.period)
            res, _, _, _ = integrate_closed_loop(stage, comp, table=table, sink=writer.append,
                                                 progress=progress, **options)
        writer.finish(res.t_end, res.x_end, res.status, res.message)
    return _report(path, writer.n, res.t_end, res.status, res.message)


# ----------------------------------------------------------------------------- reading

def open_run(path) -> Run:
    """Read a run file written by :func:`save_run` or :func:`simulate_to_file`.

    The scenario is rebuilt from its stored resolved values, the stage from
    the scenario, and the transition table is the stored one, so
    ``open_run(p).summary()`` equals the summary of the run that was saved.

    Raises
    ------
    FileNotFoundError
        If ``path`` does not exist.
    StorageError
        If the file is not HDF5, is truncated or corrupt, is not a bucksim
        run, is incomplete, has a newer layout, or its matrices do not belong
        to its scenario (stale or foreign file). The message names the file.
    """
    import h5py

    name = os.fspath(path)
    if not os.path.exists(name):
        raise FileNotFoundError(errno.ENOENT, "no such run file", name)
    if os.path.isdir(name):
        raise StorageError(name, "is a folder, not a run file")
    if not h5py.is_hdf5(name):
        raise StorageError(name, "not an HDF5 file (no HDF5 signature); run files are HDF5")
    try:
        f = h5py.File(name, "r")
    except OSError as exc:
        raise StorageError(name, f"truncated or corrupt HDF5 file ({_first_line(exc)})") from None
    with f:
        try:
            return _read(f, name)
        except StorageError:
            raise
        except (OSError, KeyError, ValueError, TypeError) as exc:
            raise StorageError(name, f"corrupt run file ({_first_line(exc)})") from None


def _first_line(exc):
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


def _corrupt(path, what):
    return StorageError(path, f"corrupt run file: {what}")


def _read(f, path) -> Run:
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
    cols = _read_segments(f, path, stage.state_names)
    if len(cols["t0"]):
        cond, system, n_sys = cols["conduction"], cols["system"], len(table.matrices)
        if cond.min() < 0 or cond.max() >= N_CONDUCTION:
            raise _corrupt(path, f"conduction codes outside 0..{N_CONDUCTION - 1}")
        if system.min() < 0 or system.max() >= n_sys:
            raise _corrupt(path, f"system ids outside 0..{n_sys - 1}")
    result = EngineResult(cols["t0"], cols["dt"], cols["conduction"], cols["system"], cols["x0"],
                          x_end=np.array([float(attrs[f"x_end_{n}"])
                                          for n in stage.state_names]),
                          t_end=float(attrs["t_end"]), status=int(attrs["status"]),
                          message=str(attrs["message"]))
    return Run(scenario, stage, table, result)


def _dataset(f, path, key, ndim=None):
    import h5py

    ds = f.get(key)
    if not isinstance(ds, h5py.Dataset):
        raise _corrupt(path, f"dataset /{key} is missing")
    if ndim is not None and ds.ndim != ndim:
        raise _corrupt(path, f"/{key} has {ds.ndim} dimensions, expected {ndim}")
    return ds


def _read_segments(f, path, state_names):
    """Segment columns by name, plus ``x0`` (n_seg, n_states) read in place."""
    sets = {}
    for name, dtype, _unit in _columns(state_names):
        ds = _dataset(f, path, f"segments/{name}", 1)
        if ds.dtype != dtype:
            raise _corrupt(path, f"/segments/{name} has type {ds.dtype}, "
                           f"expected {np.dtype(dtype)}")
        sets[name] = ds
    lengths = {name: ds.shape[0] for name, ds in sets.items()}
    if len(set(lengths.values())) > 1:
        raise _corrupt(path, "segment columns differ in length ("
                       + ", ".join(f"{k} {v}" for k, v in lengths.items()) + ")")
    n = lengths["t0"]
    cols = {name: sets[name][()] for name in ("t0", "dt", "conduction", "system")}
    # block by block into one array: the states are never held twice (HDF5's own
    # strided read into a column is far slower and not leaner)
    x0 = np.empty((n, len(state_names)))
    for j, name in enumerate(state_names):
        ds = sets[f"x0_{name}"]
        for a in range(0, n, _WRITE_ROWS):
            x0[a:a + _WRITE_ROWS, j] = ds[a:a + _WRITE_ROWS]
    cols["x0"] = x0
    return cols


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
    guard = f["systems"].attrs.get("guard")
    if not isinstance(guard, (float, np.floating)):
        raise _corrupt(path, "/systems has no float attribute 'guard'")
    return TransitionTable(mats, exps, steps, float(guard))


def _text(f, path, key):
    return _dataset(f, path, key).asstr()[()]


def _read_scenario(f, path):
    import tomli_w

    from .scenario import loads_scenario

    resolved = _text(f, path, "scenario/resolved")
    text = _text(f, path, "scenario/text")
    source = str(f["scenario"].attrs.get("source", ""))
    where = f"{path} (stored scenario)"
    try:
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
