"""The quadrature behind the iGSE core loss (:mod:`bucksim.analysis.coreloss`):
``int |diL/dt|^alpha dt`` over stored segments, exact derivatives, all at once.

Within a segment ``diL/dt = (M_s z)[0]`` is known exactly at any instant. The
pieces are cut into chunks short against the stage's fastest time constant;
the zeros of ``diL/dt`` in a chunk (where ``|.|^alpha`` has a kink) are found
by a bracketed Newton search over all chunks together; beside a zero ``t0`` the
integrand is ``|t - t0|^alpha`` times a smooth function, which Gauss-Jacobi
quadrature with that weight integrates as Gauss-Legendre does a smooth one [1]_,
and every interval is bisected until a 16/32-node comparison agrees to 1e-13
of the total.

References
----------
.. [1] G. H. Golub and J. H. Welsch, "Calculation of Gauss quadrature rules",
   Math. Comp. 23 (1969) 221-230 (the Gauss-Jacobi rules, as
   :func:`scipy.special.roots_jacobi`).
"""

from __future__ import annotations

import numpy as np

from bucksim.analysis.segments import segment_states

#: Gauss-Legendre nodes per sub-interval (the adaptive check uses twice as many).
GL_NODES = 16
#: Longest chunk, in units of 1 / (spectral radius of A_s): short enough for
#: the zero bracketing of :func:`_chunk_zeros`.
_SPAN = 2.0

#: Acceptance of the adaptive 16/32-node comparison, relative to the total.
_RTOL = 1e-13
_MAX_DEPTH = 40
_ROUNDING = 64 * np.finfo(float).eps
#: Bound on the intervals bisected per pass (memory guard; never reached
#: unless the integrand is not piecewise smooth).
_MAX_REFINE = 20000

_X, _W = np.polynomial.legendre.leggauss(GL_NODES)


#: Interval kinds of the quadrature: smooth, or with a zero of dB/dt at the left or
#: right end (where the integrand is ``|t - t0|^alpha`` times a smooth function).
_PLAIN, _ZERO_LEFT, _ZERO_RIGHT = 0, 1, 2
#: Iterations of the bracketed Newton search for a zero (each halves the bracket at
#: worst: 200 reach any double's spacing from a bracket of 1e+30 s).
_MAX_ROOT_STEPS = 200


class Slope:
    """Exact derivatives of ``iL`` within stored segments."""

    def __init__(self, run):
        self.run = run
        M = run.table.matrices
        rows = [M[:, 0, :]]                                   # diL/dt = rows[0] @ z
        for _ in range(2):                                    # d2iL/dt2, d3iL/dt3
            rows.append(np.einsum("sj,sjk->sk", rows[-1], M))
        self.rows = np.stack(rows)
        n = run.stage.n
        self.rho = np.array([np.max(np.abs(np.linalg.eigvals(m[:n, :n]))) for m in M])

    def states(self, seg_idx, tau):
        return segment_states(self.run, seg_idx, tau)

    def derivative(self, seg_idx, tau, order: int):
        """``d^order iL / dt^order`` (1 to 3) at (segment, offset [s]) pairs [A/s^order]."""
        seg_idx = np.ascontiguousarray(seg_idx, dtype=np.int64)
        z = self.states(seg_idx, tau)
        return np.einsum("ij,ij->i", self.rows[order - 1][self.run.segments.system[seg_idx]], z)

    def values(self, seg_idx, tau):
        """``(diL/dt [A/s], d2iL/dt2 [A/s^2], iL [A])`` at (segment, offset [s]) pairs."""
        seg_idx = np.ascontiguousarray(seg_idx, dtype=np.int64)
        z = self.states(seg_idx, tau)
        s = self.run.segments.system[seg_idx]
        return (np.einsum("ij,ij->i", self.rows[0][s], z),
                np.einsum("ij,ij->i", self.rows[1][s], z), z[:, 0])


def _bracketed_roots(slope, seg, a, b, fa, order: int):
    """The zero of ``d^order iL/dt^order`` in each bracket ``(a, b)`` (``fa``: its value
    at ``a``, of the other sign than at ``b``), all brackets at once.

    Newton's step from the last point, kept when it falls inside the bracket and
    moves less than a quarter of it, else bisection: the bracket shrinks every
    step, and the search ends on an exact zero or where the bracket is a few
    spacings of doubles wide.
    """
    lo, hi, f_lo = a.astype(float), b.astype(float), fa.astype(float)
    x = 0.5 * (lo + hi)
    live = np.arange(lo.shape[0])
    tiny = 4.0 * np.finfo(float).eps
    for _ in range(_MAX_ROOT_STEPS):
        if live.size == 0:
            break
        xk = x[live]
        f = slope.derivative(seg[live], xk, order)
        d = slope.derivative(seg[live], xk, order + 1)
        left = np.sign(f) == np.sign(f_lo[live])
        lo[live] = np.where(left, xk, lo[live])
        f_lo[live] = np.where(left, f, f_lo[live])
        hi[live] = np.where(left, hi[live], xk)
        lo_k, hi_k = lo[live], hi[live]
        with np.errstate(divide="ignore", invalid="ignore"):
            step = xk - f / d
        good = (step > lo_k) & (step < hi_k) & (np.abs(step - xk) < 0.25 * (hi_k - lo_k))
        x[live] = np.where(f == 0.0, xk, np.where(good, step, 0.5 * (lo_k + hi_k)))
        done = (f == 0.0) | (hi_k - lo_k <= tiny * np.maximum(np.abs(lo_k), np.abs(hi_k)))
        live = live[~done]
    return x


