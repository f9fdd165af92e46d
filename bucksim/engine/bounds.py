"""Bounds that prove a stretch of an event function free of zeros.

Used by the cycle loop's cheap test of every watched row and by
:func:`bucksim.engine.kernels.find_zero`. The notes below are the proof.
"""

from __future__ import annotations

import numpy as np
from numba import njit

# A first crossing is never stepped over: a stretch where the event function
# f (oriented so that f > 0 on its starting side) keeps its sign is passed
# only when a bound proves that f has no zero there.
#
# Bound. With z = [x, 1], z' = M z gives x' = A x + b and x'' = A x', so
# f'' = c M^2 z = c_x A x' with x'(t0 + u) = e^{A u} x'(t0) (the ramp and the
# sources drop out). For any positive diagonal W (a balancing of A):
#
#     |f''(t0 + u)| <= ||c_x A W||_1  ||W^-1 e^{A u} W||_inf  ||W^-1 x'(t0)||_inf
#                   <= ||c_x A W||_1  e^{mu u}  ||W^-1 x'(t0)||_inf  =:  B   (u <= d)
#
# with mu the logarithmic infinity-norm of W^-1 A W (||e^{A u}|| <= e^{mu u},
# u >= 0: Dahlquist 1958; Soderlind, "The logarithmic norm. History and modern
# theory", BIT 46, 2006; from memory). Taylor's theorem then gives, from a point
# p with value f_p > 0 and slope s_p, f(p + u) >= f_p + s_p u - B u^2 / 2 > 0
# for 0 <= u < reach(f_p, s_p, B), the positive root of that quadratic; the same
# holds backward with the slope's sign reversed. A stretch [t0, t1] is clear
# when the reach forward from t0 and backward from t1 together cover it. The
# cycle loop's test of every watched row in every segment uses this bound
# (cheap: the norms ||c_x A W||_1 are computed once per chunk).
#
# find_zero goes one order up: f''' = c_x A^2 x', bounded the same way by
# B3 = ||c_x A^2 W||_1 e^{mu u} ||W^-1 x'(t0)||_inf, so from a point with exact
# value, slope and curvature f(p + u) >= f_p + s_p u + q_p u^2 / 2 - B3 u^3 / 6
# (reach3). The looseness of the norms then enters only at third order: a step
# from an extremum spans about 3 q_p / B3 however close the extremum comes to
# zero, and a stretch that starts exactly on zero heading away (an integrator
# released at its limit) is cleared. A stretch the ends do not cover is
# marched: each step goes to the end of the proven reach, so the march
# converges on the first zero from the left like a safeguarded Newton
# iteration (superlinearly onto a touching zero), or runs past the reach
# backward from t1 and clears the stretch. A stretch that ends past zero with
# a slope provably of one sign holds exactly one zero, which the table descent
# finds.


@njit(cache=True)
def system_bounds(Ms):
    """Per system: a balancing diagonal ``W`` of ``A`` and the logarithmic
    infinity-norm ``mu`` of ``W^-1 A W``; row ``s`` is ``[1/W_0 .. 1/W_{n-1}, mu]``.

    Osborne's balancing (sweeps of ``W_i *= sqrt(row_i / col_i)`` over the
    off-diagonal sums) makes ``mu`` close to the spectral abscissa for the
    stage's mixed units; a state nothing else reads (a pure integrator's
    column is zero) gets a large ``W_i``, which removes its row from ``mu``
    without weakening the bound. Any positive ``W`` keeps the bound valid.
    """
    n_sys, m = Ms.shape[0], Ms.shape[1]
    n = m - 1
    out = np.empty((n_sys, m))
    for s in range(n_sys):
        w = np.ones(n)
        for _ in range(24):
            for i in range(n):
                r = 0.0
                col = 0.0
                for j in range(n):
                    if j != i:
                        r += abs(Ms[s, i, j]) * w[j] / w[i]
                        col += abs(Ms[s, j, i]) * w[i] / w[j]
                if r > 0.0 and col > 0.0:
                    f = np.sqrt(r / col)
                    if 1e-100 < w[i] * f < 1e100:
                        w[i] *= f
        for i in range(n):
            col = 0.0
            for j in range(n):
                col += abs(Ms[s, j, i])
            if col == 0.0:          # nothing reads state i: shrink its row's share
                r = 0.0
                for j in range(n):
                    if j != i:
                        r += abs(Ms[s, i, j]) * w[j]
                if r > 0.0:
                    w[i] = min(max(w[i], 1e6 * r / max(_row_scale(Ms, s, w, i), 1e-300)),
                               1e100)
        mu = -np.inf
        for i in range(n):
            acc = Ms[s, i, i]
            for j in range(n):
                if j != i:
                    acc += abs(Ms[s, i, j]) * w[j] / w[i]
            mu = max(mu, acc)
        for i in range(n):
            out[s, i] = 1.0 / w[i]
        out[s, n] = mu if n > 0 else 0.0
    return out


