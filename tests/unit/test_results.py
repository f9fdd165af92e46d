"""Typed results: every field declared, plain views, figures read back from their objects.

The results checked are ``Run``, ``SteadyState``, ``Summary`` (and its parts),
``Comparison``, ``ReverseCurrentResult``, ``SweepTable`` and ``CrossCheck``.
The references are outside the object under test: the command line's
``--json`` output, the key table of the summary reference
(docs/summary-reference.md), the exact waveforms (``Run.at``), the unit
circle ``|z| = 1`` and the identity that the loss items add up to the total
loss (conservation of energy over the window; the summary's own
``energy_balance_error`` checks that sum against the supply). The rails are
invented demo numbers.
"""

from __future__ import annotations

import dataclasses
import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from matplotlib.figure import Figure

from bucksim.analysis.crosscheck import CrossCheck, crosscheck
from bucksim.analysis.loss_items import LOSS_ITEMS
from bucksim.analysis.summary import Device, Summary, Transient
from bucksim.cli.common import json_ready
from bucksim.model.scenario import load_scenario, loads_scenario
from bucksim.simulation import simulate, simulate_settled
from bucksim.steady.result import SteadyState
from bucksim.studies.compare import Comparison, compare
from bucksim.studies.reverse import ReverseCurrentResult, reverse_current
from bucksim.sweeps.plan import sweep
from bucksim.sweeps.table import SweepTable
from bucksim.waveforms import Run
from tests.validation.test_compare import pol_rail

ROOT = Path(__file__).resolve().parents[2]
#: A bundled scenario with core data, a load step and a supply resistance: every
#: optional part of the summary is present.
SCENARIO = ROOT / "scenarios" / "core_rail_1v0.toml"
#: A closed loop started on its periodic steady state (controller state, duty log).
LOOP_SCENARIO = ROOT / "scenarios" / "core_rail_0v9_load_step.toml"


def short(path, cycles=300):
    sc = load_scenario(path)
    rep = dataclasses.replace
    return rep(sc, run=rep(sc.run, cycles=cycles, duration=None,
                           summary_cycles=min(sc.run.summary_cycles, 20)))


@pytest.fixture(scope="module")
def run():
    return simulate(load_scenario(SCENARIO))


@pytest.fixture(scope="module")
def loop_run():
    return simulate(short(LOOP_SCENARIO))


@pytest.fixture(scope="module")
def settled():
    """One settled period of the invented point-of-load rail (open loop)."""
    return simulate_settled(pol_rail(), cycles=1)


@pytest.fixture(scope="module")
def comparison():
    return compare(pol_rail(), ["0.3 A", "3 A"], output_voltage=3.3)


@pytest.fixture(scope="module")
def reverse():
    return reverse_current(pol_rail(), load=[0.3, 2.0])


@pytest.fixture(scope="module")
def table():
    return sweep(pol_rail(), {"load.current": [0.5, 1.0, 2.0]}, workers=1, progress=False)


# ----------------------------------------------------------------------------- declared fields

def _undeclared(obj):
    """Attributes an instance carries that its class does not declare as fields."""
    names = {f.name for f in dataclasses.fields(obj)}
    held = set(vars(obj)) if hasattr(obj, "__dict__") else set()
    return held - names


def test_every_result_declares_its_fields(run, loop_run, settled, comparison, reverse, table):
    summary = run.summary()
    check = CrossCheck(rows=[], summary={}, budget={})
    for obj in (run, loop_run, settled, loop_run.steady_state, settled.steady_state, summary,
                summary.window, summary.power, summary.devices["inductor"], comparison,
                reverse, table, check):
        assert dataclasses.is_dataclass(obj), type(obj).__name__
        assert _undeclared(obj) == set(), type(obj).__name__
    # a run has slots: nothing can be attached after construction
    with pytest.raises(AttributeError):
        run.attached_later = 1
    # what the closed loop carries is in declared fields
    assert loop_run.duty is not None and loop_run.controller_state is not None
    assert loop_run.steady_state.controller is not None
    assert run.duty is None and run.steady_state is None and settled.steady_state is not None


# ----------------------------------------------------------------------------- plain views

def _doc_tables():
    """First-column cells of each table in docs/summary-reference.md (header rows dropped)."""
    text = (ROOT / "docs" / "summary-reference.md").read_text(encoding="utf-8")
    tables, cur = [], []
    for line in text.splitlines() + [""]:
        if line.startswith("|"):
            cur.append(line.split("|")[1].strip())
        elif cur:
            tables.append(cur[2:])
            cur = []
    return tables


def _expand(cell):
    """```output_voltage.mean`, `.min``` -> the full dotted keys."""
    out = []
    for name in re.findall(r"`([^`]+)`", cell):
        out.append(out[-1].rsplit(".", 1)[0] + name if name.startswith(".") else name)
    return out


def _leaves(tree, prefix=""):
    out = []
    for k, v in tree.items():
        out += _leaves(v, f"{prefix}{k}.") if isinstance(v, dict) else [prefix + k]
    return out


