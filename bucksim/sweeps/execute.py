"""Running sweep points: one point, a batch of points, and the executors for batches.

A point is the base scenario with some keys replaced, solved for its periodic
steady state and summarised over ``run.summary_cycles`` periods started from
that state. Batches run in this process (one worker), in a pool of local
processes, or on a Dask cluster; every path calls :func:`run_batch`, so a
point's row does not depend on where it ran.

Each point runs its BLAS and LAPACK calls on one thread, wherever it runs (in
this process, a pool worker or a Dask worker): :func:`bucksim.threads.serial_blas`,
which says why (bit-identical rows wherever they run; a point about 20 times
slower on a loaded machine otherwise). Pool workers also start with the
thread-count variables of :data:`WORKER_ENV` set.

Pool workers end with the process that started them: on Linux the kernel
sends them SIGKILL when it dies (``prctl(PR_SET_PDEATHSIG)``), and elsewhere a
watchdog thread in each worker exits when its parent is gone. A SIGKILLed sweep
leaves no worker behind (they would otherwise wait on their task queue for
ever). Dask's own workers already watch their nanny and scheduler.
"""

from __future__ import annotations

import concurrent.futures as cf
import ctypes
import math
import multiprocessing
import os
import signal
import sys
import threading
import time

from bucksim.threads import _blas_controls, serial_blas

WORKER_ENV = {"NUMBA_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1",
              "MKL_NUM_THREADS": "1"}

PR_SET_PDEATHSIG = 1  # linux/prctl.h


def _die_with_parent(parent_pid):
    """End this process when ``parent_pid`` (the sweep) ends, however it ends."""
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):
            pass
    if os.getppid() != parent_pid:  # it died before the request was in place
        os._exit(1)

    def watch():
        # covers platforms without prctl; a point in compiled code holds the
        # GIL, so this may run late there, which is why prctl comes first
        while os.getppid() == parent_pid:
            time.sleep(0.5)
        os._exit(1)

    threading.Thread(target=watch, name="bucksim-parent-watch", daemon=True).start()


def _init_worker(parent_pid=None):
    """Process-pool initializer: serial numerical libraries for the worker's life,
    and no life beyond the sweep's."""
    if parent_pid is not None:
        _die_with_parent(parent_pid)
    for key, value in WORKER_ENV.items():
        os.environ[key] = value
    for _, put in _blas_controls():
        put(1)


# ----------------------------------------------------------------------------- points

def _error_text(exc):
    from bucksim.errors import ScenarioError, SimulationError

    text = str(exc) if isinstance(exc, (ScenarioError, SimulationError)) \
        else f"{type(exc).__name__}: {exc}"
    return " ".join(text.split()) or type(exc).__name__


def _steady_columns(ss):
    import numpy as np

    mu = np.abs(np.asarray(ss.floquet))
    return {"steady.iterations": float(ss.iterations), "steady.residual": float(ss.residual),
            "steady.method": ss.method,
            "steady.max_floquet": float(np.max(mu)) if mu.size else math.nan}


def run_point(scenario, index, draw, values):
    """Row for one point (see :mod:`bucksim.sweeps.table` for its columns).

    Parameters
    ----------
    scenario : Scenario
        The base scenario.
    index : int
        Point index.
    draw : int or None
        Monte Carlo draw index (``None``: no draws in this sweep).
    values : dict
        ``{dotted key: value}`` applied to ``scenario`` in order with
        :func:`bucksim.model.scenario.replace_key`.

    Returns
    -------
    dict
        Never raises for a bad point: the reason goes to ``"error"`` and the
        metrics are left out (NaN in the table). A point fails when its
        scenario is invalid, it has no periodic steady state, that state is
        unstable (a Floquet multiplier of modulus >= 1; the ``steady.*``
        columns are kept), or the settled run does not complete (a state
        diverged, a closed loop did not settle: the run's status and message).
    """
    from bucksim.errors import SimulationError
    from bucksim.model.scenario import replace_key
    from bucksim.simulation import simulate_settled
    from bucksim.sweeps.table import flatten

    row = {"point": index}
    if draw is not None:
        row["draw"] = draw
    row.update(values)
    steady = {"steady.iterations": math.nan, "steady.residual": math.nan,
              "steady.method": "", "steady.max_floquet": math.nan}
    try:
        sc = scenario
        for key, value in values.items():
            sc = replace_key(sc, key, value)
        run = simulate_settled(sc)
        steady = _steady_columns(run.steady_state)
        n = sc.run.summary_cycles
        if not run.success:
            raise SimulationError(f"the settled run did not complete (status {run.status}): "
                                  f"{run.message}")
        if not run.steady_state.stable:
            # an unstable periodic orbit is a solution nobody sees on the bench:
            # any disturbance grows, so its metrics are not the point's
            raise SimulationError(
                f"periodic steady state is unstable: largest Floquet multiplier "
                f"|mu| = {steady['steady.max_floquet']:.4g} >= 1, so a small disturbance "
                f"grows and the circuit does not stay at this operating point")
        row.update(flatten(run.summary(cycles=n).to_dict()))
        error = ""
    except Exception as exc:  # a bad point is data, the sweep goes on
        error = _error_text(exc)
        if getattr(exc, "steady_state", None) is not None:  # refused after shooting
            steady = _steady_columns(exc.steady_state)
    row.update(steady)
    row["error"] = error
    return row


