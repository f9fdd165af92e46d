"""Reverse inductor current at light load: where it starts and what it returns.

A synchronous stage in forced PWM keeps its low-side channel on for the whole
off-time, so below some load the inductor current swings negative every
period and charge flows back toward the supply. :func:`reverse_current`
evaluates, in periodic steady state at each load level, the minimum inductor
current, the share of the period with ``iL < 0``, and the charge and energy
sent back to the supply per cycle, and finds the load at which reversal
starts, both in closed form (the ripple and the CCM/DCM boundary of [1]_; the
reversal rule [2]_) and on the exact waveforms.

Diode emulation and the asynchronous stage cannot reverse (the low side stops
at zero current); for them the same boundary is where the stage enters
discontinuous conduction (DCM), and the result says so.

Load levels
-----------
A level is one load setting, written as a number or a string with a unit:

* ``"0.3 A"``: the load current sink ``load.current`` [A];
* ``"3.3 ohm"``: the load resistor ``load.resistance`` [ohm];
* a bare number takes the unit of the scenario's own load: A when the
  scenario's load is a current sink (no resistor), ohm otherwise.

A level of the scenario's own kind changes that key only (a resistor in
parallel with a sink keeps the sink); a level of the other kind makes the
load that single element. Load steps and soft-start are dropped: a level is a
steady operating point.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020: ch. 2 (CCM ripple ``dI = Vo (1 - D) / (L fs)``),
   ch. 5 (CCM/DCM boundary ``K = 2 L / (R Ts) = 1 - D``, i.e. ``Io = dI / 2``).
   Chapter numbers from memory.
.. [2] Forced-PWM current reverses when ``Io < dI / 2``: common practice.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np

from bucksim.model.stage import HIGH, HIGH_DIODE, IDLE, LOW, clamp_current, current_reverses
from bucksim.model.units import format_si
from bucksim.studies.levels import (
    LoadLevel,
    load_kind,
    parse_levels,
    periodic_run,
    require_open_loop,
    segment_values,
    with_level,
)
from bucksim.threads import single_blas_thread

CAUTION = ("Caution: simulation is no substitute for validating the power stage on the bench "
           "with its real parts.")

_GAUSS = np.polynomial.legendre.leggauss(24)
_SAMPLES = 17           # per segment, to bracket zero crossings and interior minima
_BOUNDARY_RTOL = 1e-6   # on the load variable; the contract asks 1e-4 in load current


# ----------------------------------------------------------------------------- load levels

def _il_samples(run):
    """iL sampled on every segment, the sign fixed by the conduction state."""
    seg = run.segments
    n = len(seg)
    frac = np.linspace(0.0, 1.0, _SAMPLES)
    tau = (seg.dt[:, None] * frac[None, :]).ravel()
    idx = np.repeat(np.arange(n), _SAMPLES)
    val = segment_values(run, "iL", idx, tau).reshape(n, _SAMPLES)
    cond = seg.conduction[:, None]
    # event-ended segments stop at iL = 0 to rounding; the state fixes the sign
    val = clamp_current(val, cond, run.scenario.switching.strategy)
    val = np.where(cond == IDLE, 0.0, val)
    return val, tau.reshape(n, _SAMPLES)


def minimum_current(run, conduction=None) -> float:
    """Exact minimum of iL [A] over the run (optionally only in some conduction states)."""
    from scipy.optimize import minimize_scalar

    seg = run.segments
    val, tau = _il_samples(run)
    rows = np.arange(len(seg))
    if conduction is not None:
        rows = rows[np.isin(seg.conduction, conduction)]
        if rows.shape[0] == 0:
            return math.inf
    sub = val[rows]
    r, q = np.unravel_index(np.argmin(sub), sub.shape)
    k = rows[r]
    best = float(sub[r, q])
    if 0 < q < _SAMPLES - 1:  # an interior minimum: refine on the analytic solution
        a, b = tau[k, q - 1], tau[k, q + 1]
        res = minimize_scalar(lambda t: segment_values(run, "iL", [k], [t])[0],
                              bounds=(a, b), method="bounded",
                              options={"xatol": 1e-14 * run.period})
        best = min(best, float(res.fun))
    return best


def _negative_pieces(run):
    """Sub-intervals ``(segment, tau_a, tau_b)`` where iL < 0, crossings found by brentq."""
    from scipy.optimize import brentq

    seg = run.segments
    val, tau = _il_samples(run)
    out = []
    for k in range(len(seg)):
        cond = seg.conduction[k]
        v = val[k]
        if cond == IDLE or np.all(v >= 0.0):
            continue
        if cond == HIGH_DIODE or np.all(v < 0.0):
            out.append((k, 0.0, float(seg.dt[k])))
            continue
        edges = [0.0]
        for q in np.nonzero(np.sign(v[:-1]) != np.sign(v[1:]))[0]:
            a, b = tau[k, q], tau[k, q + 1]
            if v[q] == 0.0 or v[q + 1] == 0.0:
                edges.append(a if v[q] == 0.0 else b)
                continue
            edges.append(brentq(lambda t, k=k: segment_values(run, "iL", [k], [t])[0], a, b,
                                xtol=1e-15 * run.period, rtol=4 * np.finfo(float).eps))
        edges.append(float(seg.dt[k]))
        edges = sorted(set(edges))
        for a, b in itertools.pairwise(edges):
            if b > a and segment_values(run, "iL", [k], [0.5 * (a + b)])[0] < 0.0:
                out.append((k, a, b))
    return out


def _gauss_integral(run, pieces, integrand):
    """Sum over pieces of ``int integrand dt`` by Gauss-Legendre (exact for these
    smooth, short pieces to ~1e-14); ``integrand(values_by_signal) -> array``."""
    if not pieces:
        return 0.0
    x, w = _GAUSS
    k = np.array([p[0] for p in pieces])
    a = np.array([p[1] for p in pieces])
    b = np.array([p[2] for p in pieces])
    half = 0.5 * (b - a)
    tau = ((a + b)[:, None] * 0.5 + half[:, None] * x[None, :]).ravel()
    idx = np.repeat(k, x.shape[0])
    f = integrand(lambda name: segment_values(run, name, idx, tau)).reshape(k.shape[0], -1)
    return float(np.sum(half * (f @ w)))


def cycle_mean(run, signal) -> float:
    """Mean of ``signal`` over the whole run [signal's unit], exact."""
    from bucksim.analysis.windows import signal_mean
    return signal_mean(run, signal)


# ----------------------------------------------------------------------------- results

@dataclass(frozen=True)
class ReversePoint:
    """Steady state at one load level.

    Attributes
    ----------
    level : LoadLevel
    load_current : float      mean load current [A]
    output_voltage : float    mean output voltage [V]
    min_current : float       minimum inductor current [A]
    reverses : bool           iL < 0 somewhere in the period
    negative_fraction : float share of the period with iL < 0
    returned_charge : float   charge sent back to the supply per cycle [C]
    returned_energy : float   energy sent back to the supply per cycle [J]
    conduction_mode : str     ``"ccm"`` or ``"dcm"`` (idle time in the period)
    """

    level: LoadLevel
    load_current: float
    output_voltage: float
    min_current: float
    reverses: bool
    negative_fraction: float
    returned_charge: float
    returned_energy: float
    conduction_mode: str
    frequency: float = field(repr=False, default=0.0)

    @property
    def returned_power(self) -> float:
        """Mean power sent back to the supply [W] = returned energy x fs."""
        return self.returned_energy * self.frequency

    def to_dict(self) -> dict:
        return {"load": self.level.to_dict(), "load_current": self.load_current,
                "output_voltage": self.output_voltage, "min_current": self.min_current,
                "reverses": self.reverses, "negative_fraction": self.negative_fraction,
                "returned_charge": self.returned_charge,
                "returned_energy": self.returned_energy,
                "returned_power": self.returned_power,
                "conduction_mode": self.conduction_mode}


@dataclass(frozen=True)
class Boundary:
    """Load current below which the current reverses (forced PWM) or the stage
    enters DCM (diode emulation, asynchronous).

    Attributes
    ----------
    kind : str              ``"reversal"`` or ``"dcm"``
    closed_form : float     ``dI / 2`` [A] with ``dI = Vo (1 - D) / (L fs)``
    simulated : float or None   mean load current at the boundary [A], found
                            on steady states; ``None`` when out of reach
    duty, output_voltage, ripple : float   D, Vo [V], dI [A] used in the closed form
    note : str
    """

    kind: str
    closed_form: float
    simulated: float | None
    duty: float
    output_voltage: float
    ripple: float
    note: str = ""

    @property
    def shift(self) -> float | None:
        """``simulated / closed_form - 1``."""
        if self.simulated is None or self.closed_form == 0:
            return None
        return self.simulated / self.closed_form - 1.0

    def to_dict(self) -> dict:
        return {"kind": self.kind, "closed_form": self.closed_form,
                "simulated": self.simulated, "shift": self.shift, "duty": self.duty,
                "output_voltage": self.output_voltage, "ripple": self.ripple,
                "note": self.note}


@dataclass(frozen=True)
class ReverseCurrentResult:
    """Result of :func:`reverse_current`.

    Attributes
    ----------
    title : str
    strategy : str
    frequency : float        switching frequency [Hz]
    points : tuple of ReversePoint   one per load level, in the order given
    boundary : Boundary
    """

    title: str
    strategy: str
    frequency: float
    points: tuple
    boundary: Boundary

    def to_dict(self) -> dict:
        return {"title": self.title, "strategy": self.strategy, "frequency": self.frequency,
                "points": [p.to_dict() for p in self.points],
                "boundary": self.boundary.to_dict(), "caution": CAUTION}

    def table(self) -> str:
        """Readable table, engineering units, ending with the caution line."""
        b = self.boundary
        lines = [self.title, f"strategy {self.strategy}, {format_si(self.frequency, 'Hz')}", "",
                 (f"{'load':>11}{'Io':>11}{'Vo':>11}{'min iL':>12}{'iL<0':>8}"
                  f"{'returned charge':>17}{'returned energy':>17}{'returned power':>16}"
                  "  mode")]
        for p in self.points:
            lines.append(f"{p.level!s:>11}{format_si(p.load_current, 'A'):>11}"
                         f"{format_si(p.output_voltage, 'V'):>11}"
                         f"{format_si(p.min_current, 'A'):>12}"
                         f"{100 * p.negative_fraction:>7.1f}%"
                         f"{format_si(p.returned_charge, 'C'):>17}"
                         f"{format_si(p.returned_energy, 'J'):>17}"
                         f"{format_si(p.returned_power, 'W'):>16}  {p.conduction_mode.upper()}"
                         + ("  reverses" if p.reverses else ""))
        what = ("the inductor current reverses" if b.kind == "reversal"
                else "the stage enters DCM (this strategy does not let the current reverse)")
        lines += ["", f"below the boundary {what}:",
                  (f"  closed form  dI/2 = Vo (1 - D) / (2 L fs) = "
                   f"{format_si(b.closed_form, 'A')}   (D = {b.duty:.4g}, "
                   f"Vo = {format_si(b.output_voltage, 'V')}, dI = {format_si(b.ripple, 'A')})")]
        if b.simulated is None:
            lines.append(f"  simulated    not found: {b.note}")
        else:
            lines.append(f"  simulated    {format_si(b.simulated, 'A')}   "
                         f"({100 * b.shift:+.2f} % from the closed form)")
        lines += ["", CAUTION]
        return "\n".join(lines)

    def __str__(self):
        return self.table()

    def plot(self, **kw):
        """Figure: minimum inductor current vs load current, with the boundaries
        (:func:`bucksim.study_figures.reverse_figure`)."""
        from bucksim.study_figures import reverse_figure
        return reverse_figure(self, **kw)

    def to_pandas(self):
        """The points as a ``pandas.DataFrame``, one row per load level: the level
        (``load_key``, ``load_value``) and the columns of :meth:`ReversePoint.to_dict`
        (pandas: the ``tables`` extra)."""
        from bucksim.frames import require_pandas

        recs = []
        for p in self.points:
            rec = p.to_dict()
            load = rec.pop("load")
            recs.append({"load_key": load["key"], "load_value": load["value"], **rec})
        return require_pandas().DataFrame.from_records(recs)


# ----------------------------------------------------------------------------- analysis

def _point(scenario, level):
    _, run = periodic_run(with_level(scenario, level))
    pieces = _negative_pieces(run)
    T = run.period
    neg = sum(b - a for _, a, b in pieces)
    supply = [p for p in pieces if run.segments.conduction[p[0]] in (HIGH, HIGH_DIODE)]
    charge = _gauss_integral(run, supply, lambda get: -get("iin"))
    energy = _gauss_integral(run, supply, lambda get: -get("vin") * get("iin"))
    il_min = minimum_current(run)
    # the largest iL: at a segment end or a sample (the maxima of a buck's iL
    # sit at switching instants; the scale needs no more precision than that)
    il_max = float(np.max(_il_samples(run)[0]))
    idle = bool(np.any((run.segments.conduction == IDLE) & (run.segments.dt > 1e-12 * T)))
    return ReversePoint(level=level, load_current=cycle_mean(run, "io"),
                        output_voltage=cycle_mean(run, "vo"), min_current=il_min,
                        reverses=current_reverses(il_min, il_max), negative_fraction=neg / T,
                        returned_charge=charge, returned_energy=energy,
                        conduction_mode="dcm" if idle else "ccm",
                        frequency=scenario.switching.frequency)


def _indicator(scenario, kind, x):
    """Signed distance from the boundary at load variable ``x``: < 0 below it.

    Forced PWM: the lowest iL while the low-side channel conducts. Reversal
    starts there (the high side only sees a negative current carried over
    from it), and in a rising dead time the body diodes bring the current to
    zero and idle without reversing, so the minimum over the whole period
    sits at 0 over a range of loads and would not locate the boundary.
    Other strategies: the lowest iL in CCM, minus the idle share of the
    period in DCM; both tend to 0 at the boundary.
    """
    level = LoadLevel("current", x) if kind == "current" else LoadLevel("resistance", 1.0 / x)
    _, run = periodic_run(with_level(scenario, level))
    if scenario.switching.strategy == "forced-pwm":
        return minimum_current(run, (LOW,)), run
    seg = run.segments
    idle = float(np.sum(seg.dt[seg.conduction == IDLE])) / run.period
    if idle > 0:
        return -idle, run
    return minimum_current(run), run


def _closed_form(scenario, vo):
    D = scenario.control.duty
    ripple = vo * (1.0 - D) / (scenario.inductor.inductance * scenario.switching.frequency)
    return D, ripple


def find_boundary(scenario) -> Boundary:
    """The load current at the reversal (forced PWM) or DCM boundary.

    Notes
    -----
    Closed form ([1]_ ch. 2 and 5): ``Io = dI / 2``, ``dI = Vo (1 - D) / (L fs)``,
    with ``D`` the scenario's duty and ``Vo`` the simulated mean output
    voltage at the boundary (``D Vin`` when the boundary is out of reach).
    Simulated: the root of :func:`_indicator` in the load variable (the
    sink current, or the load conductance for a resistor) by ``brentq``
    (bracketed, bisection-safeguarded) to ``1e-6`` relative, reported as the
    mean load current there.
    """
    from scipy.optimize import brentq

    require_open_loop(scenario)
    kind = load_kind(scenario)
    vin, D = scenario.supply.voltage, scenario.control.duty
    strategy = scenario.switching.strategy
    what = "reversal" if strategy == "forced-pwm" else "dcm"
    vo0 = D * vin
    _, ripple0 = _closed_form(scenario, vo0)
    io0 = ripple0 / 2.0
    icc = scenario.load.current if kind == "resistance" else 0.0
    if kind == "current":
        guess = io0
    else:
        guess = (io0 - icc) / vo0
    if guess <= 0:
        return Boundary(what, io0, None, D, vo0, ripple0,
                        note=f"the load's current sink ({format_si(icc, 'A')}) alone is above "
                             "the boundary; no load resistor reaches it")

    def g(x):
        return _indicator(scenario, kind, x)[0]

    lo, hi = 0.05 * guess, 2.0 * guess
    g_lo, g_hi = g(lo), g(hi)
    for _ in range(12):
        if g_hi > 0:
            break
        lo, g_lo, hi = hi, g_hi, hi * 2.0
        g_hi = g(hi)
    for _ in range(8):
        if g_lo < 0:
            break
        hi, g_hi, lo = lo, g_lo, lo / 4.0
        g_lo = g(lo)
    if not (g_lo < 0 < g_hi):
        note = ("no boundary between the lightest and heaviest loads tried "
                f"({lo:.4g} and {hi:.4g} {'A' if kind == 'current' else 'S'})")
        return Boundary(what, io0, None, D, vo0, ripple0, note=note)
    x = brentq(g, lo, hi, xtol=_BOUNDARY_RTOL * guess * 1e-3, rtol=_BOUNDARY_RTOL)
    _, run = _indicator(scenario, kind, x)
    io, vo = cycle_mean(run, "io"), cycle_mean(run, "vo")
    _, ripple = _closed_form(scenario, vo)
    return Boundary(what, ripple / 2.0, io, D, vo, ripple)


@single_blas_thread
def reverse_current(scenario, load=None) -> ReverseCurrentResult:
    """Reverse inductor current across load, in periodic steady state.

    Parameters
    ----------
    scenario : Scenario
        An open-loop scenario; its strategy, parts and duty are used as given.
    load : list, dict, str or float, optional
        Load levels (see the module notes): values of the scenario's load kind
        (``load.current`` [A] for a current sink, else ``load.resistance``
        [ohm]), strings with a unit, or ``{"current": [...]}`` /
        ``{"resistance": [...]}``. Default: the scenario's own load plus six
        loads spread from 0.25x to 4x the closed-form boundary current.

    Returns
    -------
    ReverseCurrentResult
        ``points`` sorted by load current, and the ``boundary``.

    Notes
    -----
    Charge returned per cycle ``Q = int_{iin<0} -iin dt`` [C] and energy
    ``E = int_{iin<0} vin (-iin) dt`` [J], with ``iin`` the current drawn
    from the ideal source and the integration limits the exact zero
    crossings of iL (brentq on the analytic solution); the integrals are
    Gauss-Legendre on the sub-intervals, exact to ~1e-14 for these smooth
    pieces.
    """
    require_open_loop(scenario)
    boundary = find_boundary(scenario)
    if load is None:
        levels = _default_levels(scenario, boundary)
    else:
        levels = parse_levels(load, scenario)
    points = sorted((_point(scenario, lv) for lv in levels), key=lambda p: p.load_current)
    return ReverseCurrentResult(title=scenario.title, strategy=scenario.switching.strategy,
                                frequency=scenario.switching.frequency, points=tuple(points),
                                boundary=boundary)


def _default_levels(scenario, boundary):
    kind = load_kind(scenario)
    io_b = boundary.simulated or boundary.closed_form
    vo = boundary.output_voltage
    levels = []
    for f in (0.25, 0.5, 0.8, 1.25, 2.0, 4.0):
        io = f * io_b
        if kind == "current":
            levels.append(LoadLevel("current", io))
        elif io > scenario.load.current:
            levels.append(LoadLevel("resistance", vo / (io - scenario.load.current)))
    own = scenario.load.current if kind == "current" else scenario.load.resistance
    if own > 0:  # a stage with no load at all has no useful steady state in DCM
        levels.append(LoadLevel(kind, float(own)))
    return levels
