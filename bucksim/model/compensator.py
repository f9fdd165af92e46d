"""The compensator of a closed loop, from its design data: digital or analog realisation.

The compensator is given as a designer writes it, in Hz:

.. math::

    G_c(s) = \\frac{\\omega_I}{s}\\,
             \\frac{\\prod_i (1 + s / 2\\pi f_{z,i})}{\\prod_j (1 + s / 2\\pi f_{p,j})}

(``gain`` = ``omega_I`` [1/s]; ``zeros``, ``poles`` [Hz]; one zero gives PI,
one zero and one pole type II, two of each type III [1]_). With
``integrator = false`` the leading ``1/s`` is dropped and ``gain`` is a
plain gain. Two realisations: :func:`design` gives the digital controller,
sampled once per period and discretised with the bilinear (Tustin)
transform [2]_, the usual way of carrying an analog design into a sampled
loop; :func:`analog_realization` gives the continuous-time state space of an
analog loop, a cascade of first-order sections. The engine runs either
(``bucksim.engine.controlled``); this module holds only the design data.

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

from bucksim.errors import ScenarioError

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


@dataclass(frozen=True)
class AnalogCompensator:
    """Continuous-time state space of the compensator, ``w' = A w + B e``, ``u = C w + D e``.

    Realised as a cascade of first-order sections (integrator, then one
    section per pole with its paired zero), so every state is a voltage of
    the order of the compensator output [V] and the realisation stays well
    scaled for poles and zeros decades apart (the controllable canonical form
    of ``tf2ss`` carries coefficients like ``(2 pi 300 kHz)^2`` instead).
    """

    num: np.ndarray
    den: np.ndarray
    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: float

    @property
    def order(self) -> int:
        return self.A.shape[0]


def analog_realization(spec: dict) -> AnalogCompensator:
    """Cascade state space of the compensator table ``spec`` (see :func:`compensator_tf`).

    Notes
    -----
    Sections, each with input ``x_in`` and output ``y`` (``wz = 2 pi fz``,
    ``wp = 2 pi fp``):

    * integrator with gain ``g`` [1/s]: ``w' = g x_in``, ``y = w``; when there
      is one zero more than there are poles, that zero joins the integrator:
      ``g (1 + s/wz) / s`` gives ``y = w + (g / wz) x_in``;
    * without the integrator, a plain gain ``y = g x_in``;
    * a pole with its paired zero, ``(1 + s/wz) / (1 + s/wp)``:
      ``w' = wp (x_in - w)``, ``y = (wp / wz) x_in + (1 - wp / wz) w``;
    * a pole alone: ``w' = wp (x_in - w)``, ``y = w``.

    The sections are chained in series; zeros pair with poles in the order
    written.
    """
    num, den = compensator_tf(spec)
    gain = float(spec["gain"])
    integrator = spec.get("integrator", True)
    wz = [2 * np.pi * float(f) for f in spec.get("zeros", [])]
    wp = [2 * np.pi * float(f) for f in spec.get("poles", [])]
    sections = []          # (a, b, c, d) per state, or (None, None, None, d) for a gain
    if integrator:
        extra = len(wz) > len(wp)
        sections.append((0.0, gain, 1.0, gain / wz[0] if extra else 0.0))
        if extra:
            wz = wz[1:]
    else:
        sections.append((None, None, None, gain))
    for i, p in enumerate(wp):
        if i < len(wz):
            sections.append((-p, p, 1.0 - p / wz[i], p / wz[i]))
        else:
            sections.append((-p, p, 1.0, 0.0))
    A = np.zeros((0, 0))
    B = np.zeros(0)
    C = np.zeros(0)
    D = 1.0
    for a, b, c, d in sections:   # series connection: the section after (A, B, C, D)
        if a is None:
            C, D = d * C, d * D
            continue
        k = A.shape[0]
        A2 = np.zeros((k + 1, k + 1))
        A2[:k, :k] = A
        A2[k, :k] = b * C
        A2[k, k] = a
        A, B = A2, np.append(B, b * D)
        C, D = np.append(d * C, c), d * D
    return AnalogCompensator(num, den, A, B, C, float(D))
