"""Independent event-driven reference for the buck stage under ANALOG closed-loop control.

Written from the circuit and control description alone (not from the engine),
to check the engine's continuous-time controller from the outside. The power
stage equations and the conduction rules are those of :mod:`reference_sim`
(its :class:`~reference_sim.Circuit` gives ``A, b`` per conduction state);
this module adds the compensator as extra linear states and the PWM
comparator as a state-dependent event, and integrates the whole thing with
``scipy.integrate.solve_ivp`` (DOP853), restarted at every switching instant.

Notes
-----
Full state ``z = [iL, vC, w]``: plant states of :mod:`reference_sim`
([A], [V]) and the compensator states ``w = [x_I, w_rest]`` of our own
realisation of

    Gc(s) = gain / s * prod_i (1 + s / (2 pi fz_i)) / prod_j (1 + s / (2 pi fp_j))

(no ``1/s`` and no ``x_I`` when ``integrator = false``), built in
:mod:`reference_compensator`: the integrator state ``x_I`` [V] explicit
(``x_I' = gain e``; the first zero joins it when there is one zero more than
poles), the remaining factors as first-order sections whose states are their
low-passed inputs [V] (atol then means the same thing in every component).

Output node (Erickson & Maksimovic 2020, ch. 2; :mod:`reference_sim`)::

    vo = k (vC + ESR iL - ESR Icc) = cv . x + dv,      k = 1 / (1 + ESR G)

Loop, continuous in time::

    vref(t) = Vref min(1, t / t_ss)          (Vref when t_ss = 0)
    e       = Hs (vref(t) - vo)              (Hs = sense_gain)
    w'      = Ac w + Bc e,     u = Cc w + Dc e

so in conduction state ``s`` the full system is affine with a ramp input::

    z' = [[A_s, 0], [-Hs Bc cv, Ac]] z + [b_s; -Hs Bc dv] + [0; Hs Bc] vref(t)

Integrator hold (anti-windup, :mod:`reference_compensator`): the row of
``x_I`` is zero (``x_I' = 0``) while ``(x_I >= w_hi and e > 0)`` or
``(x_I <= w_lo and e < 0)``; ``[w_lo, w_hi] = [0, Dmax Vm]`` in voltage mode,
``[0, inf)`` in peak-current mode. Free, ``x_I`` rising to ``w_hi`` (falling
to ``w_lo``) is a terminal event that starts the hold with ``x_I`` set to the
limit exactly; held, ``e`` falling (rising) to 0 is a terminal event that
ends it. At every restart that is not such an event (gate changes, the end of
the blanking time, ``t_ss``) the hold is re-evaluated from the rule.

Switching (cycle k starts at ``t_k = k T``):

* voltage mode: the high side turns off at the first
  ``t in [t_k + t_min, t_k + Dmax T]`` with ``Vm (t - t_k) / T - u(t) >= 0``
  (trailing-edge PWM against a ramp of ``Vm`` peak-to-peak, Erickson &
  Maksimovic ch. 7), at ``t_k + Dmax T`` at the latest;
* peak-current mode: the same with ``Ri iL(t) + Se (t - t_k) - u(t) >= 0``
  (Erickson & Maksimovic ch. 12; ``t_min`` is the blanking time);
* a current limit ends the on-time where ``iL`` rises to it (after ``t_min``);
* pulse skipping: voltage mode skips the pulse when ``u(t_k) <= Vm t_min / T``,
  peak-current mode when ``Ri iL(t_k) >= u(t_k)``; a skipped period runs the
  off-time rules from ``t_k`` (this reference's own convention, identical to
  any other in diode emulation at ``iL = 0``);
* after turn-off, the off-time rules of :mod:`reference_sim`: falling dead
  time, low-side gate until ``t_{k+1} - td_r``, rising dead time (synchronous);
  the freewheel diode (asynchronous); diode states and diode emulation stop at
  ``iL = 0`` and idle.

Events are solve_ivp terminal events (a root of the event function on the
DOP853 dense output, located by brentq); each piece is integrated in local
time ``(t - t_start) / T`` so that brentq's absolute tolerance (4 eps) is a
fraction of the period; while an event is searched (always, with an
integrator: its hold events), steps are at most T/16, so a pair of roots hides
inside one step only if closer than that. A condition already met where a
search window opens ends the on-time there. Integration restarts at every
gate change, at every hold event and at ``t_ss`` (the kink of the reference
ramp).

References
----------
R. W. Erickson and D. Maksimovic, Fundamentals of Power Electronics, 3rd ed.,
Springer 2020: ch. 2 (buck stage), 7 (averaged models, PWM modulator gain
1/Vm), 9 (compensators), 12 (current-programmed control).
K. J. Astrom and T. Hagglund, Advanced PID Control, ISA 2006, ch. 3
(integrator windup, conditional integration).
SciPy (general reference library): ``integrate.solve_ivp`` (DOP853, events),
``linalg.expm`` (second integrator in :meth:`AnalogLoop.replay_expm`).
C. F. Van Loan, "Computing integrals involving the matrix exponential", IEEE
Trans. Automatic Control 23(3), 1978 (augmented exponential).
T. J. Aprille and T. N. Trick, "Steady-state analysis of nonlinear circuits with
periodic inputs", Proc. IEEE 60(1), 1972 (shooting, :meth:`AnalogLoop.steady_state`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.linalg import expm

from tests.references.compensator import (
    FREE,
    HELD_HIGH,
    HELD_LOW,
    compensator_polynomials,
    compensator_ss,
    hold_rule,
    integrator_limits,
)
from tests.references.stage_solver import _GATE_LOW, _GATE_OFF, HIGH, IDLE, Circuit

__all__ = ["AnalogLoop", "Loop", "LoopTrace", "circuit_of", "compensator_polynomials",
           "compensator_ss", "reference_loop"]


@dataclass(frozen=True)
class Loop:
    """Analog controller settings [SI units], read from a Scenario's ``control``."""

    mode: str
    reference: float
    soft_start: float
    sense_gain: float
    ramp: float
    current_sense: float
    slope: float
    current_limit: float | None
    max_duty: float
    min_on_time: float
    pulse_skipping: bool
    spec: dict

    @classmethod
    def from_control(cls, c):
        return cls(c.mode, c.reference, c.soft_start, c.sense_gain, c.ramp, c.current_sense,
                   c.slope_compensation, c.current_limit, c.max_duty, c.min_on_time,
                   c.pulse_skipping, dict(c.compensator))


