r"""Reverse recovery by the charge-control model, exact on the stored segments.

A diode that conducts stores charge; when the opposite channel closes, the
charge is swept out as reverse current through that channel, which still
holds the voltage. Two diodes of the stage take part:

==============  ==============================  =================  ============================
diode           conducts (forward current)      forced off when    device
==============  ==============================  =================  ============================
``low_side``    ``LOW_DIODE`` (``i_F = iL``)    entry into HIGH    low-side body diode, or the
                                                                   freewheel diode
``high_side``   ``HIGH_DIODE`` (``i_F = -iL``)  entry into LOW     high-side body diode
==============  ==============================  =================  ============================

Every other conduction code (the channels, idle, any code added later)
counts as "diode not conducting": its charge only decays there.

The modes of a diode come from its keys (:func:`recovery_parameters`): a
fixed charge ``qrr`` per forced recovery (``tau = 0``: the legacy rule, a
recovery only when the diode conducts up to the instant), or the
charge-control model [1]_, [2]_ with lifetime ``tau`` and swept-out share
``k`` (a recovery at every entry into the opposite channel, of whatever
charge is left, so the recovered charge follows the diode's conduction
continuously, e.g. through the CCM boundary, where the fixed charge jumps).
Within a segment the charge is propagated with one block exponential [3]_.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 4 (the diode's stored minority charge and its
   reverse recovery; cited from memory).
.. [2] R. Beaufoy and J. J. Sparkes, "The junction transistor as a
   charge-controlled device", ATE Journal 13, 310-327, 1957 (the
   charge-control model; cited from memory).
.. [3] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Automatic Control 23(3), 395-404, 1978 (a
   driven state appended to an augmented exponential).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from bucksim.engine.small_expm import expm_many
from bucksim.model.parts import Mosfet
from bucksim.model.stage import HIGH, HIGH_DIODE, IDLE, LOW, LOW_DIODE


@dataclass(frozen=True)
class DiodeRole:
    """Where a diode sits: the code in which it conducts, the sign of its forward
    current against ``iL``, and the channel whose turn-on forces it off."""

    name: str
    conducts: int
    sign: float
    forced_by: int


#: The two diodes of the stage (see the module table).
DIODE_ROLES = (DiodeRole("low_side", LOW_DIODE, 1.0, HIGH),
               DiodeRole("high_side", HIGH_DIODE, -1.0, LOW))


def stage_diodes(scenario) -> dict:
    """The scenario's diodes by role: ``{"low_side": Diode, "high_side": Diode}``."""
    ls = scenario.low_side
    return {"low_side": ls.body_diode if isinstance(ls, Mosfet) else ls,
            "high_side": scenario.high_side.body_diode}


def recovery_parameters(diode) -> tuple[float, float]:
    """Lifetime and swept-out share of a diode's stored charge.

    Parameters
    ----------
    diode : bucksim.model.parts.Diode
        Validated on construction (``Diode.__post_init__`` refuses the
        combinations that say nothing definite).

    Returns
    -------
    tau : float
        Charge-control lifetime [s]; 0 means the fixed-charge mode (``qrr``
        per forced recovery, no stored-charge model).
    k : float
        Share of the stored charge swept out at a forced recovery [-], in
        (0, 1]; 1 in the fixed-charge mode (the charge is ``qrr`` itself).

    Notes
    -----
    After long conduction at a constant current ``I`` the stored charge of
    ``dq/dt = I - q / tau`` settles at ``q = I tau``. A stated ``qrr`` at
    ``qrr_current`` then fixes what is not given:

    ============================  ===========================  ============================
    keys given                    ``tau``                      ``k``
    ============================  ===========================  ============================
    ``qrr``                       0 (fixed charge)             1
    ``qrr``, ``qrr_current``      ``qrr / qrr_current``        1
    ``tau``                       ``tau``                      1
    ``tau``, ``qrr``,             ``tau``                      ``qrr / (qrr_current tau)``
    ``qrr_current``
    ============================  ===========================  ============================

    The rest of the stored charge, ``(1 - k) q``, recombines during the
    recovery; none is left afterwards.
    """
    if diode.tau > 0:
        if diode.qrr > 0:
            # the Diode refuses k > 1 beyond rounding; clip that rounding here
            return float(diode.tau), min(1.0, diode.qrr / (diode.qrr_current * diode.tau))
        return float(diode.tau), 1.0
    if diode.qrr_current > 0:
        return diode.qrr / diode.qrr_current, 1.0
    return 0.0, 1.0


