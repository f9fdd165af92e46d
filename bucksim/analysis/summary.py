"""The Summary result object: metrics of a run's window, as a dict and a table."""

from __future__ import annotations

import copy
import json

DEVICE_ORDER = ("high_side", "high_side_body_diode", "low_side", "low_side_body_diode",
                "inductor", "output_capacitor", "supply")

#: A mean current below this share of the same current's RMS (its natural
#: scale: RMS >= |mean|) prints as 0. The exact integrals carry rounding of
#: ~1e-15 of the scale, which a periodic state turns into "9.6 fA" of
#: capacitor current; 1e-9 is far above that and far below any real offset.
MEAN_ROUNDING = 1e-9


def _mean_text(mean: float, rms: float, unit: str) -> str:
    """The mean for the table: 0 when it is rounding of its natural scale."""
    from bucksim.model.units import format_si

    return format_si(0.0 if abs(mean) <= MEAN_ROUNDING * abs(rms) else mean, unit)


#: Loss items, in the order they are stacked and listed. The asynchronous
#: stage's low side is the freewheel diode, kept apart from a MOSFET channel.
LOSS_ITEMS = ("high_side.conduction", "high_side.switching", "high_side_body_diode.conduction",
              "freewheel_diode.conduction", "low_side.conduction", "low_side.switching",
              "low_side_body_diode.conduction", "inductor.dcr", "inductor.core",
              "output_capacitor.esr", "supply.resistance")
_ITEM_LABELS = {
    "high_side.conduction": "high side conduction", "high_side.switching": "high side switching",
    "high_side_body_diode.conduction": "high-side body diode",
    "freewheel_diode.conduction": "freewheel diode",
    "low_side.conduction": "low side conduction", "low_side.switching": "low side switching",
    "low_side_body_diode.conduction": "low-side body diode",
    "inductor.dcr": "inductor DCR", "inductor.core": "inductor core",
    "output_capacitor.esr": "output capacitor ESR", "supply.resistance": "supply resistance"}


def item_label(item: str) -> str:
    """Readable name of a loss item of :data:`LOSS_ITEMS`."""
    return _ITEM_LABELS[item]


class Summary:
    """Metrics over the summary window (keys as in the design contract).

    Index it like a dict (``summary["power"]["loss"]``) or take
    :meth:`to_dict` for a plain, JSON-ready copy. Values are SI units.
    """

    def __init__(self, data: dict):
        self._data = data

    def __getitem__(self, key):
        return self._data[key]

    def __contains__(self, key):
        return key in self._data

    def keys(self):
        return self._data.keys()

    def to_dict(self) -> dict:
        """A deep copy of the summary as plain Python types."""
        return copy.deepcopy(self._data)

    def to_json(self, **kw) -> str:
        return json.dumps(self._data, **kw)

    def table(self) -> str:
        """A readable multi-line table with engineering units."""
        from bucksim.model.units import format_si

        d = self._data
        w = d["window"]
        vo, il, p = d["output_voltage"], d["inductor_current"], d["power"]
        lines = [
            f"window        {format_si(w['start'], 's')} .. {format_si(w['stop'], 's')} "
            f"({w['cycles']:.4g} cycles)",
            f"mode          {d['mode'].upper()}"
            + ("   inductor current reverses" if d["reverse_current"] else ""),
            f"output        mean {format_si(vo['mean'], 'V')}   ripple {format_si(vo['ripple'], 'V')} p-p"
            f"   [{format_si(vo['min'], 'V')}, {format_si(vo['max'], 'V')}]",
            f"inductor      mean {_mean_text(il['mean'], il['rms'], 'A')}   "
            f"rms {format_si(il['rms'], 'A')}"
            f"   ripple {format_si(il['ripple'], 'A')} p-p   [{format_si(il['min'], 'A')}, "
            f"{format_si(il['max'], 'A')}]",
            "",
            f"{'device':<22}{'rms':>12}{'mean':>12}{'conduction':>13}{'switching':>13}",
        ]
        for name in DEVICE_ORDER:
            if name not in d["devices"]:
                continue
            v = d["devices"][name]
            lines.append(f"{name:<22}{format_si(v['rms'], 'A'):>12}"
                         f"{_mean_text(v['mean'], v['rms'], 'A'):>12}"
                         f"{format_si(v['conduction_loss'], 'W'):>13}"
                         f"{format_si(v['switching_loss'], 'W'):>13}")
        core = d["devices"].get("inductor", {}).get("core_loss")
        if core is not None:
            lines.append(f"{'inductor core (iGSE)':<22}{'':>24}{format_si(core, 'W'):>13}")
        lines += [
            "",
            f"power         in {format_si(p['input'], 'W')}   out {format_si(p['output'], 'W')}"
            f"   loss {format_si(p['loss'], 'W')}",
            f"efficiency    {100 * d['efficiency']:.3f} %",
            f"energy balance error {d['energy_balance_error']:.2e} (relative)",
        ]
        if d.get("transients"):
            lines += ["", f"{'event':<13}{'at':>10}{'vo max':>11}{'vo min':>11}{'over':>8}"
                          f"{'under':>8}{'settles in':>12}{'iL peak':>10}"]
            for e in d["transients"]:
                st = e["settling_time"]
                st = "not yet" if not e["settled"] else (
                    "in band" if st == 0.0 else format_si(st, "s"))
                under = "" if e["event"] == "start-up" else f"{e['undershoot_percent']:.2f}%"
                lines.append(f"{e['event']:<13}{format_si(e['time'], 's'):>10}"
                             f"{format_si(e['vo_max'], 'V'):>11}{format_si(e['vo_min'], 'V'):>11}"
                             f"{e['overshoot_percent']:>7.2f}%{under:>8}{st:>12}"
                             f"{format_si(e['il_peak'], 'A'):>10}")
        return "\n".join(lines)

    def __str__(self):
        return self.table()

    def __repr__(self):
        return f"<Summary efficiency={self._data['efficiency']:.5f} mode={self._data['mode']}>"
