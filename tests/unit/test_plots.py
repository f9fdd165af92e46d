"""Figures drawn headless: pixel size, plotted data against the run / comparison, units.

The check is on the data the axes hold (``Line2D.get_xdata/get_ydata``, bar
heights) against exact values from the run (``Run.at``) and the comparison
rows, not on pixels. The stage is our own invented point-of-load rail.
"""

from __future__ import annotations

import dataclasses

import matplotlib
import matplotlib.image
import numpy as np
import pytest

import bucksim
from bucksim.analysis.summary import item_label
from bucksim.model.parts import STRATEGY_NAMES
from bucksim.plotting import (
    STATE_LABELS,
    save_png,
    waveform_figure,
)
from bucksim.steady.solve import steady_state
from bucksim.studies.compare import compare
from bucksim.studies.reverse import reverse_current
from bucksim.study_figures import efficiency_figure, loss_breakdown_figure, reverse_figure
from tests.validation.test_compare import pol_rail

CYCLES = 6


@pytest.fixture(scope="module")
def run():
    """Diode emulation at 0.3 A (DCM: all four conduction states), from steady state."""
    sc = pol_rail()
    sc = dataclasses.replace(
        sc, switching=dataclasses.replace(sc.switching, strategy="diode-emulation"),
        load=dataclasses.replace(sc.load, current=0.3), control=dataclasses.replace(
            sc.control, duty=0.1))
    ss = steady_state(sc)
    return bucksim.simulate(dataclasses.replace(sc, run=dataclasses.replace(
        sc.run, cycles=CYCLES, initial_current=ss.x[0], initial_voltage=ss.x[1])))


def test_backend_is_headless():
    assert matplotlib.get_backend().lower() == "agg"


def test_waveform_figure_data_size_and_labels(run, tmp_path):
    T = run.period
    window = (2.5 * T, 5.5 * T)
    signals = ("iL", "vsw", "vo")
    fig = waveform_figure(run, signals, window, size=(8.0, 6.0))
    path = save_png(fig, tmp_path / "wave.png", dpi=100)
    img = matplotlib.image.imread(path)
    assert img.shape[:2] == (600, 800)
    assert b"matplotlib" not in path.read_bytes().lower()  # no software stamp
    starts = run.segments.t0
    for ax, name, unit in zip(fig.axes[:len(signals)], signals, ("[A]", "[V]", "[V]"),
                              strict=True):
        line, = ax.lines
        t, y = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
        assert t[0] == pytest.approx(window[0], abs=1e-15) and t[-1] == pytest.approx(
            window[1], abs=1e-15)
        want = run.at(t, name)
        inner = ~np.isin(t, starts)           # at a boundary vsw is drawn with both limits
        scale = np.max(np.abs(want))
        assert np.allclose(y[inner], want[inner], rtol=0, atol=1e-9 * scale)
        if name != "vsw":                     # states are continuous: all points match
            assert np.allclose(y, want, rtol=0, atol=1e-9 * scale)
        assert unit in ax.get_ylabel()
    band = fig.axes[len(signals)]
    assert "[s]" in band.get_xlabel()
    in_window = (starts + run.segments.dt > window[0]) & (starts < window[1])
    codes = sorted(set(run.segments.conduction[in_window].tolist()))
    assert len(codes) == 4                    # high, low, low-diode, idle
    assert len(band.collections) == len(codes)
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert legend == [STATE_LABELS[c] for c in codes]


def test_waveform_window_rejected(run):
    with pytest.raises(ValueError, match="window"):
        waveform_figure(run, window=(0.0, 10 * CYCLES * run.period))
    with pytest.raises(ValueError, match="unknown signal"):
        waveform_figure(run, signals=("iX",))


@pytest.fixture(scope="module")
def comparison():
    return compare(pol_rail(), ["50 mA", "0.3 A", "3 A"], output_voltage=3.3, log=True,
                   profile=[("50 mA", 0.7), ("3 A", 0.3)])


def test_efficiency_figure_data(comparison, tmp_path):
    fig = efficiency_figure(comparison)
    img = matplotlib.image.imread(save_png(fig, tmp_path / "eff.png", dpi=50))
    assert img.shape[:2] == (250, 400)
    ax, = fig.axes
    assert ax.get_xscale() == "log"
    assert "[A]" in ax.get_xlabel() and "[%]" in ax.get_ylabel()
    lines = {ln.get_label(): ln for ln in ax.lines if not ln.get_label().startswith("_")}
    assert set(lines) == {STRATEGY_NAMES[s] for s in comparison.strategies}
    for s in comparison.strategies:
        ln = lines[STRATEGY_NAMES[s]]
        rows = comparison.rows[s]
        assert list(ln.get_xdata()) == [r.load_current for r in rows]
        assert list(ln.get_ydata()) == [100 * r.efficiency for r in rows]


def _stacks(ax, bars):
    """Each bar's stacked items from the figure objects: {bar: [(item, bottom, height)]}."""
    out = {b: [] for b in bars}
    for container in ax.containers:
        item = container.patches[0].get_gid()
        assert container.get_label() == item_label(item)
        for patch, b in zip(container.patches, bars, strict=True):
            out[b].append((item, patch.get_y(), patch.get_height()))
    return out


