"""bucksim: exact cycle-by-cycle simulation of buck converter power stages.

Quick start::

    import bucksim
    sc = bucksim.load_scenario("scenarios/core_rail_1v0.toml")
    run = bucksim.simulate(sc)
    print(run.summary())

The engine (numba) and the modules that need scipy are imported on first use, so
importing the package and ``bucksim --help`` stay fast.
"""

import importlib
from typing import TYPE_CHECKING

from bucksim.errors import ScenarioError, SimulationError, StorageError
from bucksim.version import package_version

if TYPE_CHECKING:  # the names below load lazily (``__getattr__``); type checkers see them here
    from bucksim.analysis.budget import estimate
    from bucksim.analysis.crosscheck import crosscheck
    from bucksim.studies.compare import compare
    from bucksim.studies.light_modes import pfm_steady_state
    from bucksim.studies.pulse_skipping import pulse_skipping_steady_state
    from bucksim.studies.reverse import reverse_current
    from bucksim.sweeps.plan import sweep
    from bucksim.waveforms import Run

__version__ = package_version()


def load_scenario(path):
    """Read a schema-1 TOML scenario file (see :mod:`bucksim.model.scenario`)."""
    from bucksim.model.scenario import load_scenario as _load
    return _load(path)


def simulate(scenario, x0=None, **kw):
    """Simulate a scenario exactly, cycle by cycle (see :func:`bucksim.simulation.simulate`)."""
    from bucksim.simulation import simulate as _simulate
    return _simulate(scenario, x0, **kw)


def open_run(path):
    """Open a run stored with :meth:`Run.save` (see :func:`bucksim.waveforms.open_run`)."""
    from bucksim.waveforms import open_run as _open
    return _open(path)


def steady_state(scenario, x0=None, *, controller=None, tol=None, max_iter=None,
                 max_brute_cycles=None):
    """Periodic steady state by shooting-Newton, open or closed loop, one signature
    (see :func:`bucksim.steady.solve.steady_state`; closed loop:
    :func:`bucksim.steady.closed_loop.closed_loop_steady_state`)."""
    from bucksim.steady.solve import steady_state as _ss
    return _ss(scenario, x0, controller=controller, tol=tol, max_iter=max_iter,
               max_brute_cycles=max_brute_cycles)


# Public names whose modules import scipy (0.4 s to 1 s) or the engine: each is
# imported on first access and then kept in the module's namespace.
_LAZY = {
    "estimate": "bucksim.analysis.budget",
    "crosscheck": "bucksim.analysis.crosscheck",
    "compare": "bucksim.studies.compare",
    "reverse_current": "bucksim.studies.reverse",
    "pfm_steady_state": "bucksim.studies.light_modes",
    "pulse_skipping_steady_state": "bucksim.studies.pulse_skipping",
    "sweep": "bucksim.sweeps.plan",
    "Run": "bucksim.waveforms",
}


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'bucksim' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


__all__ = ["load_scenario", "simulate", "open_run", "steady_state", "estimate", "crosscheck",
           "sweep", "reverse_current", "compare", "pfm_steady_state",
           "pulse_skipping_steady_state", "Run", "ScenarioError", "SimulationError",
           "StorageError", "__version__"]