@njit(cache=True, _nrt=False)
def _row_scale(Ms, s, w, skip):
    """Largest off-diagonal row sum of ``W^-1 A W`` over the rows other than ``skip``."""
    n = Ms.shape[1] - 1
    best = 0.0
    for i in range(n):
        if i == skip:
            continue
        acc = 0.0
        for j in range(n):
            if j != i:
                acc += abs(Ms[s, i, j]) * w[j] / w[i]
        best = max(best, acc)
    return best


@njit(cache=True, inline="always")
def velocity_norm(Ms, s, z, bnd):
    """``||W^-1 x'||_inf`` with ``x' = (M_s z)[:n]``."""
    n = z.shape[0] - 1
    vel = 0.0
    for i in range(n):
        acc = 0.0
        for j in range(n + 1):
            acc += Ms[s, i, j] * z[j]
        vel = max(vel, abs(acc) * bnd[s, i])
    return vel


@njit(cache=True, inline="always")
def curvature_bound(Ms, s, c, z, d, bnd):
    """``B >= |f''|`` on ``[t, t + d]`` for the event row ``c`` from the state ``z`` at t."""
    n = z.shape[0] - 1
    row = 0.0
    for j in range(n):
        acc = 0.0
        for i in range(n):
            if c[i] != 0.0:
                acc += c[i] * Ms[s, i, j]
        row += abs(acc) / bnd[s, j]
    if row == 0.0:
        return 0.0
    # (1 + 1e-12): the bound's own rounding
    return row * velocity_norm(Ms, s, z, bnd) * growth(bnd[s, n] * d) * (1.0 + 1e-12)


@njit(cache=True, inline="always")
def growth(x):
    """An upper bound of ``max(1, e^x)``: ``1 + 2x`` on [0, 1] (e^x <= 1 + 2x
    there, both ends checked and the difference convex), ``e^x`` beyond."""
    if x <= 0.0:
        return 1.0
    if x <= 1.0:
        return 1.0 + 2.0 * x
    return np.exp(x)


@njit(cache=True, inline="always")
def current_clear(Ms, s, zs, z, d, sign0, kil, bnd):
    """True when ``sign0 iL`` provably stays positive from ``zs`` to ``z`` (a
    segment of length ``d``): :func:`state_clear` for the state ``iL``, its
    ``||A[0] W||_1`` given per system in ``kil`` (the zero-current test of every
    diode segment)."""
    return state_clear(Ms, s, 0, 0.0, zs, z, d, sign0, kil[s], bnd)


@njit(cache=True, inline="always")
def state_clear(Ms, s, k, level, zs, z, d, sign0, norm, bnd):
    """True when ``sign0 (z[k] - level)`` provably stays positive from ``zs`` to ``z``
    (a segment of length ``d``): :func:`clear_between` with the bound of
    :func:`curvature_bound` for the row of state ``k``, ``norm = ||A[k] W||_1``
    for system ``s``."""
    f0 = sign0 * (zs[k] - level)
    f1 = sign0 * (z[k] - level)
    if f0 <= 0.0 or f1 <= 0.0:
        return False
    n = zs.shape[0] - 1
    s0 = 0.0
    vel = 0.0
    for i in range(n):
        acc = 0.0
        for j in range(n + 1):
            acc += Ms[s, i, j] * zs[j]
        if i == k:
            s0 = sign0 * acc
        vel = max(vel, abs(acc) * bnd[s, i])
    B = norm * vel * growth(bnd[s, n] * d) * (1.0 + 1e-12)
    # Taylor from the start over the whole segment first (no division, no root)
    if f0 + min(s0, 0.0) * d - 0.5 * B * d * d > 0.0:
        return True
    s1 = 0.0
    for j in range(n + 1):
        s1 += Ms[s, k, j] * z[j]
    return clear_between(f0, s0, f1, sign0 * s1, d, B)


