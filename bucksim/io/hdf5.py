"""Run files: a :class:`~bucksim.waveforms.Run` in HDF5, written atomically.

Layout, ``layout_version = 1`` (all values SI base units)::

    /                    file attributes
        layout_version   int: 1
        bucksim_version  str: version that wrote the file
        created          str: ISO 8601 UTC time of writing
        t_end            float [s]: time reached
        status           int: 0 completed, 1 diverged, 3 control loop did not settle
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
        attribute taylor_gap [s]: shortest table step; shorter remainders and zero
                         brackets are finished on the Taylor series (files without
                         it read steps[-1], the value every writer has used)
    /scenario
        resolved         scalar string: JSON of scenario_to_dict (SI base units;
                         non-finite numbers as ``Infinity``, as Python's json writes)
        text             scalar string: the scenario file's text, "" if built in Python
        attribute source str: the scenario file's path, "" if built in Python

Writers create ``.NAME.<random>.partial`` in the target folder and rename it to
``NAME`` only once ``complete`` is set and the data are on disk, so ``NAME``
never holds half a run. Ctrl-C or an exception removes the partial file; a
killed process (SIGKILL, power loss) can leave one behind, safe to delete.

Reading and its checks live in :mod:`bucksim.io.runfile` (``open_run`` is
re-exported here); :mod:`bucksim.analysis.stored` summarises a file block by block.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import secrets
import signal
import threading
from datetime import UTC, datetime

import numpy as np

from bucksim.engine.driver import TransitionTable
from bucksim.io.runfile import (  # noqa: F401
    _WRITE_ROWS,
    CHUNK_ROWS,
    COMPRESSIONS,
    LAYOUT_VERSION,
    MIN_CHUNK_ROWS,
    RunHeader,
    _columns,
    check_rows,
    guarded_read,
    open_run_file,
    read_rows,
)
from bucksim.model.stage import CONDUCTION_NAMES, CONTROLLER_UNIT, UNITS

__all__ = ["LAYOUT_VERSION", "RunHeader", "check_rows", "open_run_file", "read_rows",
           "save_run", "streamed_run"]

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

        from bucksim.model.scenario import scenario_to_dict
        from bucksim.version import package_version

        self.f = f
        f.attrs["layout_version"] = LAYOUT_VERSION
        f.attrs["complete"] = False
        f.attrs["bucksim_version"] = package_version()
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
        sysg.attrs["taylor_gap"] = float(table.taylor_gap)
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
        for ds, col in zip(self.columns, cols, strict=True):
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


def save_run(run, path, compression=None) -> dict:
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


@contextlib.contextmanager
def streamed_run(path, scenario, table, compression=None, rows: int = 0, state_names=()):
    """A run file written segment chunk by chunk, atomically (as :func:`save_run`).

    Yields the writer: call ``writer.append(t0, dt, conduction, system, x0)``
    with each chunk and ``writer.finish(t_end, x_end, status, message)`` once;
    ``writer.n`` counts the rows. The file appears at ``path`` only when the
    block ends without an exception.
    """
    import h5py

    _filters(compression)
    with _InterruptLatch() as latch, _atomic_target(path) as tmp, h5py.File(tmp, "x") as f:
        yield _RunWriter(f, scenario, table, compression, rows, latch, state_names)


def report(path, n, t_end, status, message) -> dict:
    """What a writer returns: ``path``, ``n_segments``, ``t_end`` [s], ``status``, ``message``."""
    return _report(path, n, t_end, status, message)
