"""Value checks shared by the part dataclasses: each raises
:class:`~bucksim.errors.ScenarioError` naming the dotted scenario key."""

from __future__ import annotations

import math

from bucksim.errors import ScenarioError


def finite(key, value, unit):
    """``value`` must be a finite real number (not a bool) in ``unit``."""
    if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
        raise ScenarioError(key, f"must be a finite number in {unit}", value)


def positive(key, value, unit):
    """``value`` must be finite and > 0."""
    finite(key, value, unit)
    if value <= 0:
        raise ScenarioError(key, f"must be > 0 {unit}", value)


def non_negative(key, value, unit):
    """``value`` must be finite and >= 0."""
    finite(key, value, unit)
    if value < 0:
        raise ScenarioError(key, f"must be >= 0 {unit}", value)
