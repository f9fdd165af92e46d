"""Figures: waveforms, steady states, a summary's losses, sweeps, crosschecks.

Every function returns a :class:`matplotlib.figure.Figure` built without
pyplot's global state, so it is safe under any backend (Agg in tests and on
servers) and never opens a window. Axes carry engineering units
(:class:`matplotlib.ticker.EngFormatter`); :func:`save_png` writes PNG files
without a software stamp, so the same figure gives the same bytes.

The functions read the result objects they are given by their attributes
and never import the result modules (each result's ``.plot()`` calls in
here, so an import the other way would close a cycle).

Waveforms are drawn from the exact segment table: points are placed inside
each segment, both ends included with the segment's own (left-limit) value
at its end, so switch-node edges are vertical and never smeared by resampling.
The light-load studies' figures (efficiency across load, loss breakdown, reverse
current) are :mod:`bucksim.study_figures`.
"""

from __future__ import annotations

import numpy as np

# matplotlib and the engine are imported inside the functions, so that
# registering the `plot` verb keeps `bucksim --help` fast

# A plain palette of our own: muted, distinguishable in grey-scale print.
STATE_COLOURS = ("#c8553d", "#2e86ab", "#f2a541", "#8e6c8a", "#d9d9d9", "#9bc49b")
STATE_LABELS = ("high side on", "low side on", "low-side diode", "high-side diode",
                "idle (both off)", "node open (swing, ring)")
STRATEGY_STYLE = {"pfm": ("#7b5ea7", "D", ":"), "pulse-skipping": ("#b5651d", "v", "-."),
                  "asynchronous": ("#8c5e34", "s", "-"),
                  "forced-pwm": ("#3b6ea5", "o", "-"),
                  "diode-emulation": ("#4f9d69", "^", "--")}
#: One colour per loss item (as many as there are items; a neighbour never repeats).
ITEM_COLOURS = ("#3b6ea5", "#9cc3e6", "#7b5ea7", "#8c5e34", "#c8553d", "#f0a58f",
                "#e4c35b", "#4f9d69", "#a8d5a2", "#d9a0c0", "#8c8c8c", "#5b5b5b",
                "#2f2f2f", "#b8860b", "#5f9ea0", "#cd5c5c", "#6b8e23", "#483d8b",
                "#deb887", "#20b2aa")
SIGNAL_NAMES = {"iL": "inductor current iL", "vsw": "switch node vsw", "vo": "output vo",
                "vC": "capacitor voltage vC", "io": "load current io",
                "ic": "capacitor current iC", "iin": "cell current iin",
                "vin": "cell voltage vin", "vs": "source voltage vs",
                "vterm": "terminals vterm", "isrc": "source isrc",
                "icin": "input cap. icin", "ilf": "filter ilf",
                "idamp": "damping idamp", "high_side": "high-side current",
                "low_side": "low-side current",
                "high_side_body_diode": "high-side body-diode current",
                "low_side_body_diode": "low-side body-diode current",
                "switch_node": "open switch-node current",
                "u": "compensator output u", "vref": "reference vref"}
_SHORT_NAMES = {"pfm": "PFM\n", "asynchronous": "async.\n", "forced-pwm": "forced\nPWM",
                "diode-emulation": "diode\nemulation"}
_MAX_POINTS = 1_000_000  # per signal


def save_png(fig, path, dpi: int = 100):
    """Write ``fig`` to ``path`` as PNG with no software metadata; returns ``path``."""
    fig.savefig(path, format="png", dpi=dpi, metadata={"Software": None})
    return path


def _figure(size):
    from matplotlib.figure import Figure
    return Figure(figsize=size, layout="constrained")


def _eng_axis(axis, unit):
    from matplotlib.ticker import EngFormatter
    axis.set_major_formatter(EngFormatter(unit=unit))


def _label(text, unit):
    return f"{text} [{unit}]"


# ----------------------------------------------------------------------------- waveforms