def conduction_before_start(scenario, il: float) -> int:
    """Conduction state just before t = 0, as if the run had been switching before.

    A run starts at a high-side turn-on; the state before it is the end of
    the previous period: the rising dead time (diode chosen by the sign of
    ``il`` [A], the inductor current at t = 0), the low-side channel in
    forced PWM without dead time (and in diode emulation with ``il > 0``),
    or idle.
    """
    sw = scenario.switching
    if sw.strategy == "forced-pwm" and sw.dead_time[1] == 0.0:
        return LOW
    if sw.strategy == "diode-emulation" and sw.dead_time[1] == 0.0 and il > 0:
        return LOW
    if il > 0:
        return LOW_DIODE
    if il < 0:
        return HIGH_DIODE
    return IDLE


def previous_conduction(run) -> np.ndarray:
    """Conduction state before each segment (before the first: see Notes).

    Notes
    -----
    A run that starts settled repeats its first period, so the state before
    t = 0 is the state at the end of that period; otherwise it is
    :func:`conduction_before_start`. The two agree whenever the period ends
    as that rule assumes.
    """
    seg = run.segments
    prev = np.empty_like(seg.conduction)
    prev[1:] = seg.conduction[:-1]
    if len(seg):
        if run.starts_settled:
            last = int(np.searchsorted(seg.t0, first_period_end(run), side="left")) - 1
            prev[0] = seg.conduction[max(last, 0)]
        else:
            prev[0] = conduction_before_start(run.scenario, float(seg.x0[0, 0]))
    return prev


def first_period_end(run) -> float:
    """End of the run's first period [s]: ``t_0 + T``, or the segment start within
    1e-9 T of it (the engine's period starts carry the rounding of absolute time)."""
    seg = run.segments
    target = float(seg.t0[0]) + run.period
    j = int(np.argmin(np.abs(seg.t0 - target)))
    return float(seg.t0[j]) if abs(seg.t0[j] - target) <= 1e-9 * run.period else target


class ChargeGains:
    r"""Memoised exact charge response of one diode per (system, duration).

    Parameters
    ----------
    run : Run
    role : DiodeRole
    tau : float
        Lifetime [s], > 0.

    Notes
    -----
    In a segment of system ``s`` the state follows ``z' = M_s z`` and the
    stored charge ``q' = c_F z - q / tau``, with ``c_F = sign * [iL row]``
    while the diode conducts and 0 otherwise. With ``w = [z, q]``,

    .. math::

        w' = \begin{bmatrix} M_s & 0 \\ c_F & -1/\tau \end{bmatrix} w, \qquad
        q(d) = e^{-d/\tau} q(0) + g_{s,d}\, z(0),

    ``g_{s,d}`` the first ``m`` entries of the last row of the block
    exponential (one compiled ``expm_many`` per pair; Van Loan 1978, in the module's
    References). Without
    conduction the block is diagonal, ``g = 0``, and the charge decays as
    ``e^{-d/\tau}``: no exponential is needed.
    """

    def __init__(self, run, role: DiodeRole, tau: float):
        self.tau = float(tau)
        self.conducts = role.conducts
        self.matrices = run.stage.matrices
        # the forward current: iL less what a ramping channel carries (model.stage_ramps)
        ramp = "high_side_ramp" if role.conducts == LOW_DIODE else "low_side_ramp"
        self.rows = role.sign * run.signal_table("iL")
        if ramp in run.signals:
            self.rows = self.rows - role.sign * run.signal_table(ramp)
        self._cache: dict[tuple[int, float], np.ndarray] = {}

    def gain(self, system: int, d: float) -> np.ndarray:
        """``g_{s,d}`` (length ``m``) of a conducting segment of duration ``d`` [s]."""
        key = (int(system), float(d))
        g = self._cache.get(key)
        if g is None:
            M = self.matrices[key[0]]
            m = M.shape[0]
            big = np.zeros((m + 1, m + 1))
            big[:m, :m] = M
            big[m, :m] = self.rows[key[0]]
            big[m, m] = -1.0 / self.tau
            g = expm_many(big[None], key[1])[0, m, :m].copy()
            self._cache[key] = g
        return g

    def drive(self, run, index: np.ndarray, d: np.ndarray) -> np.ndarray:
        """``g_{s,d} z0`` [C] of segments ``index`` run for ``d`` [s] (0 where not conducting)."""
        seg = run.segments
        out = np.zeros(index.shape[0])
        for j in np.flatnonzero(seg.conduction[index] == self.conducts):
            k = index[j]
            g = self.gain(seg.system[k], d[j])
            out[j] = g[:-1] @ seg.x0[k] + g[-1]
        return out


