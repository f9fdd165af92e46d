"""Closed-loop controllers: compensator design data and the controlled engine driver.

The compensator is given as a designer writes it, in Hz:

.. math::

    G_c(s) = \\frac{\\omega_I}{s}\\,
             \\frac{\\prod_i (1 + s / 2\\pi f_{z,i})}{\\prod_j (1 + s / 2\\pi f_{p,j})}

(``gain`` = ``omega_I`` [1/s]; ``zeros``, ``poles`` [Hz]; one zero gives PI,
one zero and one pole type II, two of each type III). With
``integrator = false`` the leading ``1/s`` is dropped and ``gain`` is a
plain gain. The controller is digital: sampled once per period and
discretised with the bilinear (Tustin) transform, the usual way of
carrying an analog design into a sampled loop.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 9 (controller design: PI, lead, PID) and
   ch. 12 (current-programmed control, slope compensation).
.. [2] G. F. Franklin, J. D. Powell, M. Workman, *Digital Control of Dynamic
   Systems*, 3rd ed., 1998, ch. 6 (Tustin's method).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import ScenarioError

COMPENSATOR_KEYS = ("kind", "gain", "zeros", "poles", "integrator")


@dataclass(frozen=True)
class Compensator:
    """Analog transfer function and its discrete (Tustin) state space at period ``T``."""

    num: np.ndarray
    den: np.ndarray
    Ad: np.ndarray
    Bd: np.ndarray
    Cd: np.ndarray
    Dd: float

    @property
    def order(self) -> int:
        return self.Ad.shape[0]


def compensator_tf(spec: dict) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator (descending powers of s) of the compensator."""
    for key in spec:
        if key not in COMPENSATOR_KEYS:
            raise ScenarioError(f"control.compensator.{key}", "is not a known key (allowed: "
                                + ", ".join(COMPENSATOR_KEYS) + ")", spec[key])
    gain = spec.get("gain")
    integrator = spec.get("integrator", True)
    if not isinstance(integrator, bool):
        raise ScenarioError("control.compensator.integrator", "must be true or false",
                            integrator)
    if (not isinstance(gain, (int, float)) or isinstance(gain, bool) or not gain > 0
            or not np.isfinite(gain)):
        raise ScenarioError("control.compensator.gain", "must be a number > 0 (1/s with the "
                            "integrator, V/V without)", gain)
    num = np.array([float(gain)])
    den = np.array([1.0, 0.0]) if integrator else np.array([1.0])
    for key in ("zeros", "poles"):
        vals = spec.get(key, [])
        if not isinstance(vals, (list, tuple)):
            raise ScenarioError(f"control.compensator.{key}", "must be a list of frequencies "
                                "in Hz", vals)
        for i, f in enumerate(vals):
            if (not isinstance(f, (int, float)) or isinstance(f, bool) or not f > 0
                    or not np.isfinite(f)):
                raise ScenarioError(f"control.compensator.{key}[{i}]", "must be a finite "
                                    "frequency > 0 Hz", f)
            factor = np.array([1.0 / (2 * np.pi * f), 1.0])
            if key == "zeros":
                num = np.polymul(num, factor)
            else:
                den = np.polymul(den, factor)
    if len(num) > len(den):
        raise ScenarioError("control.compensator.zeros", "more zeros than poles (counting the "
                            "integrator): the compensator would not be proper",
                            spec.get("zeros"))
    return num, den


def design(spec: dict, period: float) -> Compensator:
    """Discrete state space of the compensator by the bilinear transform."""
    from scipy import signal

    num, den = compensator_tf(spec)
    A, B, C, D = signal.tf2ss(num, den)
    Ad, Bd, Cd, Dd, _ = signal.cont2discrete((A, B, C, D), period, method="bilinear")
    return Compensator(num, den, np.ascontiguousarray(Ad), np.ascontiguousarray(Bd[:, 0]),
                       np.ascontiguousarray(Cd[0]), float(Dd[0, 0]))