def _chunk_zeros(slope, seg, a, b, fa, fb, ga, gb):
    """Zeros of ``diL/dt`` inside the chunks ``(a, b)``, given it (``fa, fb``) and its
    derivative (``ga, gb``) at both ends. Returns ``(chunk, zero)`` pairs, sorted.

    A chunk is at most 2 / rho long (rho = spectral radius of A_s). For the
    two-state stage ``d2iL/dt2`` is ``e^{sigma t}`` times a sinusoid of angular
    frequency ``omega <= rho`` (or a sum of two real exponentials), so it has
    at most one zero in a chunk shorter than ``pi / omega``, and ``diL/dt`` at
    most two: one if its end values differ in sign, two if they agree but the
    value at its one interior extremum has the other sign.
    """
    one = np.flatnonzero(fa * fb < 0)
    chunks, zeros = [one], [_bracketed_roots(slope, seg[one], a[one], b[one], fa[one], 1)]
    two = np.flatnonzero((ga * gb < 0) & (fa * fb > 0))
    if two.size:
        te = _bracketed_roots(slope, seg[two], a[two], b[two], ga[two], 2)
        fe = slope.derivative(seg[two], te, 1)
        pair = fe * fa[two] < 0
        k, te, fe = two[pair], te[pair], fe[pair]
        chunks += [k, k]
        zeros += [_bracketed_roots(slope, seg[k], a[k], te, fa[k], 1),
                  _bracketed_roots(slope, seg[k], te, b[k], fe, 1)]
    chunk, zero = np.concatenate(chunks), np.concatenate(zeros)
    keep = (zero > a[chunk]) & (zero < b[chunk])
    chunk, zero = chunk[keep], zero[keep]
    order = np.lexsort((zero, chunk))
    return chunk[order], zero[order]


def intervals(slope: Slope, run, idx, tau_a, tau_b, alpha):
    """Sub-intervals (segment, a, b, kind) on which ``|diL/dt|^alpha`` is smooth, or
    smooth times ``|t - t0|^alpha`` at one end (``kind``), and the zeros of
    ``diL/dt`` inside the pieces as (segment, offset)."""
    systems = run.segments.system[idx]
    length = tau_b - tau_a
    n_chunk = np.maximum(1, np.ceil(length * slope.rho[systems] / _SPAN)).astype(np.int64)
    starts = np.concatenate(([0], np.cumsum(n_chunk + 1)))
    piece_of = np.repeat(np.arange(idx.shape[0]), n_chunk + 1)
    frac = np.arange(piece_of.shape[0]) - starts[piece_of]
    grid = tau_a[piece_of] + length[piece_of] * frac / n_chunk[piece_of]
    grid[starts[1:] - 1] = tau_b               # exact right ends
    fv, gv, _ = slope.values(idx[piece_of], grid)

    left = np.ones(grid.shape[0], dtype=bool)
    left[starts[1:] - 1] = False
    c = np.flatnonzero(left & (grid < np.roll(grid, -1)))
    a, b = grid[c], grid[c + 1]
    seg_c = idx[piece_of[c]]
    chunk, zero = _chunk_zeros(slope, seg_c, a, b, fv[c], fv[c + 1], gv[c], gv[c + 1])
    # each chunk is cut at its zeros: edges a, zeros..., b; a cut at a zero is a
    # kink on both sides of it
    n_cut = np.bincount(chunk, minlength=c.shape[0])
    first = np.concatenate(([0], np.cumsum(n_cut + 1)))[:-1]
    n_sub = int((n_cut + 1).sum())
    sub_a, sub_b = np.empty(n_sub), np.empty(n_sub)
    kink_a, kink_b = np.zeros(n_sub, dtype=bool), np.zeros(n_sub, dtype=bool)
    sub_seg = np.repeat(seg_c, n_cut + 1)
    sub_a[first], sub_b[first + n_cut] = a, b
    rank = np.arange(chunk.shape[0]) - np.concatenate(([0], np.cumsum(n_cut)))[chunk]
    at = first[chunk] + rank
    sub_b[at], sub_a[at + 1] = zero, zero
    kink_b[at], kink_a[at + 1] = True, True
    # an interval with a zero at both ends is split at its middle
    both = np.flatnonzero(kink_a & kink_b)
    mid = 0.5 * (sub_a[both] + sub_b[both])
    seg_o = np.concatenate((sub_seg, sub_seg[both]))
    a_o = np.concatenate((sub_a, mid))
    b_first = sub_b.copy()
    b_first[both] = mid
    b_o = np.concatenate((b_first, sub_b[both]))
    kind = np.where(kink_a, _ZERO_LEFT, np.where(kink_b, _ZERO_RIGHT, _PLAIN))
    kind = np.concatenate((kind, np.full(both.shape[0], _ZERO_RIGHT)))
    keep = b_o > a_o
    return (seg_o[keep], a_o[keep], b_o[keep], kind[keep], seg_c[chunk], zero)


