"""Exact extrema of a signal over stored segments, located on the analytic solution.

The extrema of a signal ``f = c z`` on a piece lie at its ends or at sign
changes of the analytic derivative ``g = c M z``; :func:`piece_extrema`
samples each piece densely enough that every turning point shows as a sign
change (Notes there), then refines each one to the resolution of double
precision.
"""

from __future__ import annotations

import math

import numpy as np

from bucksim.analysis.segments import segment_states
from bucksim.model.stage import clamp_current

#: Sample spacing as a fraction of ``min(pi/omega, 1/delta)`` (see
#: :func:`piece_extrema`): ``pi/omega`` is the gap between two turning points
#: of a signal whose derivative lives on two states, ``1/delta`` the slowest
#: time constant there. Below 1 no sample interval holds two turning points;
#: half leaves room for rounding.
_SPACING = 0.5
#: Samples evaluated per call: bounds the sample arrays' memory (about
#: ``8 (m + 4)`` bytes a sample). A piece needing more is cut into rows of at
#: most ``_ROW_SAMPLES`` samples, and rows are laid out ``_ROWS_PER_PASS`` at
#: a time, so memory stays bounded however long a piece rings.
_BATCH_SAMPLES = 250_000
_ROW_SAMPLES = 1025
_ROWS_PER_PASS = 100_000
#: Iteration cap of the safeguarded Newton refinement of a turning point
#: (bisection alone reaches the spacing of double precision in <= 60).
_REFINE_STEPS = 128
#: End windows of a long piece (:func:`piece_extrema`, Notes): half-periods
#: of a ringing signal, and slow time constants of a decaying one.
_END_LOBES = 2.5
_END_DECAYS = 40.0


def extrema(run, name, idx, tau_a, tau_b):
    """Exact min and max of a signal over the window pieces."""
    lo, hi = piece_extrema(run, name, idx, tau_a, tau_b)
    return float(lo.min()), float(hi.max())


def piece_extrema(run, name, idx, tau_a, tau_b):
    """Exact min and max of a signal on each piece (arrays, one entry per piece).

    The extrema of ``f = c z`` on a piece lie at its ends or at sign changes
    of the analytic derivative ``g = c M z``. Each piece is sampled densely
    enough that every turning point shows as a sign change of ``g`` between
    two samples (Notes); each sign change is refined on the exact solution
    (Newton on ``g`` with ``g' = c M^2 z``, safeguarded by bisection, to the
    resolution of double precision) and the signal is evaluated there. There
    is no cap on the samples: a piece that rings many times is sampled as
    often as it rings, in batches of at most :data:`_BATCH_SAMPLES`.

    Notes
    -----
    Within a piece ``g(t) = c e^{Mt} u`` with ``u = M z0``, whose constant
    entry is 0. Let ``K`` hold the states ``c`` reads and, recursively, the
    states their rows of ``M`` read (the constant 1 excluded; a structural
    property, exact in floating point). Then ``g(t) = c_K e^{M_KK t} u_K``,
    an exponential polynomial in the ``r = |K|`` eigenvalues of ``M_KK``.

    * ``r <= 1``: ``g = a e^{lam t}`` never changes sign: the ends suffice.
    * ``r = 2``, real eigenvalues: ``g = a e^{l1 t} + b e^{l2 t}`` or
      ``(a + b t) e^{l t}``; ``e^{-l1 t} g`` is monotone, so ``g`` has at
      most one zero, a simple one, on the whole piece.
    * ``r = 2``, eigenvalues ``sigma +- i omega``: ``g = A e^{sigma t}
      cos(omega t - phi)``, simple zeros exactly ``pi/omega`` apart.

    So with samples less than ``pi/omega`` apart no sample interval holds
    two zeros, and a zero shows as a sign change, provided the sign of ``g``
    at the samples is not rounding. After a zero ``g`` follows its slowest
    mode (decay rate ``delta``: ``|l_slow|``, or ``|sigma|``), and a piece
    may outlast that lobe by many time constants, leaving only rounding at
    its end. Samples at most ``_SPACING min(pi/omega, 1/delta)`` apart see
    every lobe while it stands above rounding; a lobe that never does moves
    ``f`` by rounding only. When the filter rings and decays slowly against
    the piece (the usual ``f0 << fs``) the two ends are all the samples.
    ``omega`` and ``delta`` come from the trace and determinant of ``M_KK``,
    widened by their rounding bounds.

    A piece far longer than its own dynamics is sampled only near its two
    ends (so a stage whose filter rings at 1e11 Hz costs a few dozen samples
    a piece, not millions):

    * complex pair: ``f - f_eq = B e^{sigma t} cos(omega t - psi)``, and at
      the turning points ``t_k`` (spaced ``pi/omega``) ``|f - f_eq| = c
      e^{sigma t_k}`` with alternating sign: a monotone sequence, so the
      largest and smallest turning values are the first two or the last two.
      A window of ``2.5 pi/omega`` at each end holds them.
    * real eigenvalues, both negative: every term of ``g`` has decayed by
      ``e^{-40}`` (4e-18) from its value at the start after ``40/delta``,
      so beyond that ``f`` stays within rounding of its value at the end.

    Every signal of the two-state stage, and every plant signal when an
    analog loop appends controller states (the plant rows do not read them),
    has ``r <= 2``. For ``r >= 3`` two zeros of ``g`` can lie arbitrarily
    close (an almost flat inflection), so no spacing rules them out; such a
    signal is sampled no coarser than the engine's guard (a quarter of the
    fastest time constant), the criterion the engine's first-crossing search
    relies on, which is not a proof.

    References
    ----------
    G. Polya and G. Szego, Problems and Theorems in Analysis II (1976),
    part V, problem 75 (zeros of exponential sums, by Rolle's theorem).
    W. H. Press et al., Numerical Recipes, 3rd ed. (2007), section 9.4
    (``rtsafe``, in :func:`_refine_turning_points`).
    """
    idx = np.asarray(idx, dtype=np.int64)
    lo = np.full(idx.shape[0], np.inf)
    hi = np.full(idx.shape[0], -np.inf)
    if idx.shape[0] == 0:
        return lo, hi
    systems = run.segments.system[idx]
    spacing, window = _sampling(run, name, np.unique(systems))
    owner, idx, systems, tau_a, tau_b = _end_windows(
        idx, systems, np.asarray(tau_a, dtype=float), np.asarray(tau_b, dtype=float), window)
    lo_all, hi_all = _sampled_pieces(run, name, idx, tau_a, tau_b, spacing[systems])
    np.minimum.at(lo, owner, lo_all)
    np.maximum.at(hi, owner, hi_all)
    return lo, hi