@njit(cache=True)
def current_row_norms(Ms, bnd):
    """``||A_s[0] W_s||_1`` per system: :func:`current_clear`'s constant."""
    n_sys, m = Ms.shape[0], Ms.shape[1]
    out = np.zeros(n_sys)
    for s in range(n_sys):
        for j in range(m - 1):
            out[s] += abs(Ms[s, 0, j]) / bnd[s, j]
    return out


@njit(cache=True)
def row_norms(Ms, bnd, rows):
    """``||c_x A_s W_s||_1`` for each event row ``c`` of ``rows`` (k, m) and each
    system: the constant of :func:`curvature_bound`, shape (k, n_sys)."""
    n_sys, m = Ms.shape[0], Ms.shape[1]
    out = np.zeros((rows.shape[0], n_sys))
    for r in range(rows.shape[0]):
        for s in range(n_sys):
            for j in range(m - 1):
                acc = 0.0
                for i in range(m - 1):
                    acc += rows[r, i] * Ms[s, i, j]
                out[r, s] += abs(acc) / bnd[s, j]
    return out


@njit(cache=True, inline="always")
def reach(f, slope, B):
    """Proven distance over which a function with value ``f > 0``, slope ``slope``
    and ``|f''| <= B`` stays positive: the positive root of f + slope u - B u^2 / 2."""
    if not B < np.inf:
        return 0.0
    if slope >= 0.0:
        if B == 0.0:
            return np.inf
        return (slope + np.sqrt(slope * slope + 2.0 * B * f)) / B
    return 2.0 * f / (np.sqrt(slope * slope + 2.0 * B * f) - slope)


@njit(cache=True, inline="always")
def clear_between(f0, s0, f1, s1, d, B):
    """True when f (positive at both ends of a stretch of length ``d``, slopes s0
    and s1 there, ``|f''| <= B``) provably has no zero on the stretch."""
    return reach(f0, s0, B) + reach(f1, -s1, B) > d


@njit(cache=True, inline="always")
def _cubic(f, s1, s2, B3, u):
    return f + u * (s1 + u * (0.5 * s2 - u * B3 / 6.0))


#: A reach is returned within this share of the root below it (a proof needs only a
#: lower bound; the march it steps is refined on the exact solution afterwards).
REACH_RTOL = 2.0 ** -40


@njit(cache=True, inline="always")
def _lower_root(f, s1, s2, B3, a, b):
    """The largest point found with ``p > 0`` below the root of ``p`` in ``[a, b]``
    (``p(a) > 0 >= p(b)``, ``p`` monotone there), within :data:`REACH_RTOL` of it:
    false position with the Illinois halving (Dowell & Jarratt, BIT 11, 1971; from
    memory), bisection where a step would leave the bracket."""
    fa = _cubic(f, s1, s2, B3, a)
    fb = _cubic(f, s1, s2, B3, b)
    side = 0
    for _ in range(200):
        if not b - a > REACH_RTOL * b:
            break
        x = b - fb * (b - a) / (fb - fa)
        if not a < x < b:
            x = 0.5 * (a + b)
            if not a < x < b:
                break
        fx = _cubic(f, s1, s2, B3, x)
        if fx > 0.0:
            a, fa = x, fx
            if side == 1:
                fb *= 0.5
            side = 1
        else:
            b, fb = x, fx
            if side == -1:
                fa *= 0.5
            side = -1
    return a