def test_summary_json_matches_the_command_line_and_round_trips(run):
    # the reference is `bucksim run FILE --json`, the output the summary contract names
    cli = subprocess.run([sys.executable, "-m", "bucksim", "run", str(SCENARIO), "--json",
                          "--quiet"], capture_output=True, text=True, check=True, cwd=ROOT)
    summary = run.summary()
    assert json.dumps(json_ready(summary.to_dict()), indent=2) + "\n" == cli.stdout
    back = Summary.from_dict(json.loads(cli.stdout))
    assert back.to_dict() == json.loads(cli.stdout)
    assert back == summary              # every typed part, value for value
    # attribute access and the compatibility indexing read the same values
    assert summary.power.loss == summary["power"]["loss"]
    assert summary.devices["inductor"].core_loss == summary["devices"]["inductor"]["core_loss"]
    assert isinstance(summary.transients[0], Transient)
    assert isinstance(summary.devices["high_side"], Device)


#: Summary keys present only with an input capacitor (docs: "with an `[input_capacitor]` only").
INPUT_ONLY = ("power.source_loss", "input_voltage.", "source_current.")
#: Present only with an external bias rail (docs: 'with `controller.driver_supply = "bias"`').
BIAS_ONLY = ("power.bias",)


def test_summary_keys_follow_the_reference_order(run):
    tables = _doc_tables()
    documented = [k for cell in tables[0] for k in _expand(cell)]
    data = run.summary().to_dict()
    leaves = _leaves(data)

    def outside_devices(keys):
        return [k for k in keys if not k.startswith("devices.")]

    assert outside_devices(leaves) == [k for k in outside_devices(documented)
                                       if not k.startswith(INPUT_ONLY + BIAS_ONLY)]
    # with an input capacitor and a bias rail every documented key is there, in order
    text = Path(SCENARIO).read_text(encoding="utf-8") + (
        '\n[input_capacitor]\ncapacitance = "22 uF"\nesr = "3 mohm"\n'
        '\n[controller]\ndriver_supply = "bias"\nbias_voltage = "5 V"\n')
    networked = simulate(loads_scenario(text)).summary().to_dict()
    assert outside_devices(_leaves(networked)) == outside_devices(documented)
    names = [k for cell in tables[1] for k in _expand(cell)]
    assert list(data["devices"]) == [n for n in names if n in data["devices"]]
    for k in leaves:
        if k.startswith("devices."):
            assert k in documented or re.sub(r"^devices\.[^.]+", "devices.NAME", k) in documented
    # the transients table is the one whose first key is `event` (later sections add tables)
    transient_keys = next(t for t in tables if t and t[0] == "`event`")
    assert list(data["transients"][0]) == [k for cell in transient_keys for k in _expand(cell)]


def test_run_and_steady_state_to_dict_are_json(loop_run):
    d = json.loads(json.dumps(loop_run.to_dict()))
    seg = loop_run.segments
    assert d["segments"]["t0"] == seg.t0.tolist() and len(d["segments"]["x0"]) == len(seg)
    assert d["duty"] == pytest.approx(loop_run.duty.tolist(), nan_ok=True)
    ss = d["steady_state"]
    assert [complex(m["real"], m["imag"]) for m in ss["floquet"]] == list(
        loop_run.steady_state.floquet)
    assert ss["controller"]["w"] == loop_run.steady_state.controller.w.tolist()
    assert d["scenario"]["title"] == loop_run.scenario.title


def test_table_views(comparison, reverse, table):
    json.dumps(json_ready(comparison.to_dict()))
    json.dumps(json_ready(reverse.to_dict()))
    d = json.loads(json.dumps(json_ready(table.to_dict())))
    assert d["columns"] == table.columns
    assert d["data"]["power.loss"] == table.column("power.loss").tolist()


# ----------------------------------------------------------------------------- figures

def _xy(line):
    return np.asarray(line.get_xdata(), dtype=float), np.asarray(line.get_ydata(), dtype=float)


def test_run_plot_draws_the_exact_waveforms(settled):
    fig = settled.plot(("iL", "vo"))
    assert isinstance(fig, Figure) and len(fig.axes) == 3     # two signals and the state band
    for ax, name in zip(fig.axes[:2], ("iL", "vo"), strict=True):
        t, y = _xy(ax.lines[0])
        want = settled.at(t, name)
        assert np.allclose(y, want, rtol=0, atol=1e-9 * np.max(np.abs(want)))