def circuit_of(scenario):
    """:class:`reference_sim.Circuit` of a closed-loop scenario's power stage.

    (Constant supply and load; dead times shorter than half a period, since the
    stage is read through an open-loop copy at duty 0.5. ``Circuit.duty`` is unused.)
    """
    from bucksim.model.parts import Control
    plant = dataclasses.replace(scenario, control=Control(duty=0.5))
    return Circuit.from_scenario(plant)


@dataclass
class LoopTrace:
    """Per-period results: ``t`` (n+1,) clock instants [s], ``z`` (n+1, 2+m) full
    states there, ``u`` (n,) compensator output at each clock [V], ``duty`` (n,)
    on-time / T, ``skipped`` (n,) bool, ``peak`` (n,) iL at turn-off [A],
    ``zero_events`` instants where a diode state reached iL = 0 [s],
    ``segments`` ``[(start, stop, conduction code, hold), ...]`` as integrated
    (hold: HELD_LOW, FREE or HELD_HIGH), ``holds`` ``[(t, hold), ...]`` every
    change of the integrator hold [s] (by event or by the rule at a restart)."""

    t: np.ndarray
    z: np.ndarray
    u: np.ndarray
    duty: np.ndarray
    skipped: np.ndarray
    peak: np.ndarray
    zero_events: np.ndarray
    segments: list
    holds: list

    def vo(self, circuit):
        return circuit.output_voltage(self.z[:, :2])