@njit(cache=True, inline="always")
def _root_scale(f, s1, s2, B3):
    """A length on the scale of the first root of ``f + s1 u + s2 u^2 / 2 - B3 u^3 / 6``
    (``f > 0``): the least of ``f / |s1|``, ``sqrt(2 f / |s2|)`` and ``cbrt(6 f / B3)``
    that exist, at least 1e-300."""
    u = np.inf
    if s1 != 0.0:
        u = min(u, f / abs(s1))
    if s2 != 0.0:
        u = min(u, np.sqrt(2.0 * f / abs(s2)))
    if B3 > 0.0:
        u = min(u, np.cbrt(6.0 * f / B3))
    if not u < np.inf:
        return 1e-300
    return max(u, 1e-300)


@njit(cache=True, _nrt=False)
def reach3(f, s1, s2, B3):
    """Proven distance over which a function with value ``f > 0``, first and second
    derivatives ``s1``, ``s2`` and a third derivative bounded by ``B3`` stays
    positive: the first positive root of ``p(u) = f + s1 u + s2 u^2 / 2 -
    B3 u^3 / 6`` (Taylor's theorem), ``inf`` when there is none.

    ``p`` is monotone between the zeros of its derivative (at most two positive
    ones); the first monotone piece on which ``p`` reaches zero holds the
    root, found there by bisection.
    """
    if not B3 < np.inf:
        return 0.0
    c1 = np.inf
    c2 = np.inf
    if B3 > 0.0:
        # turning points of p: B3/2 u^2 - s2 u - s1 = 0
        disc = s2 * s2 + 2.0 * B3 * s1
        if disc >= 0.0:
            r = np.sqrt(disc)
            lo = (s2 - r) / B3
            hi = (s2 + r) / B3
            if lo > 0.0:
                c1, c2 = lo, hi
            elif hi > 0.0:
                c1 = hi
    elif s2 != 0.0 and -s1 / s2 > 0.0:
        c1 = -s1 / s2
    a = 0.0
    for piece in range(3):
        b = c1 if piece == 0 else (c2 if piece == 1 else np.inf)
        if not b > a:
            continue
        if b == np.inf:
            if B3 == 0.0 and (s2 > 0.0 or (s2 == 0.0 and s1 >= 0.0)):
                return np.inf             # p grows (or stays) for ever
            # start the doubling at the polynomial's own scale, not at 1e-300 (from there
            # a nanosecond is ~970 doublings); any start brackets the same root
            b = max(2.0 * a, _root_scale(f, s1, s2, B3))
            found = False
            for _ in range(2100):
                if _cubic(f, s1, s2, B3, b) <= 0.0:
                    found = True
                    break
                b *= 2.0
            if not found:
                return np.inf
        if _cubic(f, s1, s2, B3, b) > 0.0:
            a = b
            continue
        return _lower_root(f, s1, s2, B3, a, b)
    return np.inf


@njit(cache=True, inline="always")
def event_derivatives(Ms, s, c, z, ramp):
    """First and second time derivatives of the event function at state ``z``:
    ``c . x' + ramp`` and ``(c_x A) . x'``, ``x' = (M z)[:n]``."""
    n = z.shape[0] - 1
    d1 = ramp
    d2 = 0.0
    for j in range(n):
        xj = 0.0
        for k in range(n + 1):
            xj += Ms[s, j, k] * z[k]
        r = 0.0
        for i in range(n):
            if c[i] != 0.0:
                r += c[i] * Ms[s, i, j]
        d1 += c[j] * xj
        d2 += r * xj
    return d1, d2


@njit(cache=True, _nrt=False)
def third_norm(Ms, s, c, bnd):
    """``||c_x A_s^2 W_s||_1``: the third derivative of the event function is
    ``(c_x A^2) . x'`` (module notes)."""
    n = Ms.shape[1] - 1
    k3 = 0.0
    for j in range(n):
        acc = 0.0
        for i in range(n):
            r = 0.0
            for q in range(n):
                if c[q] != 0.0:
                    r += c[q] * Ms[s, q, i]
            acc += r * Ms[s, i, j]
        k3 += abs(acc) / bnd[s, j]
    return k3


