"""bucksim: exact cycle-by-cycle simulation of buck converter power stages.

Quick start::

    import bucksim
    sc = bucksim.load_scenario("scenarios/core_rail_1v0.toml")
    run = bucksim.simulate(sc)
    print(run.summary())

The engine (numba) is imported on first use, so importing the package and
``bucksim --help`` stay fast.
"""

from importlib.metadata import PackageNotFoundError, version as _version

from .compare import compare
from .crosscheck import crosscheck
from .errors import ScenarioError, SimulationError, StorageError
from .estimate import estimate
from .reverse import reverse_current
from .sweep import sweep

try:
    __version__ = _version("bucksim")
except PackageNotFoundError:  # running from a source tree
    __version__ = "0.0.0+source"


def load_scenario(path):
    """Read a schema-1 TOML scenario file (see :mod:`bucksim.scenario`)."""
    from .scenario import load_scenario as _load
    return _load(path)


def simulate(scenario, x0=None, **kw):
    """Simulate a scenario exactly, cycle by cycle (see :func:`bucksim.simulation.simulate`)."""
    from .simulation import simulate as _simulate
    return _simulate(scenario, x0, **kw)


def open_run(path):
    """Open a run stored with :meth:`Run.save` (see :mod:`bucksim.storage`)."""
    from .storage import open_run as _open
    return _open(path)


def steady_state(scenario, x0=None, *, controller=None, tol=None, max_iter=None,
                 max_brute_cycles=None):
    """Periodic steady state by shooting-Newton, open or closed loop, one signature
    (see :func:`bucksim.steady.steady_state`; closed loop:
    :func:`bucksim.steady_loop.closed_loop_steady_state`)."""
    from .steady import steady_state as _ss
    return _ss(scenario, x0, controller=controller, tol=tol, max_iter=max_iter,
               max_brute_cycles=max_brute_cycles)


def __getattr__(name):
    if name == "Run":
        from .waveforms import Run
        return Run
    raise AttributeError(f"module 'bucksim' has no attribute {name!r}")


__all__ = ["load_scenario", "simulate", "open_run", "steady_state", "estimate", "crosscheck",
           "sweep", "reverse_current", "compare", "Run", "ScenarioError", "SimulationError", "StorageError", "__version__"]
