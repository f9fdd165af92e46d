"""The analog compensator of :mod:`reference_analog`: realisation and integrator hold.

Written from the control description alone (not from the engine).

Notes
-----
Transfer function from the table in Hz (``w = 2 pi f``)::

    Gc(s) = gain / s * prod_i (1 + s / wz_i) / prod_j (1 + s / wp_j)

(no ``1/s`` when ``integrator = false``). With an integrator it is realised as
two sections in cascade, so that the integrator's state is explicit::

    x_I' = gain e                              (integrator state [V], 0 at rest)
    y1   = x_I + d1 e,   d1 = gain / wz_1      (first zero joins the integrator
                                                when there is one zero more than
                                                poles; otherwise d1 = 0)
    u    = G_rest(s) y1,  G_rest = prod (1 + s / wz) / prod (1 + s / wp)
                                               over the remaining factors (proper)

Indeed ``gain/s (1 + s/wz_1) = gain/s + gain/wz_1``, so the cascade is Gc.
``G_rest`` is a cascade of first-order sections, the remaining zeros paired
with the poles in the order written (a pole left over has no zero)::

    xi_k' = wp_k (in_k - xi_k),   out_k = r_k in_k + (1 - r_k) xi_k,
    r_k = wp_k / wz_k  (0 without a zero),   in_1 = y1,  in_{k+1} = out_k,  u = out_last

whose transfer function is ``(1 + s/wz_k) / (1 + s/wp_k)``. Each state is the
low-passed input of its section [V], at rest equal to ``x_I``: no state is
large while the output is small, which a canonical form of a high-frequency
gain of hundreds would give (states of hundreds of volts cancelling in ``u``;
absolute tolerances and differenced Jacobians then lose digits). Full
compensator state ``w = [x_I, xi_1 .. xi_m]``::

    w' = Ac w + Bc e,     u = Cc w + Dc e

Without an integrator the sections run on ``gain e`` and there is no ``x_I``.

Integrator hold (anti-windup by conditional integration, Astrom & Hagglund
2006, ch. 3): ``x_I' = 0`` instead of ``gain e`` while

    (x_I >= w_hi and e > 0)  or  (x_I <= w_lo and e < 0),

with ``[w_lo, w_hi] = [0, Dmax Vm]`` in voltage mode (the integrator alone can
ask for no less than no pulse and no more than the longest one; the PWM gain
is 1/Vm, Erickson & Maksimovic ch. 7) and ``[0, +inf)`` in peak-current mode.
While held the remaining sections keep running on ``y1 = x_I + d1 e``.

References
----------
K. J. Astrom and T. Hagglund, Advanced PID Control, ISA 2006, ch. 3
(integrator windup, conditional integration).
R. W. Erickson and D. Maksimovic, Fundamentals of Power Electronics, 3rd ed.,
Springer 2020: ch. 7 (PWM modulator gain 1/Vm), 9 (compensators).
"""

from __future__ import annotations

import math

import numpy as np

HELD_LOW, FREE, HELD_HIGH = -1, 0, 1


def _factors(freqs):
    p = np.array([1.0])
    for f in freqs:
        p = np.polymul(p, [1.0 / (2 * math.pi * f), 1.0])
    return p


def compensator_polynomials(spec):
    """``(num, den)`` of Gc(s), descending powers of s, built from the table in Hz."""
    num = float(spec["gain"]) * _factors(spec.get("zeros", []))
    den = _factors(spec.get("poles", []))
    if spec.get("integrator", True):
        den = np.polymul(den, [1.0, 0.0])
    return num, den


def _sections(zeros, poles):
    """``(A, B, C, D)`` (B, C 1-D) of the first-order cascade in the module notes."""
    if len(zeros) > len(poles):
        raise ValueError("improper compensator: more zeros than the integrator and "
                         "poles can carry")
    m = len(poles)
    A, B = np.zeros((m, m)), np.zeros(m)
    c, d = np.zeros(m), 1.0                     # in_k = c . xi + d y_in
    for k, fp in enumerate(poles):
        wp = 2 * math.pi * fp
        r = wp / (2 * math.pi * zeros[k]) if k < len(zeros) else 0.0
        A[k], B[k] = wp * c, wp * d
        A[k, k] -= wp
        c, d = r * c, r * d
        c[k] += 1.0 - r
    return A, B, c, d


def compensator_ss(spec):
    """``(Ac, Bc, Cc, Dc)`` of Gc with the integrator state x_I first (module notes).

    Raises ValueError for an improper Gc."""
    gain = float(spec["gain"])
    zeros, poles = list(spec.get("zeros", [])), list(spec.get("poles", []))
    if not spec.get("integrator", True):
        A, B, C, D = _sections(zeros, poles)
        return A, gain * B, C, gain * D
    d1 = 0.0
    if len(zeros) == len(poles) + 1:
        d1, zeros = gain / (2 * math.pi * zeros[0]), zeros[1:]
    Ar, Br, Cr, Dr = _sections(zeros, poles)
    m = 1 + len(poles)
    Ac = np.zeros((m, m))
    Ac[1:, 0], Ac[1:, 1:] = Br, Ar
    return Ac, np.r_[gain, Br * d1], np.r_[Dr, Cr], Dr * d1


def integrator_limits(loop):
    """``(w_lo, w_hi)`` [V] of the integrator hold for a :class:`reference_analog.Loop`."""
    if loop.mode == "voltage-mode":
        return 0.0, loop.max_duty * loop.ramp
    return 0.0, math.inf


def hold_rule(x_i, e, lo, hi):
    """HELD_HIGH, HELD_LOW or FREE for integrator state ``x_i`` [V] and error ``e`` [V]."""
    if x_i >= hi and e > 0:
        return HELD_HIGH
    if x_i <= lo and e < 0:
        return HELD_LOW
    return FREE
