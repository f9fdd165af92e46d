"""Figures of the light-load studies: efficiency across load, loss breakdown, reverse current.

Built like :mod:`bucksim.plotting` (no pyplot state, engineering units, the same
palette); each study's result calls in here from its ``.plot()``.
"""

from __future__ import annotations

import numpy as np

from bucksim.plotting import (
    _SHORT_NAMES,
    ITEM_COLOURS,
    STRATEGY_STYLE,
    _eng_axis,
    _figure,
    _label,
)


def efficiency_figure(comparison, log=None, *, size=(8.0, 5.0)):
    """Efficiency [%] vs mean load current [A], one line per strategy.

    ``log`` (default: the comparison's own setting) puts the load on a log axis.
    Profile levels, when present, are marked with their share of time.
    """
    from matplotlib.ticker import PercentFormatter

    log = comparison.log if log is None else log
    fig = _figure(size)
    ax = fig.add_subplot()
    from bucksim.model.parts import STRATEGY_NAMES
    for s in comparison.strategies:
        rows = comparison.rows[s]
        colour, marker, style = STRATEGY_STYLE[s]
        ax.plot([r.load_current for r in rows], [100 * r.efficiency for r in rows],
                color=colour, marker=marker, linestyle=style, markersize=4,
                label=STRATEGY_NAMES[s])
        _mark_mode_changes(ax, rows, colour, log)
    if comparison.profile is not None:
        pr = comparison.profile
        first = pr.rows[comparison.strategies[0]]
        for r, share in zip(first, pr.profile.shares, strict=True):
            ax.axvline(r.load_current, color="#b0b0b0", linewidth=0.8, linestyle=":",
                       label="_profile")
            ax.annotate(f"{100 * share:.0f} % of time", (r.load_current, 0.02),
                        xycoords=("data", "axes fraction"), rotation=90, fontsize="x-small",
                        color="#707070", ha="right", va="bottom")
    if log:
        ax.set_xscale("log")
    ax.set_xlabel(_label("load current", "A"))
    ax.set_ylabel(_label("efficiency", "%"))
    _eng_axis(ax.xaxis, "A")
    ax.yaxis.set_major_formatter(PercentFormatter(100))
    ax.grid(True, which="both", color="#e3e3e3", linewidth=0.6)
    ax.legend(frameon=False)
    title = comparison.title
    if comparison.target_voltage is not None:
        title += f" (Vo held at {comparison.target_voltage:.4g} V)"
    ax.set_title(title, fontsize="medium")
    return fig


def _operating_word(row) -> str:
    """What a compare row's operating mode is called on the efficiency figure."""
    if row.light_mode.startswith("pfm"):
        return "PFM"
    if row.light_mode.startswith("skip"):
        return "pulse skipping"
    if row.light_mode:
        return "fixed-frequency"
    if row.conduction_mode == "dcm":
        return "DCM"
    return "CCM, current reverses" if row.reverse_current else "CCM"


def _mark_mode_changes(ax, rows, colour, log):
    """Mark where a strategy's operating mode changes between two loads: a tick at the
    midpoint of the two loads (geometric on a log axis), the new mode named on the
    light side. Each mark is a line with ``gid = "mode_change"``."""
    ok = [r for r in rows if r.error is None and np.isfinite(r.efficiency)]
    for a, b in zip(ok, ok[1:], strict=False):
        wa, wb = _operating_word(a), _operating_word(b)
        if wa == wb:
            continue
        xa, xb = a.load_current, b.load_current
        xm = np.sqrt(xa * xb) if log and xa > 0 and xb > 0 else 0.5 * (xa + xb)
        ym = 50.0 * (a.efficiency + b.efficiency)
        ax.plot([xm, xm], [ym - 1.5, ym + 1.5], color=colour, linewidth=1.6,
                gid="mode_change", label="_mode")
        light, heavy = (wa, wb) if xa < xb else (wb, wa)
        ax.annotate(f"{light} | {heavy}", (xm, ym + 1.8), fontsize="xx-small", color=colour,
                    ha="center", va="bottom", gid="mode_change")