class AnalogLoop:
    """Plant + analog compensator + comparator, integrated with solve_ivp."""

    def __init__(self, circuit: Circuit, loop: Loop, rtol=1e-12, atol=1e-14):
        self.c, self.loop = circuit, loop
        self.T = circuit.period
        Ac, Bc, Cc, Dc = compensator_ss(loop.spec)
        self.m = Ac.shape[0]
        n = 2 + self.m
        k, esr = circuit._k, circuit.esr
        self.cv = np.array([k * esr, k])                   # vo = cv . x + dv
        self.dv = -k * esr * circuit.sink
        Hs = loop.sense_gain
        self.Cc, self.Dc, self.Hs = Cc, Dc, Hs
        # x_I is the first compensator state (z[2]); no hold without an integrator
        self.ix = 2 if loop.spec.get("integrator", True) else None
        self.lo, self.hi = integrator_limits(loop)
        self.sys = {}                                      # (code, held) -> (M, q, r)
        for code in range(5):
            A, b = circuit.system(code)
            M = np.zeros((n, n))
            M[:2, :2] = A
            M[2:, :2] = -Hs * np.outer(Bc, self.cv)
            M[2:, 2:] = Ac
            q = np.concatenate([b, -Hs * Bc * self.dv])
            r = np.concatenate([[0.0, 0.0], Hs * Bc])     # coefficient of vref(t)
            self.sys[code, False] = (M, q, r)
            if self.ix is not None:
                M, q, r = M.copy(), q.copy(), r.copy()
                M[self.ix], q[self.ix], r[self.ix] = 0.0, 0.0, 0.0
                self.sys[code, True] = (M, q, r)
        self.opts = dict(method="DOP853", rtol=rtol, atol=atol)
        self.segments, self.holds, self.hold = [], [], FREE

    # -- signals ---------------------------------------------------------
    def vref(self, t):
        L = self.loop
        return L.reference if L.soft_start <= 0 else L.reference * min(1.0, t / L.soft_start)

    def e(self, t, z):
        """Error [V] at the compensator input at time ``t`` for full state ``z``."""
        return float(self.Hs * (self.vref(t) - self.cv @ z[:2] - self.dv))

    def u(self, t, z):
        """Compensator output [V] at time ``t`` for full state ``z``."""
        return float(self.Cc @ z[2:] + self.Dc * self.e(t, z))

    def hold_events(self, hold):
        """Terminal events that end the hold state ``hold``: ``[(fn(t, z), new hold)]``."""
        ix, lo, hi = self.ix, self.lo, self.hi
        if ix is None:
            return []
        if hold == FREE:
            out = [(lambda t, y: y[ix] - lo, -1.0, HELD_LOW)]
            if math.isfinite(hi):
                out.append((lambda t, y: y[ix] - hi, 1.0, HELD_HIGH))
        else:    # held high: e falls to 0; held low: e rises to 0
            out = [(lambda t, y: self.e(t, y), -float(hold), FREE)]
        return [(_event(fn, d), new) for fn, d, new in out]

    def comparator(self, t, z, tk):
        """Event function of the PWM / peak-current comparator (>= 0: turn off)."""
        L = self.loop
        if L.mode == "voltage-mode":
            return L.ramp * (t - tk) / self.T - self.u(t, z)
        return L.current_sense * z[0] + L.slope * (t - tk) - self.u(t, z)

    # -- integration -----------------------------------------------------
    def _solve(self, code, z, t0, t1, events):
        """Integrate from t0 to t1; return (t, z, index of the event or None).

        Each piece runs in local time s = (t - a) / T: solve_ivp locates event
        roots with an absolute tolerance of 4 eps in its own time variable,
        which in seconds would be ~4e-10 of a 2 us period. A hold event ends a
        piece and the next one starts at once with the new hold state; the
        caller sees only its own events.
        """
        T, ts, events = self.T, self.loop.soft_start, list(events or ())
        cuts = [t0, t1] if not t0 < ts < t1 else [t0, ts, t1]
        for a, b in zip(cuts[:-1], cuts[1:], strict=True):
            z = np.array(z, float)
            self._set_hold(a, self._rule(a, z))
            while b > a:
                held = self.hold != FREE
                M, q, r = self.sys[code, held]
                ends = self.hold_events(self.hold)
                local = []
                for ev in events + [fn for fn, _ in ends]:
                    def fn(s, y, ev=ev, a=a):
                        return ev(a + s * T, y)
                    fn.terminal, fn.direction = True, ev.direction
                    local.append(fn)
                # steps <= T/16 while searching, so a root pair cannot hide inside one step
                sol = solve_ivp(lambda s, y, M=M, q=q, r=r, a=a:
                                T * (M @ y + q + r * self.vref(a + s * T)),
                                (0.0, (b - a) / T), z, events=local or None,
                                max_step=1 / 16 if local else np.inf, **self.opts)
                hit = None
                if sol.status == 1:
                    hit = next(i for i, se in enumerate(sol.t_events) if len(se))
                    te = a + float(sol.t_events[hit][0]) * T
                    z = sol.y_events[hit][0].copy()
                else:
                    te, z = b, sol.y[:, -1].copy()
                self.segments.append((a, te, code, self.hold))
                if hit is None:
                    break
                if hit < len(events):
                    return te, z, hit
                new = ends[hit - len(events)][1]
                if te <= a and self.segments[-2][:2] == (a, a):
                    raise RuntimeError(f"integrator hold chatters at t = {te!r} s")
                if new != FREE:                  # the hold starts exactly on the limit
                    z[self.ix] = self.lo if new == HELD_LOW else self.hi
                self._set_hold(te, new)
                a = te
        return t1, z, None

    def _rule(self, t, z):
        return FREE if self.ix is None else hold_rule(z[self.ix], self.e(t, z), self.lo,
                                                      self.hi)

    def _set_hold(self, t, hold):
        if hold != self.hold:
            self.holds.append((t, hold))
            self.hold = hold

    def _on_phase(self, z, tk):
        """High side from t_k; return (t_off, z at t_off)."""
        L = self.loop
        t_open = tk + L.min_on_time
        t_max = tk + L.max_duty * self.T
        if L.min_on_time > 0:
            _, z, _ = self._solve(HIGH, z, tk, t_open, None)
        if self.comparator(t_open, z, tk) >= 0.0 or (
                L.current_limit is not None and z[0] >= L.current_limit):
            return t_open, z

        def cmp(t, y):
            return self.comparator(t, y, tk)
        cmp.terminal, cmp.direction = True, 1.0
        events = [cmp]
        if L.current_limit is not None:
            def limit(t, y):
                return y[0] - L.current_limit
            limit.terminal, limit.direction = True, 1.0
            events.append(limit)
        t, z, _ = self._solve(HIGH, z, t_open, t_max, events)
        return t, z

    def _gate_phase(self, gate, z, t0, t1, zero_events):
        """One off-time gate phase with the diode / diode-emulation rules."""
        if t1 <= t0:
            return z
        code, direction = self.c.conduction(gate, z[0])
        if direction == 0:
            return self._solve(code, z, t0, t1, None)[1]

        def il(t, y):
            return y[0]
        il.terminal, il.direction = True, float(direction)
        t, z, hit = self._solve(code, z, t0, t1, [il])
        if hit is None:
            return z
        zero_events.append(t)
        z[0] = 0.0
        return self._solve(IDLE, z, t, t1, None)[1]

    def _skip(self, z, tk):
        L = self.loop
        if not L.pulse_skipping:
            return False
        u = self.u(tk, z)
        if L.mode == "voltage-mode":
            return u <= L.ramp * L.min_on_time / self.T
        return L.current_sense * z[0] >= u

    def period(self, z, k, zero_events=None):
        """Advance one period from t_k = k T.

        Returns ``(z(t_{k+1}), on-time [s], iL at turn-off [A], skipped)``.
        """
        zero_events = [] if zero_events is None else zero_events
        c, T = self.c, self.T
        tk, tn = k * T, (k + 1) * T
        skipped = self._skip(z, tk)
        if skipped:
            t_off = tk
        else:
            t_off, z = self._on_phase(np.array(z, float), tk)
        peak = z[0]
        if c.strategy == "asynchronous":
            phases = [(t_off, tn, _GATE_OFF)]
        else:
            tf, tr = c.dead_falling, c.dead_rising
            phases = [(t_off, t_off + tf, _GATE_OFF), (t_off + tf, tn - tr, _GATE_LOW),
                      (tn - tr, tn, _GATE_OFF)]
        for t0, t1, gate in phases:
            z = self._gate_phase(gate, z, t0, t1, zero_events)
        return z, t_off - tk, peak, skipped

    def run(self, cycles, z0=None):
        """Simulate ``cycles`` periods from ``z0`` (rest when None)."""
        z = np.zeros(2 + self.m) if z0 is None else np.array(z0, float)
        self.segments, self.holds, self.hold = [], [], FREE
        zs, us, on, skips, peaks, zero_events = [z.copy()], [], [], [], [], []
        for k in range(cycles):
            us.append(self.u(k * self.T, z))
            z, ton, peak, skipped = self.period(z, k, zero_events)
            zs.append(z.copy())
            on.append(ton)
            peaks.append(peak)
            skips.append(skipped)
        return LoopTrace(np.arange(cycles + 1) * self.T, np.array(zs), np.array(us),
                         np.array(on) / self.T, np.array(skips), np.array(peaks),
                         np.array(zero_events), list(self.segments), list(self.holds))

    def replay_expm(self, trace, z0=None):
        """Re-propagate ``trace``'s segments exactly (second integrator).

        Each segment is affine with a ramp input; augmenting ``Z = [z, vref, 1]``
        (``vref' = Vref / t_ss`` before ``t_ss``, 0 after) makes it
        ``Z' = Maug Z``, solved by ``scipy.linalg.expm`` (Van Loan 1978). An
        idle segment starts at ``iL = 0``, a held one with ``x_I`` on its limit.
        Returns ``{segment stop: z}``.
        """
        n = 2 + self.m
        z = np.zeros(n) if z0 is None else np.array(z0, float)
        ts, out = self.loop.soft_start, {}
        for a, b, code, hold in trace.segments:
            M, q, r = self.sys[code, hold != FREE]
            Ma = np.zeros((n + 2, n + 2))
            Ma[:n, :n], Ma[:n, n], Ma[:n, n + 1] = M, r, q
            Ma[n, n + 1] = self.loop.reference / ts if ts > 0 and a < ts else 0.0
            if code == IDLE:
                z[0] = 0.0
            if hold != FREE:
                z[self.ix] = self.lo if hold == HELD_LOW else self.hi
            z = (expm(Ma * (b - a)) @ np.r_[z, self.vref(a), 1.0])[:n]
            out[b] = z.copy()           # z itself is pinned in place above
        return out

    # -- periodic steady state (after the soft start) ----------------------
    def cycle_map(self, z):
        """One period at the final reference: z(t_k) -> z(t_{k+1})."""
        k = math.ceil(self.loop.soft_start / self.T) if self.loop.soft_start > 0 else 0
        return self.period(z, k)[0]

    def jacobian(self, z, h=1e-5):
        """Central-difference Jacobian of :meth:`cycle_map`.

        Steps are h x state scale, divided by the state's gain to ``u`` where that
        exceeds 1: a compensator behind a high-frequency gain of hundreds would
        otherwise move the comparator by ~1e-3 of the ramp, far into the
        curvature of the duty."""
        du = np.abs(np.r_[-self.Dc * self.Hs * self.cv, self.Cc])
        scale = np.maximum(np.abs(z), 1e-3) / np.maximum(du, 1.0)
        J = np.empty((z.size, z.size))
        for j in range(z.size):
            dz = np.zeros(z.size)
            dz[j] = h * scale[j]
            J[:, j] = (self.cycle_map(z + dz) - self.cycle_map(z - dz)) / (2 * dz[j])
        return J

    def guess(self):
        """Averaged operating point: vo = Vref, iL = load, compensator at rest on the
        output it needs (voltage mode u = Vm D; peak-current u = Ri (IL + dI/2) + Se D T)."""
        c, L = self.c, self.loop
        vo = L.reference
        il = c.conductance * vo + c.sink
        duty = (vo + (c.dcr + (c.rds_ls or 0.0)) * il) / c.vin     # a first guess only
        if L.mode == "voltage-mode":
            u = L.ramp * duty
        else:
            ripple = vo * (1 - duty) / (c.inductance * c.frequency)
            u = L.current_sense * (il + ripple / 2) + L.slope * duty * self.T
        x = np.array([il, vo / c._k - c.esr * (il - c.sink)])
        Ac, _, Cc, _ = compensator_ss(L.spec)
        w = np.linalg.lstsq(np.vstack([Ac, Cc]), np.r_[np.zeros(self.m), u], rcond=None)[0]
        return np.concatenate([x, w])

    def steady_state(self, z0=None, tol=1e-13, max_iter=20):
        """Periodic orbit by Newton shooting (Aprille & Trick 1972) on :meth:`cycle_map`.

        Returns ``(z*, multipliers, residual)``; the multipliers are the
        eigenvalues of the differenced Jacobian at z* (realisation-independent).
        """
        z = self.guess() if z0 is None else np.array(z0, float)
        scale = np.maximum(np.abs(z), 1.0)
        for _ in range(max_iter):
            F = self.cycle_map(z) - z
            if np.max(np.abs(F) / scale) < tol:
                break
            J = self.jacobian(z)
            z = z - np.linalg.solve(J - np.eye(z.size), F)
        residual = float(np.max(np.abs(self.cycle_map(z) - z) / scale))
        return z, np.linalg.eigvals(self.jacobian(z)), residual


def _event(fn, direction):
    fn.terminal, fn.direction = True, direction
    return fn


def reference_loop(scenario, **opts):
    """:class:`AnalogLoop` of a closed-loop scenario (constant supply and load)."""
    return AnalogLoop(circuit_of(scenario), Loop.from_control(scenario.control), **opts)