def _sampling(run, name, systems):
    """Per system: the longest sample interval and the span sampled at each end [s].

    Arrays over all the run's systems, ``inf`` where no bound applies; only
    ``systems`` are filled in (:func:`piece_extrema`, Notes).
    """
    sig = run.signal_table(name)
    mats = run.table.matrices
    spacing = np.full(mats.shape[0], np.inf)     # longest sample interval [s]
    window = np.full(mats.shape[0], np.inf)      # span sampled at each end [s]
    for s in systems:
        A = mats[s, :-1, :-1]
        keep = _signal_block(A, sig[s, :-1])
        r = int(keep.sum())
        if r <= 1:
            continue
        if r >= 3:
            spacing[s] = run.table.guard
            continue
        spacing[s], window[s] = _two_state_sampling(A[np.ix_(keep, keep)])
    return spacing, window


def _signal_block(A, row):
    """The states ``row`` reads and, recursively, the states their rows of ``A`` read."""
    deps = A != 0
    keep = row != 0
    while True:
        grown = keep | np.any(deps[keep], axis=0)
        if np.array_equal(grown, keep):
            return keep
        keep = grown


def _two_state_sampling(block):
    """``(spacing, window)`` [s] of a signal whose derivative lives on a 2 x 2 ``block``.

    ``omega`` and ``delta`` from the block's trace and determinant, widened by
    their rounding bounds (:func:`piece_extrema`, Notes).
    """
    eps = np.finfo(float).eps
    # Python floats: a quotient too large for a float is inf, without a warning
    (p, q), (u, v) = block.tolist()
    mean, half = 0.5 * (p + v), 0.5 * (p - v)
    disc = half * half + q * u        # (tr/2)^2 - det: < 0 for a complex pair
    slack = 4.0 * eps * (half * half + abs(q * u))   # its rounding bound
    if disc > slack:                   # real eigenvalues mean +- sqrt(disc)
        fast = mean + math.copysign(math.sqrt(disc), mean)
        det = p * v - q * u
        omega = 0.0
        decay = ((abs(det) + 2.0 * eps * (abs(p * v) + abs(q * u))) / abs(fast)
                 if fast != 0.0 else 0.0)
    else:                              # complex (or within rounding of it)
        omega = math.sqrt(max(-disc, 0.0) + slack)
        decay = abs(mean)
    gap = min(math.pi / omega if omega > 0.0 else math.inf,
              1.0 / decay if decay > 0.0 else math.inf)
    window = math.inf
    if omega > 0.0:
        window = _END_LOBES * math.pi / omega
    elif decay > 0.0 and mean < 0.0 and p * v - q * u > 0.0:
        window = _END_DECAYS / decay
    return _SPACING * gap, window