def waveform_points(run, signals, window=None):
    """Exact waveform points: ``{"t": times [s], name: values, "segments": (t0, dt, code)}``.

    Each segment inside ``window = (start, stop)`` [s] (default: the whole
    run) gets ``k`` points from its start to its end, the end evaluated in
    the segment itself, so a discontinuous signal (``vsw``) has a vertical
    edge at every segment boundary.
    """
    seg = run.segments
    t_first, t_last = float(seg.t0[0]), float(run.t_end)
    start, stop = (t_first, t_last) if window is None else (float(window[0]), float(window[1]))
    if not (t_first <= start < stop <= t_last * (1 + 1e-12)):
        raise ValueError(f"window must satisfy {t_first:.6g} <= start < stop <= "
                         f"{t_last:.6g} s, got ({start:.6g}, {stop:.6g})")
    ends = seg.t0 + seg.dt
    rows = np.nonzero((ends > start) & (seg.t0 < stop) & (seg.dt > 0))[0]
    a = np.maximum(seg.t0[rows], start)
    b = np.minimum(ends[rows], stop)
    k = int(min(12, max(2, _MAX_POINTS // max(rows.shape[0], 1))))
    frac = np.linspace(0.0, 1.0, k)
    times = (a[:, None] + (b - a)[:, None] * frac[None, :]).ravel()
    idx = np.repeat(rows, k)
    tau = times - seg.t0[idx]
    out = {"t": times}
    for name in signals:
        out[name] = run.segment_values(name, idx, tau)
    out["segments"] = (a, b - a, seg.conduction[rows])
    return out


def _state_band(ax, segments):
    from matplotlib.patches import Patch

    from bucksim.model.stage import N_CONDUCTION

    t0, dt, code = segments
    present = []
    for c in range(N_CONDUCTION):
        m = code == c
        if np.any(m):
            ax.broken_barh(list(zip(t0[m], dt[m], strict=True)), (0, 1),
                           facecolors=STATE_COLOURS[c], edgecolors="none", label=STATE_LABELS[c])
            present.append(c)
    ax.set_ylim(0, 1)
    ax.set_yticks([])
    ax.set_ylabel("state", rotation=0, ha="right", va="center")
    handles = [Patch(facecolor=STATE_COLOURS[c], label=STATE_LABELS[c]) for c in present]
    ax.figure.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 5),
                     frameon=False, fontsize="small")


def waveform_figure(run, signals=("iL", "vsw", "vo"), window=None, *, size=(8.0, 6.0)):
    """Stacked waveforms over a time window, with a band showing the conduction state.

    Parameters
    ----------
    run : Run
    signals : sequence of str
        Names from ``run.signals`` (:data:`bucksim.waveforms.SIGNALS`, plus ``u``
        and ``vref`` in an analog loop), one axes each, top to bottom.
    window : (float, float), optional
        ``(start, stop)`` [s]; default the whole run.
    size : (float, float)
        Figure size [inch] (pixels = inches x dpi of :func:`save_png`).

    Returns
    -------
    Figure
        Axes ``fig.axes[:len(signals)]`` hold one line each (x: time [s]);
        the last axes is the conduction-state band.
    """
    from bucksim.model.stage import UNITS

    signals = list(signals)
    if not signals:
        raise ValueError("signals must name at least one signal")
    for name in signals:
        if name not in run.signals:
            raise ValueError(f"unknown signal {name!r}; known: " + ", ".join(run.signals))
    pts = waveform_points(run, signals, window)
    fig = _figure(size)
    ratios = [3] * len(signals) + [0.35]
    axes = fig.subplots(len(signals) + 1, 1, sharex=True,
                        gridspec_kw={"height_ratios": ratios})
    for ax, name in zip(axes, signals, strict=False):
        unit = UNITS[name]
        ax.plot(pts["t"], pts[name], color="#1f3b57", linewidth=1.0)
        ax.set_ylabel(_label(SIGNAL_NAMES.get(name, name), unit))
        _eng_axis(ax.yaxis, unit)
        ax.grid(True, color="#e3e3e3", linewidth=0.6)
    band = axes[-1]
    _state_band(band, pts["segments"])
    band.set_xlabel(_label("time", "s"))
    _eng_axis(band.xaxis, "s")
    band.set_xlim(pts["t"][0], pts["t"][-1])
    fig.suptitle(run.scenario.title, fontsize="medium")
    return fig


# ----------------------------------------------------------------------------- comparison

def summary_loss_figure(summary, *, title=None, size=(7.0, 4.5)):
    """The loss breakdown of a summary's window: one horizontal bar per loss item [W].

    Parameters
    ----------
    summary : Summary
        Its ``loss_items()`` (item -> W, in stacking order) are drawn.
    title : str, optional
        Default: the total loss and the efficiency.

    Returns
    -------
    Figure
        One axes; ``ax.containers[0]`` holds one bar per loss item, top to
        bottom in the order of ``summary.loss_items()``, each with the item's
        key as ``gid``.
    """
    from bucksim.analysis.loss_items import LOSS_ITEMS, item_label
    from bucksim.model.units import format_si

    items = summary.loss_items()
    names = list(items)
    fig = _figure(size)
    ax = fig.add_subplot()
    y = np.arange(len(names))[::-1]
    colours = [ITEM_COLOURS[LOSS_ITEMS.index(n) % len(ITEM_COLOURS)] for n in names]
    bars = ax.barh(y, [items[n] for n in names], color=colours)
    for bar, name in zip(bars, names, strict=True):
        bar.set_gid(name)
    ax.set_yticks(y, [item_label(n) for n in names], fontsize="small")
    ax.set_xlabel(_label("loss", "W"))
    _eng_axis(ax.xaxis, "W")
    ax.grid(True, axis="x", color="#e3e3e3", linewidth=0.6)
    ax.set_axisbelow(True)
    if title is None:
        title = (f"loss {format_si(summary.power.loss, 'W')}, efficiency "
                 f"{100 * summary.efficiency:.2f} % ({summary.conduction_mode.upper()})")
    ax.set_title(title, fontsize="medium")
    return fig


# ----------------------------------------------------------------------------- steady state

def floquet_figure(steady, *, size=(5.0, 5.0)):
    """The Floquet multipliers of a periodic steady state in the complex plane, with the
    unit circle (a multiplier on or outside it: the periodic state is not stable).

    Returns
    -------
    Figure
        ``ax.lines[0]`` is the unit circle, ``ax.lines[1]`` the multipliers
        (markers only, one point each).
    """
    mu = np.asarray(steady.floquet, dtype=complex).ravel()
    fig = _figure(size)
    ax = fig.add_subplot()
    phi = np.linspace(0.0, 2.0 * np.pi, 361)
    ax.plot(np.cos(phi), np.sin(phi), color="#8c8c8c", linewidth=0.8, label="unit circle")
    ax.plot(mu.real, mu.imag, linestyle="none", marker="x", markersize=8, color="#c8553d",
            label="Floquet multipliers")
    ax.axhline(0.0, color="#e3e3e3", linewidth=0.6)
    ax.axvline(0.0, color="#e3e3e3", linewidth=0.6)
    reach = max(1.1, 1.1 * float(np.max(np.abs(mu)))) if mu.size and np.all(
        np.isfinite(mu)) else 1.1
    ax.set_xlim(-reach, reach)
    ax.set_ylim(-reach, reach)
    ax.set_aspect("equal")
    ax.set_xlabel("real part")
    ax.set_ylabel("imaginary part")
    ax.legend(frameon=False, fontsize="small", loc="upper right")
    largest = float(np.max(np.abs(mu))) if mu.size else float("nan")
    ax.set_title(f"largest |multiplier| {largest:.4g} ({steady.method})", fontsize="medium")
    return fig


def orbit_figure(steady, run, *, size=(6.0, 5.0)):
    """The periodic orbit in the state plane: ``iL`` [A] against ``vC`` [V] over the
    last period of ``run`` (a run started on ``steady``), the periodic state ``x`` marked.

    Returns
    -------
    Figure
        ``ax.lines[0]`` is the orbit (x: vC, y: iL), ``ax.lines[1]`` the
        periodic state (one point).
    """
    t_end = float(run.t_end)
    start = max(float(run.segments.t0[0]), t_end - run.period)
    pts = waveform_points(run, ["iL", "vC"], (start, t_end))
    fig = _figure(size)
    ax = fig.add_subplot()
    ax.plot(pts["vC"], pts["iL"], color="#1f3b57", linewidth=1.0, label="one period")
    x = np.asarray(steady.x, dtype=float)
    ax.plot([x[1]], [x[0]], linestyle="none", marker="o", color="#c8553d",
            label="periodic state x")
    ax.set_xlabel(_label("capacitor voltage vC", "V"))
    ax.set_ylabel(_label("inductor current iL", "A"))
    _eng_axis(ax.xaxis, "V")
    _eng_axis(ax.yaxis, "A")
    ax.grid(True, color="#e3e3e3", linewidth=0.6)
    ax.legend(frameon=False, fontsize="small")
    ax.set_title(f"{run.scenario.title}: periodic orbit", fontsize="medium")
    return fig


# ----------------------------------------------------------------------------- tables

def column_figure(x, y, *, x_label, y_label, x_unit=None, y_unit=None, failed=None,
                  title="", log=False, size=(7.0, 4.5)):
    """One table column against another: points sorted by ``x``.

    Parameters
    ----------
    x, y : array_like
        The two columns (same length).
    x_label, y_label : str
        Axis names; ``x_unit``/``y_unit`` (SI) add engineering prefixes.
    failed : array_like of bool, optional
        Points left out (their metrics are NaN).
    log : bool
        A logarithmic x axis.

    Returns
    -------
    Figure
        ``ax.lines[0]`` holds the points that did not fail, in order of ``x``.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    keep = np.ones(x.shape, dtype=bool) if failed is None else ~np.asarray(failed, dtype=bool)
    order = np.argsort(x[keep], kind="stable")
    fig = _figure(size)
    ax = fig.add_subplot()
    ax.plot(x[keep][order], y[keep][order], color="#1f3b57", marker="o", markersize=4)
    if log:
        ax.set_xscale("log")
    for axis, text, unit in ((ax.xaxis, x_label, x_unit), (ax.yaxis, y_label, y_unit)):
        shown = text if unit in (None, "", "1") else _label(text, unit)
        axis.set_label_text(shown)
        if unit not in (None, "", "1"):
            _eng_axis(axis, unit)
    ax.grid(True, which="both", color="#e3e3e3", linewidth=0.6)
    if title:
        ax.set_title(title, fontsize="medium")
    return fig


def crosscheck_figure(check, *, size=(8.0, 5.0)):
    """Closed-form budget against the waveform integrals, item by item [W].

    Returns
    -------
    Figure
        ``ax.containers[0]``: closed form, ``ax.containers[1]``: waveforms,
        one bar per item that has both values.
    """
    rows = [r for r in check.rows if r["simulated"] is not None]
    fig = _figure(size)
    ax = fig.add_subplot()
    y = np.arange(len(rows))[::-1]
    ax.barh(y + 0.2, [r["closed_form"] for r in rows], height=0.4, color="#9cc3e6",
            label="closed form")
    ax.barh(y - 0.2, [r["simulated"] for r in rows], height=0.4, color="#3b6ea5",
            label="waveforms")
    ax.set_yticks(y, [r["item"] for r in rows], fontsize="small")
    ax.set_xlabel(_label("power", "W"))
    _eng_axis(ax.xaxis, "W")
    ax.grid(True, axis="x", color="#e3e3e3", linewidth=0.6)
    ax.set_axisbelow(True)
    ax.legend(frameon=False, fontsize="small")
    ax.set_title("closed-form budget and waveform integrals", fontsize="medium")
    return fig
