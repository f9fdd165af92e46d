"""A TOML table being read from a scenario file: typed getters, unknown keys refused.

Every getter raises :class:`~bucksim.errors.ScenarioError` naming the dotted key
(``inductor.inductance``); the reader adds the file and line.
"""

from __future__ import annotations

import numbers

from bucksim.errors import ScenarioError
from bucksim.model.units import example, parse_quantity

#: Marks a key without a default.
REQUIRED = object()
_REQUIRED = REQUIRED


class Table:
    """A TOML table being read: typed getters; keys not in ``allowed`` rejected."""

    def __init__(self, data, key, allowed, where=None):
        self.data = data
        self.key = key
        for name, value in data.items():
            if name not in allowed:
                place = where or (f"[{key}]" if key else "the top level")
                raise ScenarioError(self.sub(name), f"is not a known key (allowed in {place}: "
                                    + ", ".join(allowed) + ")", value)

    def sub(self, name):
        return f"{self.key}.{name}" if self.key else name

    def _get(self, name, default, expected):
        if name in self.data:
            return self.data[name]
        if default is _REQUIRED:
            raise ScenarioError(self.sub(name), f"is required ({expected})")
        return default

    def quantity(self, name, unit, default=_REQUIRED):
        """A number in ``unit``, or a prefixed string; ``default`` when absent."""
        if name not in self.data:
            hint = f"in {unit}, e.g. {example(unit)!r}" if unit else "a number"
            return self._get(name, default, hint)
        return parse_quantity(self.data[name], unit, self.sub(name))

    def integer(self, name, default=_REQUIRED):
        value = self._get(name, default, "an integer")
        if name not in self.data:
            return value
        if isinstance(value, bool) or not isinstance(value, numbers.Integral):
            raise ScenarioError(self.sub(name), "must be an integer", value)
        return int(value)

    def string(self, name, default=_REQUIRED):
        """A string; which strings are valid is checked by the part itself."""
        value = self._get(name, default, "a string")
        if name in self.data and not isinstance(value, str):
            raise ScenarioError(self.sub(name), "must be a string", value)
        return value

    def table(self, name, allowed, required=False):
        """The sub-table ``name`` as a :class:`Table`; ``None`` when absent."""
        if name not in self.data:
            if required:
                raise ScenarioError(self.sub(name), f"is required: add a [{self.sub(name)}] "
                                    "table with " + ", ".join(allowed))
            return None
        value = self.data[name]
        if not isinstance(value, dict):
            raise ScenarioError(self.sub(name), "must be a table with keys "
                                + ", ".join(allowed), value)
        return Table(value, self.sub(name), allowed)

    def tables(self, name, allowed):
        """An array of tables (``steps = [{...}, ...]`` or ``[[...]]``)."""
        value = self.data.get(name, [])
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            raise ScenarioError(self.sub(name), "must be an array of tables {"
                                + ", ".join(allowed) + "}", value)
        return [Table(v, f"{self.sub(name)}[{i}]", allowed, f"{self.sub(name)}[{i}]")
                for i, v in enumerate(value)]