def _end_windows(idx, systems, tau_a, tau_b, window):
    """A piece longer than two end windows: its head and its tail stand for it.

    Returns ``(owner, idx, systems, tau_a, tau_b)``: the pieces to sample,
    each with the input piece it stands for.
    """
    owner = np.arange(idx.shape[0])
    long_ = (tau_b - tau_a) > 2.0 * window[systems]
    if not np.any(long_):
        return owner, idx, systems, tau_a, tau_b
    w = window[systems[long_]]
    owner = np.concatenate([owner, np.nonzero(long_)[0]])
    tail_a = tau_b[long_] - w
    tau_b = np.concatenate([np.where(long_, tau_a + window[systems], tau_b), tau_b[long_]])
    tau_a = np.concatenate([tau_a, tail_a])
    return owner, idx[owner], systems[owner], tau_a, tau_b


def _sampled_pieces(run, name, idx, tau_a, tau_b, spacing):
    """Min and max of a signal on each piece, sampled no coarser than ``spacing`` [s]."""
    npiece = idx.shape[0]
    lo = np.full(npiece, np.inf)
    hi = np.full(npiece, -np.inf)
    dur = tau_b - tau_a
    with np.errstate(divide="ignore", invalid="ignore"):
        steps = np.ceil(dur / spacing)
    steps = np.where(np.isfinite(steps) & (steps > 1), steps, 1.0)
    # each piece is cut into rows of at most _ROW_SAMPLES samples (contiguous
    # in tau); rows are laid out piece after piece and handled a slice of
    # _ROWS_PER_PASS at a time, so no array grows with the number of samples
    rows = np.ceil(steps / (_ROW_SAMPLES - 1)).astype(np.int64)
    ends = np.cumsum(rows)
    for r0 in range(0, int(ends[-1]), _ROWS_PER_PASS):
        ridx = np.arange(r0, min(r0 + _ROWS_PER_PASS, int(ends[-1])), dtype=np.int64)
        owner = np.searchsorted(ends, ridx, side="right")
        nrow = rows[owner]
        j = ridx - (ends[owner] - nrow)
        row_a = tau_a[owner] + dur[owner] * (j / nrow)
        row_b = np.where(j + 1 == nrow, tau_b[owner],
                         tau_a[owner] + dur[owner] * ((j + 1) / nrow))
        need = np.ceil(steps[owner] / nrow).astype(np.int64)
        # power-of-two bins share one sample grid per call
        bins = (1 << np.ceil(np.log2(need)).astype(np.int64)) + 1
        for ns in np.unique(bins):
            sel = np.nonzero(bins == ns)[0]
            per_call = max(1, _BATCH_SAMPLES // int(ns))
            for start in range(0, sel.shape[0], per_call):
                part = sel[start:start + per_call]
                rlo, rhi = _extrema_sampled(run, name, idx[owner[part]], row_a[part],
                                            row_b[part], int(ns))
                np.minimum.at(lo, owner[part], rlo)
                np.maximum.at(hi, owner[part], rhi)
    return lo, hi


class _SignalRows:
    """A signal's rows ``c``, ``c M`` and ``c M^2`` per system, and its sign clamp."""

    def __init__(self, run, name):
        mats = run.table.matrices
        self.c = run.signal_table(name)                          # (n_sys, m)
        self.cm = np.einsum("sj,sjk->sk", self.c, mats)          # c M per system
        self.cmm = np.einsum("sj,sjk->sk", self.cm, mats)
        # event-terminated segments end at iL = 0 exactly; the stored end time
        # is rounded to the spacing of absolute time, which can put the
        # evaluated end a few 1e-12 A past zero: the conduction state fixes
        # the sign, so clamp to it
        self._conduction = run.segments.conduction if name == "iL" else None
        self._strategy = run.scenario.switching.strategy

    def clamp(self, val, k):
        """``val`` (the signal in segments ``k``) with the sign the state fixes."""
        if self._conduction is None:
            return val
        return clamp_current(val, self._conduction[k], self._strategy)


def _extrema_sampled(run, name, idx, tau_a, tau_b, ns):
    """Min and max of a signal on each row ``[tau_a, tau_b]`` of segment ``idx``.

    ``ns`` uniform samples per row; each sign change of the derivative
    between two samples is refined by :func:`_refine_turning_points`.
    """
    rows = _SignalRows(run, name)
    m = run.table.matrices.shape[1]
    sys_row = run.segments.system[idx]
    nrow = idx.shape[0]
    frac = np.linspace(0.0, 1.0, ns)
    taus = tau_a[:, None] + (tau_b - tau_a)[:, None] * frac[None, :]
    taus[:, -1] = tau_b
    z = segment_states(run, np.repeat(idx, ns), taus.ravel()).reshape(nrow, ns, m)
    val = rows.clamp(np.einsum("rsj,rj->rs", z, rows.c[sys_row]), idx[:, None])
    der = np.einsum("rsj,rj->rs", z, rows.cm[sys_row])
    lo, hi = val.min(axis=1), val.max(axis=1)
    flips = np.argwhere(der[:, :-1] * der[:, 1:] < 0)
    if flips.shape[0] == 0:
        return lo, hi
    p, q = flips[:, 0], flips[:, 1]
    best_lo, best_hi = _refine_turning_points(run, rows, idx[p], taus[p, q].copy(),
                                              taus[p, q + 1].copy(), np.sign(der[p, q]))
    np.minimum.at(lo, p, best_lo)
    np.maximum.at(hi, p, best_hi)
    return lo, hi


def _refine_turning_points(run, rows, k, a, b, ga):
    """Min and max of the signal met while refining each bracketed turning point.

    ``[a, b]`` [s] brackets a sign change of ``g = c M z`` in segment ``k``,
    whose sign at ``a`` is ``ga``. ``rtsafe``: Newton on ``g`` with
    ``g' = c M^2 z``, kept inside the bracket by bisection, until the step or
    the bracket is a few units in the last place of the time offset.

    References
    ----------
    W. H. Press et al., Numerical Recipes, 3rd ed. (2007), section 9.4
    (``rtsafe``: Newton-Raphson safeguarded by bisection).
    """
    s = run.segments.system[k]
    best_lo = np.full(k.shape[0], np.inf)
    best_hi = np.full(k.shape[0], -np.inf)
    x = 0.5 * (a + b)
    dx = b - a
    dx_old = dx.copy()
    act = np.arange(k.shape[0])
    for _ in range(_REFINE_STEPS):
        if act.shape[0] == 0:
            break
        zk = segment_states(run, k[act], x[act])
        sk = s[act]
        v = rows.clamp(np.einsum("ij,ij->i", zk, rows.c[sk]), k[act])
        best_lo[act] = np.minimum(best_lo[act], v)
        best_hi[act] = np.maximum(best_hi[act], v)
        g = np.einsum("ij,ij->i", zk, rows.cm[sk])
        gp = np.einsum("ij,ij->i", zk, rows.cmm[sk])
        xa = x[act]
        same = np.sign(g) == ga[act]
        a[act] = np.where(same, xa, a[act])
        b[act] = np.where(same, b[act], xa)
        aa, bb = a[act], b[act]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            newton = g / gp
            xn = xa - newton
            # rtsafe: Newton while it stays inside the bracket and at least
            # halves the step before last; bisection otherwise
            use = (np.isfinite(xn) & (xn > aa) & (xn < bb)
                   & (2.0 * np.abs(newton) <= np.abs(dx_old[act])))
        step = np.where(use, newton, xa - 0.5 * (aa + bb))
        x_new = xa - step
        dx_old[act] = dx[act]
        dx[act] = step
        x[act] = x_new
        # converged: a Newton step (taken or not: next to a bracket end it is
        # not) or the bracket below a few units in the last place
        tol = 4.0 * np.spacing(np.maximum(np.abs(aa), np.abs(bb)))
        going = ((g != 0) & (np.abs(step) > tol) & (bb - aa > tol)
                 & ~(np.abs(newton) <= tol))
        act = act[going]
    return best_lo, best_hi