@njit(cache=True)
def third_norms(Ms, bnd, rows):
    """:func:`third_norm` for each row of ``rows`` (k, m) and each system: (k, n_sys)."""
    out = np.zeros((rows.shape[0], Ms.shape[0]))
    for r in range(rows.shape[0]):
        for s in range(Ms.shape[0]):
            out[r, s] = third_norm(Ms, s, rows[r], bnd)
    return out


# The open switch node: an energy bound for both clamps at once.
#
# While the node is open, L iL' = vn - vo - DCR iL and Cn vn' = -iL, with
# vo = a vC + b iL + c0 (a = 1 / (1 + ESR g), b = ESR a, c0 = -ESR Icc a). With
# u = vn - a vC - c0 (the node's distance from its slowly moving centre) and
# R = DCR + b >= 0, the ring energy E = L iL^2 / 2 + Cn u^2 / 2 obeys
#
#     E' = -R iL^2 - Cn a u vC' <= Cn a |u| |vC'| <= sqrt(2 Cn E) a |vC'|,
#
# so sqrt(E) grows at most by sqrt(Cn / 2) a |vC'| per second (derived; the
# damping is dropped, so the bound does not decay). |vC'| <= (|iL| (1 + g b) +
# g (a |vC| + |c0|) + |Icc|) / C. Over a stretch of length d, a candidate bound
# I* on |iL| and V* on |vC - vC(0)| is proved by bootstrapping: if the bounds they
# imply are strictly inside them, neither can be reached first (continuity).
# Then |u| <= sqrt(2 E_max / Cn) and each clamp row (low: r iL + vn + Vf;
# high: -R_h iL + Vin + Vf - vn) keeps a lower bound that, when positive, proves
# the stretch free of that clamp, however many ring lobes it holds: the cost is
# independent of the ring frequency, where a Taylor bound needs steps of a
# quarter of the ring's period.

@njit(cache=True, _nrt=False)
def open_node_clear(coef, z, i_vn, d, low, high):
    """``(low_clear, high_clear)``: the open node provably stays off each clamp over
    ``[t, t + d]`` from state ``z`` (energy bound above). ``coef`` is
    ``[L, Cn, C, a, b, c0, g, Icc, free]`` at the segment's level (``free`` = 1:
    the high clamp reads states the bound does not follow, an input network's
    cell voltage, and is never cleared); ``low`` and ``high`` are the two clamp rows."""
    m = z.shape[0]
    L, cn, C, a, b, c0, g, icc = (coef[0], coef[1], coef[2], coef[3], coef[4], coef[5],
                                   coef[6], coef[7])
    il0, vc0 = z[0], z[1]
    u0 = z[i_vn] - a * vc0 - c0
    sq_e0 = np.sqrt(0.5 * L * il0 * il0 + 0.5 * cn * u0 * u0)
    i_star = 1.5 * np.sqrt(2.0 / L) * sq_e0 + 1e-12 * (abs(il0) + 1.0)
    slow = g * (a * abs(vc0) + abs(c0)) + abs(icc)
    v_star = 2.0 * d * (i_star * (1.0 + g * b) + slow) / C + 1e-12 * (abs(vc0) + 1.0)
    vdot = (i_star * (1.0 + g * b) + slow + g * a * v_star) / C
    if d * vdot >= v_star:
        return False, False
    sq_e = sq_e0 + np.sqrt(0.5 * cn) * a * vdot * d
    i_max = np.sqrt(2.0 / L) * sq_e
    if i_max >= i_star:
        return False, False
    u_max = np.sqrt(2.0 / cn) * sq_e * (1.0 + 1e-12)
    v_lo = a * (vc0 - v_star) + c0 - u_max
    v_hi = a * (vc0 + v_star) + c0 + u_max
    margin = 1e-12 * (abs(low[m - 1]) + abs(high[m - 1]) + abs(v_lo) + abs(v_hi) + 1.0)
    low_clear = low[m - 1] - abs(low[0]) * i_max + v_lo > margin
    high_clear = high[m - 1] - abs(high[0]) * i_max - v_hi > margin and coef[8] == 0.0
    return low_clear, high_clear