def _rules(alpha: float):
    """Nodes and weights on [-1, 1] for the three interval kinds: Gauss-Legendre,
    and Gauss-Jacobi for the weight ``(1 + x)^alpha`` (zero at the left) or
    ``(1 - x)^alpha`` (right), divided back out so that every rule integrates
    ``|f|^alpha`` itself."""
    from scipy.special import roots_jacobi

    xl, wl = roots_jacobi(GL_NODES, 0.0, alpha)        # weight (1 + x)^alpha
    xr, wr = roots_jacobi(GL_NODES, alpha, 0.0)        # weight (1 - x)^alpha
    x = np.stack((_X, xl, xr))
    w = np.stack((_W, wl / (1.0 + xl) ** alpha, wr / (1.0 - xr) ** alpha))
    return x, w


def adaptive_nodes(slope: Slope, seg, a, b, kind, alpha, rtol=_RTOL, max_depth=_MAX_DEPTH):
    """Quadrature nodes whose sum of ``w |diL/dt|^alpha`` has converged.

    Each interval's 16-node rule is compared with the sum of the rules on its
    halves (a half that keeps the interval's zero keeps its Gauss-Jacobi rule,
    the other half is smooth); an interval is accepted (with the finer nodes)
    when they agree to ``rtol`` of the total, pro rata to its length, else it is
    bisected. Bisection acts mainly where ``|diL/dt|`` comes close to zero without
    crossing it: complex zeros of ``diL/dt`` near the real axis slow the
    convergence there.

    Returns (segment, offset [s], weight [s], diL/dt [A/s]) of the nodes.
    """
    n = GL_NODES
    x, w = _rules(alpha)
    width = float(np.sum(b - a))
    out = [], [], [], []

    def rule(a, b, kind):
        h = 0.5 * (b - a)
        return a[:, None] + h[:, None] * (x[kind] + 1.0), h[:, None] * w[kind]

    def halves(a, b, kind):
        m = 0.5 * (a + b)
        k_lo = np.where(kind == _ZERO_LEFT, _ZERO_LEFT, _PLAIN)
        k_hi = np.where(kind == _ZERO_RIGHT, _ZERO_RIGHT, _PLAIN)
        return (a, m, k_lo), (m, b, k_hi)

    def integrand(seg, t, wt):
        f = slope.derivative(np.repeat(seg, t.shape[1]), t.ravel(), 1).reshape(t.shape)
        return f, wt * np.abs(f) ** alpha

    t1, w1 = rule(a, b, kind)
    coarse = integrand(seg, t1, w1)[1].sum(axis=1)
    total = None
    for depth in range(max_depth + 1):
        (a_lo, m, k_lo), (_, _, k_hi) = halves(a, b, kind)
        t_lo, w_lo = rule(a_lo, m, k_lo)
        t_hi, w_hi = rule(m, b, k_hi)
        t2, w2 = np.concatenate((t_lo, t_hi), axis=1), np.concatenate((w_lo, w_hi), axis=1)
        f2, g2 = integrand(seg, t2, w2)
        q2 = g2.sum(axis=1)
        if total is None:
            total = float(q2.sum())
        # Either the share of the total tolerance, or agreement to rounding
        # of the interval's own sum (else halving never ends where the
        # integrand is dense: both sides of the test scale with the length).
        ok = np.abs(q2 - coarse) <= np.maximum(rtol * total * (b - a) / width,
                                               _ROUNDING * q2)
        if depth == max_depth or (~ok).sum() > _MAX_REFINE:
            ok[:] = True
        for lst, val in zip(out, (np.repeat(seg[ok], 2 * n), t2[ok].ravel(), w2[ok].ravel(),
                                  f2[ok].ravel()), strict=True):
            lst.append(val)
        bad = ~ok
        if not bad.any():
            break
        a, b = np.concatenate((a[bad], m[bad])), np.concatenate((m[bad], b[bad]))
        kind = np.concatenate((k_lo[bad], k_hi[bad]))
        seg = np.concatenate((seg[bad], seg[bad]))
        coarse = np.concatenate((g2[bad, :n].sum(axis=1), g2[bad, n:].sum(axis=1)))
    return tuple(np.concatenate(lst) for lst in out)