def _scan(decay, drive, forced, q_in):
    """``q`` before each step and after the last: ``q <- 0`` where forced, then
    ``q <- decay q + drive`` (a plain loop: the recurrence is sequential)."""
    q = float(q_in)
    before = np.empty(len(decay))
    for j, (a, b, f) in enumerate(zip(decay.tolist(), drive.tolist(), forced.tolist(),
                                      strict=True)):
        before[j] = q
        if f:
            q = 0.0
        q = a * q + b
    return before, q


def charge_path(run, gains: ChargeGains, forced: np.ndarray, k_from: int, q_in: float,
                t_stop: float):
    """Stored charge [C] of one diode from segment ``k_from`` up to ``t_stop`` [s].

    Parameters
    ----------
    forced : ndarray of bool
        Per segment: the diode is forced off at its start.
    k_from : int
        First segment; ``q_in`` [C] is the charge just before its start.

    Returns
    -------
    index : ndarray of int
        The segments starting before ``t_stop`` (from ``k_from``).
    before : ndarray
        The charge just before each of them starts (what a recovery there
        sweeps out, times ``k``) [C].
    q_stop : float
        The charge at ``t_stop`` (left limit) [C].
    any_forced : bool
        Whether a recovery reset the charge on the way.
    """
    seg = run.segments
    k_to = int(np.searchsorted(seg.t0, t_stop, side="left"))
    index = np.arange(k_from, max(k_to, k_from))
    d = seg.dt[index].copy()
    if index.shape[0]:
        # the last segment is cut at t_stop (left limit there)
        d[-1] = min(d[-1], t_stop - seg.t0[index[-1]])
    # no charge and no conduction yet: the charge stays 0 up to the first
    # conduction (a diode that never conducts is not scanned over a long run)
    skip = 0
    if q_in == 0.0:
        on = np.flatnonzero(seg.conduction[index] == gains.conducts)
        skip = int(on[0]) if on.size else index.shape[0]
    decay = np.exp(-d[skip:] / gains.tau)
    drive = gains.drive(run, index[skip:], d[skip:])
    before = np.zeros(index.shape[0])
    before[skip:], q_stop = _scan(decay, drive, forced[index[skip:]], q_in)
    return index, before, q_stop, bool(np.any(forced[index]))


def periodic_start_charge(run, gains: ChargeGains, forced: np.ndarray) -> float:
    r"""Stored charge [C] just before t = 0 of a run that starts settled.

    Notes
    -----
    ``q`` is affine in its start value: over the first period ``[t_0, t_0 +
    T)``, with ``q_0(t)`` the path from ``q(t_0^-) = 0``,

    .. math::

        q(t_0 + T^-) = A\, q(t_0^-) + q_0(t_0 + T^-), \qquad
        A = \begin{cases} e^{-T/\tau} & \text{no recovery of this diode in the period} \\
                          0 & \text{otherwise (a recovery forgets the past)} \end{cases}

    so the periodic value ``q(t_0 + T^-) = q(t_0^-)`` is

    .. math::

        q(t_0^-) = \frac{q_0(t_0 + T^-)}{1 - A}, \qquad 1 - A = -\mathrm{expm1}(-T/\tau)

    (the closed form of iterating the period map to its fixed point;
    ``expm1`` keeps ``1 - A`` accurate for ``tau >> T``).
    """
    seg = run.segments
    t_end = first_period_end(run)
    if run.t_end < t_end - 1e-9 * run.period:
        raise ValueError(f"a run that starts settled must hold one whole period "
                         f"(T = {run.period:.6g} s) for its periodic stored charge; it ends "
                         f"at {run.t_end:.6g} s")
    t_end = min(t_end, run.t_end)
    _, _, q_end, reset = charge_path(run, gains, forced, 0, 0.0, t_end)
    return q_end if reset else q_end / -math.expm1(-(t_end - float(seg.t0[0])) / gains.tau)


def _window(run, t_start, t_stop):
    seg = run.segments
    if len(seg) == 0:
        raise ValueError("recovered_charges: the run holds no segments")
    lo, hi = float(seg.t0[0]), float(run.t_end)
    t_start = lo if t_start is None else float(t_start)
    t_stop = hi if t_stop is None else float(t_stop)
    if not lo <= t_start <= t_stop <= hi:      # NaN fails here too
        raise ValueError(f"recovered_charges: need {lo:.6g} <= t_start <= t_stop <= {hi:.6g} s "
                         f"(the simulated span), got t_start={t_start!r} s, t_stop={t_stop!r} s")
    return t_start, t_stop


