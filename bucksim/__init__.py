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


__all__ = ["load_scenario", "simulate", "Run", "ScenarioError", "SimulationError", "__version__"]