def test_steady_state_plots(settled):
    ss = settled.steady_state
    fig = ss.plot()
    ax, = fig.axes
    x, y = _xy(ax.lines[0])
    assert np.allclose(np.hypot(x, y), 1.0, rtol=0, atol=1e-12)   # the unit circle
    x, y = _xy(ax.lines[1])
    assert sorted(zip(x, y, strict=True)) == sorted((m.real, m.imag) for m in ss.floquet)
    fig = ss.plot("orbit", run=settled)
    ax, = fig.axes
    vc, il = _xy(ax.lines[0])
    # one period from the periodic state: the orbit starts on x and closes on it
    assert (il[0], vc[0]) == (ss.x[0], ss.x[1])
    assert il[-1] == pytest.approx(ss.x[0], rel=1e-9) and vc[-1] == pytest.approx(ss.x[1],
                                                                                  rel=1e-9)
    assert np.ptp(il) == pytest.approx(settled.summary().inductor_current.ripple, rel=1e-3)
    mark = _xy(ax.lines[1])
    assert (mark[0][0], mark[1][0]) == (ss.x[1], ss.x[0])
    with pytest.raises(ValueError, match="needs run"):
        ss.plot("orbit")


def test_summary_plot_is_the_loss_breakdown(settled):
    s = settled.summary()
    fig = s.plot()
    ax, = fig.axes
    bars = ax.containers[0]
    items = s.loss_items()
    assert [b.get_gid() for b in bars] == list(items)
    assert [b.get_width() for b in bars] == list(items.values())
    assert list(items) == [k for k in LOSS_ITEMS if k in items]
    # energy conservation: the items are the whole loss of the window
    assert sum(items.values()) == pytest.approx(s.power.loss, rel=1e-12)


def test_comparison_plots(comparison):
    fig = comparison.plot()
    ax, = fig.axes
    labelled = [ln for ln in ax.lines if not ln.get_label().startswith("_")]
    assert len(labelled) == len(comparison.strategies)
    for ln, s in zip(labelled, comparison.strategies, strict=True):
        assert list(_xy(ln)[1]) == [100 * r.efficiency for r in comparison.rows[s]]
    fig = comparison.plot("breakdown")      # each bar in shares of its own loss
    ax, = fig.axes
    n_bars = len(comparison.levels) * len(comparison.strategies)
    assert all(len(c.patches) == n_bars for c in ax.containers)
    total = sum(np.array([p.get_height() for p in c.patches]) for c in ax.containers)
    assert total == pytest.approx(np.full(n_bars, 100.0), rel=1e-12)
    fig = comparison.plot("breakdown", scale="watts")    # one panel per load
    assert len(fig.axes) == len(comparison.levels)
    for k, ax in enumerate(fig.axes):
        total = sum(np.array([p.get_height() for p in c.patches]) for c in ax.containers)
        want = [comparison.rows[s][k].loss for s in comparison.strategies]
        assert total == pytest.approx(want, rel=1e-8)
    with pytest.raises(ValueError, match="kind"):
        comparison.plot("pie")


def test_reverse_plot(reverse):
    ax, = reverse.plot().axes
    x, y = _xy(ax.lines[0])
    assert list(y) == [p.min_current for p in reverse.points]


def test_sweep_table_plot(table):
    ax, = table.plot("power.loss").axes
    x, y = _xy(ax.lines[0])
    assert list(x) == sorted(table.column("load.current"))
    order = np.argsort(table.column("load.current"))
    assert list(y) == list(table.column("power.loss")[order])
    assert "[A]" in ax.get_xlabel() and "[W]" in ax.get_ylabel()
    with pytest.raises(ValueError, match="text"):
        table.plot("steady.method")


def test_crosscheck_plot():
    check = crosscheck(pol_rail(), cycles=2)
    ax, = check.plot().axes
    closed, sim = ax.containers
    rows = [r for r in check.rows if r["simulated"] is not None]
    assert [b.get_width() for b in closed] == [r["closed_form"] for r in rows]
    assert [b.get_width() for b in sim] == [r["simulated"] for r in rows]
    # every row carries the keys docs/summary-reference.md lists for crosscheck rows, in order
    keys = next(t for t in _doc_tables() if t and t[0] == "`item`")
    assert all(list(r) == [k for cell in keys for k in _expand(cell)] for r in check.rows)


# ----------------------------------------------------------------------------- pandas

def test_to_pandas_columns(comparison, reverse, table):
    pytest.importorskip("pandas")
    df = comparison.to_pandas()
    assert list(df.columns) == comparison.to_csv().splitlines()[0].split(",")
    assert len(df) == len(comparison.levels) * len(comparison.strategies)
    df = reverse.to_pandas()
    assert list(df.columns)[:3] == ["load_key", "load_value", "load_current"]
    assert list(df["min_current"]) == [p.min_current for p in reverse.points]
    df = table.to_pandas()
    assert list(df.columns) == table.columns
    assert df["power.loss"].dtype == np.float64 and df["point"].dtype == np.int64


def test_to_pandas_without_pandas_names_the_extra(monkeypatch, table):
    monkeypatch.setitem(sys.modules, "pandas", None)      # import pandas -> ImportError
    with pytest.raises(ImportError, match=r"bucksim\[tables\]"):
        table.to_pandas()


def test_result_types_have_plot_and_to_dict():
    for cls in (Run, SteadyState, Summary, Comparison, ReverseCurrentResult, SweepTable,
                CrossCheck):
        assert callable(getattr(cls, "plot", None)), cls.__name__
        assert callable(getattr(cls, "to_dict", None)), cls.__name__
