"""Exceptions raised by bucksim."""

from __future__ import annotations


class ScenarioError(ValueError):
    """A scenario value is missing, unknown, of the wrong unit or non-physical.

    The message names the file (when known), the line (when it can be
    located), the dotted key, what was expected and the value received::

        rail.toml:12: inductor.inductance: must be > 0 H, got -2.2e-06

    Parameters
    ----------
    key : str
        Dotted scenario key, e.g. ``"inductor.inductance"``.
    expected : str
        What the key must hold, in plain words with units.
    value : object, optional
        The offending value; omitted from the message when ``_MISSING``.
    file : str, optional
        Scenario file the value came from.
    line : int, optional
        1-based line of the key in that file.
    """

    _MISSING = object()

    def __init__(self, key, expected, value=_MISSING, file=None, line=None):
        self.key = key
        self.expected = expected
        self.value = value
        self.file = file
        self.line = line
        super().__init__(self._compose())

    def _compose(self):
        where = ""
        if self.file is not None:
            where = f"{self.file}:{self.line}: " if self.line else f"{self.file}: "
        got = "" if self.value is ScenarioError._MISSING else f", got {self.value!r}"
        return f"{where}{self.key}: {self.expected}{got}"

    def located(self, file=None, line=None):
        """Return a copy of this error that also names ``file`` and ``line``."""
        return ScenarioError(self.key, self.expected, self.value,
                             file if file is not None else self.file,
                             line if line is not None else self.line)

    def __reduce__(self):  # keep pickling (process pools) working
        return (ScenarioError, (self.key, self.expected, self.value, self.file, self.line))


class SimulationError(RuntimeError):
    """The engine could not continue (e.g. the state diverged)."""


class StorageError(ValueError):
    """A run file cannot be read as a bucksim run.

    Raised for a file that is not HDF5, is truncated or corrupt, lacks the
    bucksim layout, was never completed, was written with a newer layout, or
    whose stored matrices do not belong to its stored scenario. The message
    names the file and the problem::

        rail.h5: written with layout version 99; this bucksim reads up to 1

    Parameters
    ----------
    path : str or os.PathLike
        The run file.
    problem : str
        What is wrong, in plain words.
    """

    def __init__(self, path, problem):
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")

    def __reduce__(self):  # keep pickling (process pools) working
        return (StorageError, (self.path, self.problem))


class SweepError(ValueError):
    """A sweep cannot run as asked (bad keys or values, a table from another sweep)."""


class StepAfterEndWarning(UserWarning):
    """A load or supply step of a scenario file lies at or after the end of its run.

    Valid, but the step never happens, which is most likely not what the
    file's author meant. Not raised when a stored run's scenario is read back:
    the run is what it is.
    """
