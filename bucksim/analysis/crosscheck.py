"""Closed-form loss budget versus waveform integration, item by item.

Each item of :func:`bucksim.estimate` is paired with the quantity the
simulation integrates exactly over the summary window. Where the two differ
by more than :data:`TOLERANCE` the row carries a plain-words reason drawn
from what the simulation saw (DCM, reverse current, large ripple, a run that
has not settled).
"""

from __future__ import annotations

import json
from dataclasses import dataclass

from bucksim.analysis.budget import estimate

#: Relative difference above which a row gets an explanation.
TOLERANCE = 0.05


def _sim_value(summary: dict, key: str) -> float | None:
    dev = summary["devices"]
    if key.endswith(".conduction"):
        name = key.rsplit(".", 1)[0]
        return dev[name]["conduction_loss"] if name in dev else None
    if key.startswith("switching."):
        kind = key.split(".", 1)[1]
        return sum(dev[d].get("switching", {}).get(kind, 0.0)
                   for d in ("high_side", "low_side") if d in dev)
    if key == "inductor.core":
        return dev["inductor"].get("core_loss")
    raise KeyError(key)


@dataclass
class CrossCheck:
    """Result of :func:`crosscheck`: the closed-form budget beside the waveforms.

    Attributes
    ----------
    rows : list of dict
        One per item: ``item``, ``closed_form`` [W], ``simulated`` [W] (None
        where the simulation has no such item), ``difference`` [W],
        ``percent`` and ``reason`` (plain words when they differ by more than
        :data:`TOLERANCE`).
    summary : dict
        The simulated summary's ``to_dict()``.
    budget : dict
        The closed-form budget's ``to_dict()``.
    """

    rows: list
    summary: dict
    budget: dict

    def to_dict(self) -> dict:
        return {"rows": self.rows, "budget": self.budget, "summary": self.summary}

    def to_pandas(self):
        """The rows as a ``pandas.DataFrame`` (pandas: the ``tables`` extra)."""
        from bucksim.frames import require_pandas
        return require_pandas().DataFrame.from_records(self.rows)

    def plot(self, **kw):
        """Figure: closed form and waveforms side by side, item by item
        (:func:`bucksim.plotting.crosscheck_figure`)."""
        from bucksim.plotting import crosscheck_figure
        return crosscheck_figure(self, **kw)

    def to_json(self, **kw) -> str:
        return json.dumps(self.to_dict(), **kw)

    def table(self) -> str:
        from bucksim.model.units import format_si
        head = f"{'item':<34}{'closed form':>13}{'waveforms':>13}{'diff':>13}{'diff %':>9}"
        lines = [head, "-" * len(head)]
        def w(v):
            return "n/a" if v is None else format_si(v, "W")

        for r in self.rows:
            pct = "" if r["percent"] is None else f"{r['percent']:+.2f}"
            diff = r["difference"]
            scale = max(abs(r["closed_form"] or 0.0), abs(r["simulated"] or 0.0))
            if diff is not None and abs(diff) <= 1e-9 * scale:
                diff = 0.0  # agreement to rounding: print it as such
            lines.append(f"{r['item']:<34}{w(r['closed_form']):>13}{w(r['simulated']):>13}"
                         f"{w(diff):>13}{pct:>9}")
            if r["reason"]:
                lines.append(f"    -> {r['reason']}")
        return "\n".join(lines)

    def __str__(self):
        return self.table()


def _reasons(summary: dict, op: dict, key: str) -> str:
    why = []
    if summary["mode"] == "dcm":
        why.append("the simulation is in DCM: the current rests at zero for part of the "
                   "period, while the closed form assumes continuous current")
    if summary["reverse_current"]:
        why.append("the inductor current reverses each period (forced PWM at light load): "
                   "the closed form's edge currents and dead-time terms assume the triangle "
                   "it draws, and circulating current is only partly covered")
    il = summary["inductor_current"]
    if il["mean"] != 0 and il["ripple"] > abs(il["mean"]):
        why.append("the ripple exceeds the mean current, so the small-ripple terms are coarse")
    if key.startswith("switching.") and not why:
        why.append("the closed form uses the peak/valley of an ideal triangle; the simulation "
                   "uses the exact current at each edge")
    if key == "inductor.core" and not why:
        why.append("the closed form assumes a straight-line flux ramp; the simulated ramps bend "
                   "with the resistive drops")
    return "; ".join(why)


def crosscheck(scenario, run=None, cycles=None) -> CrossCheck:
    """Compare :func:`bucksim.estimate` with the waveform integrals.

    Parameters
    ----------
    scenario : Scenario
    run : Run, optional
        A settled run of ``scenario``. If omitted, the periodic steady state
        is found by shooting (:func:`bucksim.steady_state`) and the window is
        simulated from it, so the comparison is at the true operating point.
    cycles : int, optional
        Summary window in periods (default ``run.summary_cycles``).

    Raises
    ------
    SimulationError
        No periodic steady state, or (closed loop) an unstable one: a
        largest |Floquet multiplier| of 1 or more means the loop departs
        from the operating point, so no comparison at it is meaningful.
        Also when a given ``run`` did not complete (``run.success`` False).
    """
    from bucksim.errors import SimulationError
    from bucksim.model.scenario import require_scenario
    from bucksim.simulation import unstable_multiplier

    require_scenario(scenario, "crosscheck")
    if run is None:
        from bucksim.simulation import simulate_settled
        run = simulate_settled(scenario, cycles)
    where = scenario.source or scenario.title
    if not run.success:
        raise SimulationError(f"{where}: crosscheck needs a completed run: {run.message}")
    ss = getattr(run, "steady_state", None)
    if ss is not None and scenario.control.mode != "open-loop" and not ss.stable:
        raise SimulationError(f"{where}: crosscheck: the periodic steady state is unstable "
                              f"(largest |Floquet multiplier| {unstable_multiplier(ss):.3g} "
                              f">= 1); the loop cannot hold this operating point")
    summary = run.summary(cycles=cycles).to_dict()
    budget = estimate(scenario)
    op = budget.operating_point
    rows = []

    def add(item, closed, sim, key):
        diff = None if sim is None else sim - closed
        ref = max(abs(closed), abs(sim or 0.0))
        pct = None if sim is None or ref == 0 else 100.0 * diff / closed if closed else None
        big = sim is not None and ref > 0 and abs(diff) > TOLERANCE * ref
        rows.append({"item": item, "closed_form": closed, "simulated": sim,
                     "difference": diff, "percent": pct,
                     "reason": _reasons(summary, op, key) if big else ""})

    for it in budget.items:
        add(it.key, it.value, _sim_value(summary, it.key), it.key)
    add("total loss", budget.total_loss, summary["power"]["loss"], "total")
    add("output power", budget.output_power, summary["power"]["output"], "total")
    return CrossCheck(rows, summary, budget.to_dict())
