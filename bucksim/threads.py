"""Small dense linear algebra on one BLAS thread, wherever bucksim runs.

bucksim's matrices are small (3 x 3 to a few dozen rows: the stage, the Van
Loan blocks of the moments, the shooting's Jacobians). A threaded BLAS gains
nothing on them and costs far more than it saves: on a busy machine its threads
spin against each other and every other process. A steady-state point of a
two-state rail took 52 ms on one BLAS thread and 1.5 s with OpenBLAS's default
two threads while another job used the two cores
(``benchmarks/bench_threads.py``). Results are unaffected: with one thread a
reduction is never split differently, so rows are bit-identical wherever they
run.

:func:`serial_blas` sets every loaded BLAS to one thread through its own entry
point (OpenBLAS, MKL, BLIS; threadpoolctl as well when installed), because
environment variables are read only when a library loads and numpy and scipy
each bring their own OpenBLAS, which may already be loaded by then. It counts
its users, so nested calls and threads of one process set the count once, and
the last to leave restores the caller's counts. :func:`single_blas_thread`
wraps bucksim's public entry points in it.
"""

from __future__ import annotations

import contextlib
import ctypes
import functools
import os
import sys
import threading

# (file name part, get, set) of the thread-count entry points of BLAS libraries
_BLAS_SETTERS = (("openblas", "openblas_get_num_threads", "openblas_set_num_threads"),
                 ("openblas", "scipy_openblas_get_num_threads",
                  "scipy_openblas_set_num_threads"),
                 ("openblas", "scipy_openblas_get_num_threads64_",
                  "scipy_openblas_set_num_threads64_"),
                 ("mkl", "MKL_Get_Max_Threads", "MKL_Set_Num_Threads"),
                 ("blis", "bli_thread_get_num_threads", "bli_thread_set_num_threads"))
_blas_lock = threading.Lock()
_blas_users = 0
_blas_saved = []
_blas_libs = {}  # path -> (get, set) or None, for every BLAS seen mapped so far
_scan_key, _scan = None, []  # len(sys.modules) at the last reading of the maps, its result
_controller = None  # threadpoolctl's ThreadpoolController; False: not installed


def _mapped_blas_paths():
    """Paths of the BLAS libraries mapped into this process (Linux; else empty)."""
    paths = set()
    try:
        with open("/proc/self/maps", encoding="utf-8", errors="replace") as f:
            for line in f:
                fields = line.split(maxsplit=5)
                if len(fields) == 6:
                    name = os.path.basename(fields[5].strip()).lower()
                    if any(part in name for part, _, _ in _BLAS_SETTERS):
                        paths.add(fields[5].strip())
    except OSError:  # not Linux: threadpoolctl (if installed) and the environment
        pass
    return sorted(paths)


def _blas_controls():
    """``(get, set)`` thread-count functions of every BLAS loaded in this process.

    numpy and scipy are imported first, so their BLAS libraries (each wheel
    brings its own) are loaded and found before a point needs them. The maps
    are read again whenever a module was imported since the last reading (a
    library is loaded by an import), so a BLAS loaded later is found too, and
    a caller that imports nothing new pays nothing for the search.
    """
    global _scan_key, _scan
    import numpy  # noqa: F401 - loads numpy's BLAS
    import scipy.linalg  # noqa: F401 - loads scipy's BLAS and LAPACK

    if _scan_key == len(sys.modules):
        return _scan
    controls = []
    for path in _mapped_blas_paths():
        if path not in _blas_libs:
            _blas_libs[path] = _thread_functions(path)
        if _blas_libs[path] is not None:
            controls.append(_blas_libs[path])
    _scan_key, _scan = len(sys.modules), controls
    _threadpool_controller(refresh=True)
    return controls


def _thread_functions(path):
    try:
        lib = ctypes.CDLL(path)
    except OSError:
        return None
    name = os.path.basename(path).lower()
    for part, get_name, set_name in _BLAS_SETTERS:
        if part not in name:
            continue
        get, put = getattr(lib, get_name, None), getattr(lib, set_name, None)
        if get is not None and put is not None:
            get.restype, get.argtypes = ctypes.c_int, []
            put.restype, put.argtypes = None, [ctypes.c_int]
            return get, put
    return None


def _threadpool_controller(refresh=False):
    """threadpoolctl's controller of the loaded libraries (None if not installed),
    rebuilt with ``refresh`` (a new scan of the loaded libraries)."""
    global _controller
    if _controller is False:        # not installed: looked for once
        return None
    if _controller is None or refresh:
        try:
            from threadpoolctl import ThreadpoolController
        except ImportError:
            _controller = False
            return None
        _controller = ThreadpoolController()
    return _controller


def _threadpoolctl_limit():
    """A threadpoolctl limiter holding every BLAS at one thread, or None if not installed."""
    controller = _threadpool_controller()
    return None if controller is None else controller.limit(limits=1, user_api="blas")


@contextlib.contextmanager
def serial_blas():
    """Run the enclosed code with one BLAS thread; restore the counts on leaving.

    Counted, so threads of one process (Dask threads) may nest it: the first
    to enter sets one thread, the last to leave restores the old counts.
    """
    global _blas_users, _blas_saved
    with _blas_lock:
        if _blas_users == 0:
            controls = _blas_controls()
            # the caller's counts, read before anything sets them (threadpoolctl too)
            saved = [(put, get()) for get, put in controls]
            _blas_saved = saved + [_threadpoolctl_limit()]
            for _, put in controls:
                put(1)
        _blas_users += 1
    try:
        yield
    finally:
        with _blas_lock:
            _blas_users -= 1
            if _blas_users == 0:
                *counts, limiter = _blas_saved
                if limiter is not None:  # threadpoolctl >= 3 restores; 2.x unregisters
                    getattr(limiter, "restore_original_limits",
                            getattr(limiter, "unregister", lambda: None))()
                for put, n in counts:
                    put(n)


def single_blas_thread(func):
    """Decorator: run ``func`` inside :func:`serial_blas`."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with serial_blas():
            return func(*args, **kwargs)

    return wrapper