def test_loss_breakdown_in_watts_has_one_panel_per_load(comparison):
    loads = ("50 mA", "3 A")
    fig = loss_breakdown_figure(comparison, loads, scale="watts")
    assert len(fig.axes) == 2
    assert "[W]" in fig.axes[0].get_ylabel()
    for ax, lv in zip(fig.axes, loads, strict=True):
        bars = [(s, lv) for s in comparison.strategies]
        for b, parts in _stacks(ax, bars).items():
            total = 0.0
            for item, bottom, height in parts:
                want = comparison.row(*b).losses.get(item, 0.0)
                # (matplotlib keeps a stacked bar as bottom and top: its height is
                # rounded to the bar below it, a few 1e-16 of the stack)
                assert height == pytest.approx(want, rel=1e-12, abs=1e-15 * (total + want))
                assert bottom == pytest.approx(total, rel=1e-12, abs=1e-15)
                total += height
            assert total == pytest.approx(comparison.row(*b).loss, rel=1e-8)
    with pytest.raises(KeyError, match="not in the comparison"):
        loss_breakdown_figure(comparison, ["1 A"])
    with pytest.raises(ValueError, match="scale"):
        loss_breakdown_figure(comparison, loads, scale="log")


def test_every_bar_of_the_breakdown_is_visible_at_the_lightest_load(comparison, tmp_path):
    # the shares view: every (load, strategy) bar fills the axis whatever its watts,
    # each item is its share of that bar, and the bar's total is written above it
    loads = ("50 mA", "3 A")
    fig = loss_breakdown_figure(comparison, loads)
    save_png(fig, tmp_path / "breakdown.png", dpi=50)   # draws it
    ax, = fig.axes
    assert "[%]" in ax.get_ylabel()
    bars = [(s, lv) for lv in loads for s in comparison.strategies]
    light = [comparison.row(s, "50 mA").loss for s in comparison.strategies]
    heavy = [comparison.row(s, "3 A").loss for s in comparison.strategies]
    assert max(heavy) > 15 * min(light)     # in watts the lightest bar would be a sliver
    span = ax.get_ylim()[1] - ax.get_ylim()[0]
    for b, parts in _stacks(ax, bars).items():
        row = comparison.row(*b)
        top = sum(h for _, _, h in parts)
        assert top == pytest.approx(100.0, rel=1e-12)
        assert top / span > 0.8
        # each bar is its item's share of the items' sum, which is the input less the
        # output (conservation of energy) to the steady state's residual: the window's
        # stored energy moves by ~1e-8 of the light loads' loss
        items = sum(row.losses.values())
        assert items == pytest.approx(row.loss, rel=1e-7)
        for item, _, height in parts:
            assert height == pytest.approx(100 * row.losses.get(item, 0.0) / items,
                                           rel=1e-9, abs=1e-12)
    totals = [t.get_text() for t in ax.texts if t.get_gid() == "total"]
    from bucksim.model.units import format_si
    assert totals == [format_si(comparison.row(*b).loss, "W", 3) for b in bars]


def test_efficiency_figure_marks_where_the_mode_changes(comparison):
    fig = efficiency_figure(comparison)
    ax, = fig.axes
    marks = [ln for ln in ax.lines if ln.get_gid() == "mode_change"]
    expected = 0
    for s in comparison.strategies:
        words = [(r.conduction_mode, r.reverse_current) for r in comparison.rows[s]]
        expected += sum(a != b for a, b in zip(words, words[1:], strict=False))
    assert expected > 0
    assert len(marks) == expected


def test_reverse_figure_data():
    sc = dataclasses.replace(pol_rail(), inductor=bucksim.model.parts.Inductor(2.2e-6, 25e-3))
    res = reverse_current(sc, load=[0.3, 2.0])
    fig = reverse_figure(res)
    ax, = fig.axes
    curve = ax.lines[0]
    assert list(curve.get_xdata()) == [pt.load_current for pt in res.points]
    assert list(curve.get_ydata()) == [pt.min_current for pt in res.points]
    vertical = [ln.get_xdata()[0] for ln in ax.lines[2:]]
    assert vertical == [res.boundary.closed_form, res.boundary.simulated]
    assert "[A]" in ax.get_xlabel() and "[A]" in ax.get_ylabel()


def _cli(args):
    import argparse

    from bucksim.cli.plot import register
    parser = argparse.ArgumentParser(prog="bucksim")
    register(parser.add_subparsers())
    ns = parser.parse_args(args)
    return ns.func(ns)


def test_cli_plot(run, tmp_path, capsys):
    stored = tmp_path / "run.h5"
    run.save(stored)
    out = tmp_path / "fig.png"
    T = run.period
    args = ["plot", str(stored), "--signals", "iL,vo", "--window", f"{T}:{3 * T}",
            "--out", str(out)]
    assert _cli(args) == 0
    assert matplotlib.image.imread(out).shape[:2] == (600, 800)
    before = out.read_bytes()
    assert _cli(args) == 1                    # refuses to overwrite
    assert "--force" in capsys.readouterr().err
    assert out.read_bytes() == before
    assert _cli(args + ["--force"]) == 0
    assert out.read_bytes() == before         # same figure, same bytes
    assert _cli(["plot", str(stored), "--signals", "iX", "--out",
                 str(tmp_path / "x.png")]) == 1
    assert "unknown signal" in capsys.readouterr().err