def loss_breakdown_figure(comparison, loads, *, scale: str = "share", size=(9.0, 5.5)):
    """Stacked loss items per strategy at the chosen sweep loads.

    Parameters
    ----------
    comparison : Comparison
    loads : sequence
        Load levels of the comparison's sweep (values or strings such as
        ``"0.3 A"``); a level not in the sweep raises ``KeyError``.
    scale : {"share", "watts"}
        ``"share"``: each bar is its own loss split into shares [%], so a 20 mW bar
        is as readable as a 20 W one, with its total loss [W] written above it;
        ``"watts"``: one panel per load, each on its own axis in [W].

    Returns
    -------
    Figure
        One bar per (load, strategy); each axes' ``containers`` holds one
        ``BarContainer`` per loss item, labelled with the item's name, its patches'
        ``gid`` the item's key; the totals are texts with ``gid = "total"``.
    """
    picks = [comparison.level_index(lv) for lv in loads]
    if not picks:
        raise ValueError("loads must name at least one load level of the comparison")
    if scale not in ("share", "watts"):
        raise ValueError(f"scale: expected 'share' or 'watts', got {scale!r}")
    fig = _figure(size)
    if scale == "share":
        ax = fig.add_subplot()
        _loss_bars(ax, comparison, picks, share=True)
        ax.set_ylabel(_label("share of the loss", "%"))
        ax.set_ylim(0.0, 112.0)     # room for the totals above the bars
        ax.legend(frameon=False, fontsize="x-small", loc="upper left", bbox_to_anchor=(1, 1))
    else:
        axes = fig.subplots(1, len(picks), squeeze=False)[0]
        for ax, k in zip(axes, picks, strict=True):
            _loss_bars(ax, comparison, [k], share=False)
            _eng_axis(ax.yaxis, "W")
            ax.set_ylim(0.0, 1.12 * ax.get_ylim()[1])
        axes[0].set_ylabel(_label("loss", "W"))
        axes[-1].legend(frameon=False, fontsize="x-small", loc="upper left",
                        bbox_to_anchor=(1, 1))
    fig.suptitle(f"{comparison.title}: loss breakdown", fontsize="medium")
    return fig


def _loss_bars(ax, comparison, picks, *, share: bool):
    """One stacked bar per (load in ``picks``, strategy) on ``ax``: loss items [W], or
    [%] of each bar's own total; the total [W] written above each bar."""
    from bucksim.analysis.loss_items import LOSS_ITEMS, item_label
    from bucksim.model.units import format_si

    strategies = comparison.strategies
    n_s = len(strategies)
    x, labels, bars = [], [], []
    for g, k in enumerate(picks):
        for j, s in enumerate(strategies):
            x.append(g * (n_s + 1) + j)
            r = comparison.rows[s][k]
            # the load goes under the middle bar of its group, as the group's label
            group = f"\n\n{format_si(r.load_current, 'A', 3)}" if j == n_s // 2 else ""
            labels.append(_SHORT_NAMES[s] + group)
            bars.append(r)
    totals = np.array([sum(r.losses.values()) for r in bars])
    norm = np.where(totals > 0, 100.0 / np.where(totals > 0, totals, 1.0), 0.0)
    bottom = np.zeros(len(bars))
    for n, item in enumerate(LOSS_ITEMS):
        h = np.array([r.losses.get(item, 0.0) for r in bars])
        if not np.any(h > 0):
            continue
        h = h * norm if share else h
        ax.bar(x, h, bottom=bottom, width=0.8, color=ITEM_COLOURS[n % len(ITEM_COLOURS)],
               label=item_label(item), gid=item)
        bottom += h
    for xi, top, r in zip(x, bottom, bars, strict=True):
        ax.text(xi, top, format_si(r.loss, "W", 3), ha="center", va="bottom",
                fontsize="xx-small", rotation=90 if n_s > 2 else 0, gid="total")
    ax.set_xticks(x, labels, fontsize="x-small")
    ax.grid(True, axis="y", color="#e3e3e3", linewidth=0.6)
    ax.set_axisbelow(True)


def reverse_figure(result, *, size=(8.0, 5.0)):
    """Minimum inductor current [A] vs mean load current [A], with the boundaries."""
    fig = _figure(size)
    ax = fig.add_subplot()
    pts = result.points
    ax.plot([p.load_current for p in pts], [p.min_current for p in pts], color="#1f3b57",
            marker="o", markersize=4, label="minimum iL (simulated)")
    ax.axhline(0.0, color="#8c8c8c", linewidth=0.8)
    b = result.boundary
    word = "reversal" if b.kind == "reversal" else "DCM"
    ax.axvline(b.closed_form, color="#c8553d", linestyle="--", linewidth=1.0,
               label=f"{word} boundary, closed form dI/2")
    if b.simulated is not None:
        ax.axvline(b.simulated, color="#4f9d69", linestyle="-", linewidth=1.0,
                   label=f"{word} boundary, simulated")
    ax.set_xlabel(_label("load current", "A"))
    ax.set_ylabel(_label("minimum inductor current", "A"))
    _eng_axis(ax.xaxis, "A")
    _eng_axis(ax.yaxis, "A")
    ax.grid(True, color="#e3e3e3", linewidth=0.6)
    ax.legend(frameon=False)
    ax.set_title(_with_strategy(result.title, result.strategy), fontsize="medium")
    return fig


def _with_strategy(title: str, strategy: str) -> str:
    """The title, naming the strategy once: appended only when the title does not
    name it already (scenario titles often do, e.g. "..., forced PWM)")."""
    words = strategy.replace("-", " ")
    if words.lower() in title.lower().replace("-", " "):
        return title
    return f"{title} ({words.replace('pwm', 'PWM')})"


# ----------------------------------------------------------------------------- summary