def run_batch(scenario, points):
    """Rows of ``points`` (a list of ``(index, draw, values)``), in order."""
    with serial_blas():
        return [run_point(scenario, i, d, v) for i, d, v in points]


# ----------------------------------------------------------------------------- executors

MISSING_DASK = ("running a sweep on a Dask cluster needs Dask's distributed scheduler, "
                "which is not installed: pip install bucksim[cluster]")


def _import_distributed():
    try:
        import distributed
    except ImportError as exc:
        raise ImportError(MISSING_DASK) from exc
    return distributed


def _is_dask_client(obj):
    return type(obj).__module__.split(".", 1)[0] == "distributed" and hasattr(obj, "nthreads")


class Runner:
    """Runs batches where asked; a context manager that releases what it started.

    Parameters
    ----------
    workers : int, optional
        Local processes (default ``os.cpu_count()``; 1 = this process, no pool),
        or the worker processes of ``cluster="local"``.
    cluster : None, "local", str, dask Client, Dask cluster or Executor
        ``None``: local processes. ``"local"``: start a Dask ``LocalCluster``
        and close it afterwards. An address (``"tcp://host:8786"``): connect to
        that scheduler. A ``distributed.Client``, a Dask cluster object or any
        ``concurrent.futures.Executor`` is used as given and left open.
    """

    def __init__(self, workers=None, cluster=None):
        if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int)
                                    or workers < 1):
            raise ValueError(f"workers: must be an integer >= 1, got {workers!r}")
        self.workers = workers
        self.cluster = cluster
        self._owned = []  # things to close, last first
        self._client = None
        self._executor = None
        self._pool_size = None
        self.kind = "serial"
        if cluster is None:
            n = workers or os.cpu_count() or 1
            if n > 1:
                self.kind, self._pool_size = "processes", n
        elif isinstance(cluster, cf.Executor):
            self.kind, self._executor = "executor", cluster
        elif isinstance(cluster, str) or _is_dask_client(cluster) or \
                hasattr(cluster, "scheduler_address"):
            self.kind = "dask"
            self._client = self._connect(cluster)
        else:
            raise ValueError(f"cluster: must be None, 'local', a scheduler address such as "
                             f"'tcp://host:8786', a Dask client or cluster, or an Executor; "
                             f"got {cluster!r}")

    def _connect(self, cluster):
        distributed = _import_distributed()
        if _is_dask_client(cluster):
            return cluster
        if cluster == "local":
            # no dashboard; the scheduler's small HTTP server (health checks)
            # takes a free port, not the usual 8787 another cluster may hold
            lc = distributed.LocalCluster(n_workers=self.workers or os.cpu_count() or 1,
                                          threads_per_worker=1, processes=True,
                                          dashboard_address=None, env=dict(WORKER_ENV),
                                          scheduler_kwargs={"dashboard": False,
                                                            "dashboard_address": ":0"})
            self._owned.append(lc)
            cluster = lc
        target = cluster if isinstance(cluster, str) else cluster.scheduler_address
        try:
            client = distributed.Client(target, timeout="20s", set_as_default=False)
        except (OSError, ValueError) as exc:  # refused, timed out, or not an address
            self.close()
            raise ConnectionError(f"cluster: cannot connect to the Dask scheduler at "
                                  f"{target!r}: {exc}") from exc
        self._owned.append(client)
        return client

    @property
    def slots(self):
        """Batches that can run at once."""
        if self.kind == "processes":
            return self._pool_size
        if self.kind == "dask":
            return max(1, sum(self._client.nthreads().values()))
        if self.kind == "executor":
            return max(1, getattr(self._executor, "_max_workers", 1))
        return 1

    def run(self, scenario, batches):
        """Yield each batch's rows as it finishes (in completion order)."""
        if self.kind == "serial":
            for batch in batches:
                yield run_batch(scenario, batch)
            return
        if self.kind == "dask":
            distributed = _import_distributed()
            futures = [self._client.submit(run_batch, scenario, b, pure=False) for b in batches]
            waiter = distributed.as_completed(futures, loop=self._client.loop)
        else:
            if self.kind == "processes":
                # spawn, not fork: the parent may hold threads (progress bar,
                # a Dask client) and a forked child would inherit their locks.
                # The workers are started by submit() in this thread, which
                # outlives them (PR_SET_PDEATHSIG follows the starting thread).
                self._executor = cf.ProcessPoolExecutor(
                    max_workers=min(self._pool_size, max(1, len(batches))),
                    mp_context=multiprocessing.get_context("spawn"),
                    initializer=_init_worker, initargs=(os.getpid(),))
                self._owned.append(self._executor)
            futures = [self._executor.submit(run_batch, scenario, b) for b in batches]
            waiter = cf.as_completed(futures)
        try:
            for future in waiter:
                yield future.result()
        finally:
            for future in futures:
                future.cancel()

    def close(self):
        while self._owned:
            thing = self._owned.pop()
            if isinstance(thing, cf.Executor):
                thing.shutdown(wait=True, cancel_futures=True)
            else:
                thing.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