def _charge_control(run, role, tau, forced, in_window, t_stop):
    """Recovery segments, the charge before each, and the start and stop charges [C]."""
    seg = run.segments
    gains = ChargeGains(run, role, tau)
    q_start = periodic_start_charge(run, gains, forced) if run.starts_settled else 0.0
    inside = np.flatnonzero(in_window)
    w0 = int(inside[0]) if inside.size else int(np.searchsorted(seg.t0, t_stop, side="left"))
    # start at the last recovery before the window: it leaves no charge behind,
    # so nothing before it matters (a long run is not rescanned for a short window)
    earlier = np.flatnonzero(forced[:w0])
    k_from, q_in = (int(earlier[-1]), 0.0) if earlier.size else (0, q_start)
    index, before, q_stop, _ = charge_path(run, gains, forced, k_from, q_in, t_stop)
    pick = forced[index] & in_window[index]
    return index[pick], before[pick], q_start, q_stop


def _ramped_off(run, role: DiodeRole, prev: np.ndarray) -> np.ndarray:
    """Per segment: it starts where the opposite channel's rising ramp has taken all
    of the diode's current (:mod:`bucksim.model.stage_ramps`): the diode stops there
    because the channel turns on, a forced recovery like an entry into the channel."""
    seg = run.segments
    stage = run.stage
    i = stage.i_hs if role.conducts == LOW_DIODE else stage.i_ls
    if i < 0:
        return np.zeros(seg.conduction.shape[0], dtype=bool)
    rising = seg.x0[:, i + 1] * (1.0 if role.conducts == LOW_DIODE else -1.0) > 0.0
    return (prev == role.conducts) & (seg.conduction != role.conducts) & rising


def recovered_charges(run, t_start: float | None = None, t_stop: float | None = None) -> dict:
    r"""Forced recoveries of both diodes over ``[t_start, t_stop)`` and their charges.

    Parameters
    ----------
    run : Run
    t_start, t_stop : float, optional
        The window [s] (default the whole run); a recovery at a segment start
        ``t`` counts when ``t_start <= t < t_stop``, as in
        :func:`bucksim.analysis.switching.switching_energy`.

    Returns
    -------
    dict
        ``{"low_side": {...}, "high_side": {...}}``, each with ``mode``
        (``"fixed"`` or ``"charge-control"``), ``tau`` [s], ``k`` [-],
        ``times`` [s], ``segments`` (index of the segment each recovery
        starts), ``charges`` [C] (recovered charge of each), ``vin`` [V] (the
        supply at each: the recovery energy is ``charges * vin``),
        ``start_charge`` and ``stored_charge`` [C] (the charge just before the
        run's start and at ``t_stop``, left limit: what a recovery exactly at
        ``t_stop`` would sweep out, times ``k``; both 0 in the fixed mode).

    Notes
    -----
    Charge-control mode (the module's References): ``dq/dt = i_F - q / tau`` with ``i_F``
    the diode's forward current while it conducts and 0 otherwise. At every
    entry into the opposite channel (from any other state) the charge
    ``Q_rr = k q(t^-)`` is swept out and ``q(t^+) = 0``. Within a segment
    ``q`` is propagated exactly (:class:`ChargeGains`); the charge before
    the run's start is the periodic value when the run starts settled
    (:func:`periodic_start_charge`), else 0 (from rest, or from a given
    state).

    Fixed mode (``tau = 0``): ``Q_rr = qrr`` at each entry into the opposite
    channel straight from the diode's own conduction (``LOW_DIODE -> HIGH``,
    ``HIGH_DIODE -> LOW``), or where the opposite channel's rising current ramp
    takes all of the diode's current; the state before t = 0 is
    :func:`previous_conduction`'s.
    """
    seg = run.segments
    t_start, t_stop = _window(run, t_start, t_stop)
    prev = previous_conduction(run)
    in_window = (seg.t0 >= t_start) & (seg.t0 < t_stop)
    diodes = stage_diodes(run.scenario)
    vin_rows = run.signal_table("vin")
    out = {}
    for role in DIODE_ROLES:
        diode = diodes[role.name]
        tau, k = recovery_parameters(diode)
        forced = (seg.conduction == role.forced_by) & (prev != role.forced_by)
        if tau == 0:
            idx = np.flatnonzero((forced & (prev == role.conducts) | _ramped_off(run, role, prev))
                                 & in_window)
            charges = np.full(idx.shape[0], float(diode.qrr))
            start = stored = 0.0
        else:
            idx, before, start, stored = _charge_control(run, role, tau, forced, in_window, t_stop)
            charges = k * before
        z = np.column_stack([seg.x0[idx], np.ones(idx.shape[0])])
        out[role.name] = {
            "mode": "fixed" if tau == 0 else "charge-control", "tau": tau, "k": k,
            "times": seg.t0[idx].copy(), "segments": idx, "charges": charges,
            "vin": np.einsum("ij,ij->i", vin_rows[seg.system[idx]], z),
            "start_charge": float(start), "stored_charge": float(stored)}
    return out
