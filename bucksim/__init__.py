"""bucksim: exact cycle-by-cycle simulation of buck converter power stages.

Quick start::

    import bucksim
    sc = bucksim.load_scenario("scenarios/core_rail_1v0.toml")
    run = bucksim.simulate(sc)
    print(run.summary())
"""

from importlib.metadata import PackageNotFoundError, version as _version

from .errors import ScenarioError, SimulationError
from .simulation import simulate
from .waveforms import Run

try:
    __version__ = _version("bucksim")
except PackageNotFoundError:  # running from a source tree
    __version__ = "0.0.0+source"


def load_scenario(path):
    """Read a schema-1 TOML scenario file (see :mod:`bucksim.scenario`)."""
    from .scenario import load_scenario as _load
    return _load(path)


def open_run(path):
    """Open a run stored with :meth:`Run.save` (see :mod:`bucksim.storage`)."""
    from .storage import open_run as _open
    return _open(path)


def steady_state(scenario, **kw):
    """Periodic steady state by shooting-Newton (see :mod:`bucksim.steady`)."""
    from .steady import steady_state as _ss
    return _ss(scenario, **kw)


def estimate(scenario):
    """Closed-form loss budget (see :mod:`bucksim.estimate`)."""
    from .estimate import estimate as _est
    return _est(scenario)


def crosscheck(scenario, run=None, cycles=None):
    """Closed form vs waveform integrals, item by item (see :mod:`bucksim.crosscheck`)."""
    from .crosscheck import crosscheck as _cc
    return _cc(scenario, run, cycles)


__all__ = ["load_scenario", "simulate", "open_run", "steady_state", "estimate", "crosscheck",
           "Run", "ScenarioError", "SimulationError", "__version__"]
