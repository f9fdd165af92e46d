"""The transients' extrema evaluated only where they can be (bucksim.analysis.pruned)
equal the exact extrema of every piece (bucksim.analysis.extrema.piece_extrema),
bit for bit, and the settling search finds the same exit.

The pruning rests on a rigorous curvature bound (the engine's own event bound);
these tests check that it never drops a piece that holds an extreme, on runs
where the extremes sit in a transient, in the periodic ripple (a run that starts
on its steady state: every period's peak a candidate), and in the switch node's
ring (a signal that reads the node).
"""

from __future__ import annotations

import numpy as np
import pytest

import bucksim
from bucksim.analysis.extrema import piece_extrema
from bucksim.analysis.pruned import window_extrema
from bucksim.analysis.transients import _pieces
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH, load_scenario, replace_key

SCENARIOS = DEFAULT_SCENARIO_PATH.parents[2] / "scenarios"


def _runs():
    default = replace_key(load_scenario(DEFAULT_SCENARIO_PATH), "run.cycles", 3000)
    yield "start-up", default
    yield "from steady state", replace_key(replace_key(default, "run.start", "steady-state"),
                                           "run.cycles", 400)
    yield "load step", load_scenario(SCENARIOS / "core_rail_0v9_load_step.toml")
    yield "DCM ring", replace_key(load_scenario(SCENARIOS / "radio_rail_3v3_light_load.toml"),
                                  "run.cycles", 400)


@pytest.mark.parametrize("name, scenario", list(_runs()), ids=[n for n, _ in _runs()])
@pytest.mark.parametrize("signal", ["vo", "iL", "vsw"])
def test_pruned_extrema_equal_the_exact_ones(name, scenario, signal):
    run = bucksim.simulate(scenario)
    t_a = 0.0 if name != "load step" else scenario.load.steps[0].time
    idx, ta, tb = _pieces(run, t_a, run.t_end)
    lo, hi = piece_extrema(run, signal, idx, ta, tb)
    ref = np.mean(run.at(np.linspace(t_a, run.t_end, 101), signal))
    band = (ref - 0.01 * abs(ref), ref + 0.01 * abs(ref))
    v_lo, v_hi, sel, s_lo, s_hi = window_extrema(run, signal, idx, ta, tb, band=band)
    assert (v_lo, v_hi) == (float(lo.min()), float(hi.max()))
    # every piece that leaves the band is among sel, with its exact range
    outside = np.nonzero((lo < band[0]) | (hi > band[1]))[0]
    assert set(outside) <= set(sel)
    assert np.array_equal(s_lo, lo[sel]) and np.array_equal(s_hi, hi[sel])


def test_summary_transients_unchanged_by_pruning():
    run = bucksim.simulate(load_scenario(SCENARIOS / "core_rail_0v9_load_step.toml"))
    from bucksim.analysis import transients as tr

    pruned = tr.transients(run)
    assert pruned
    times = [e["time"] for e in pruned] + [run.t_end]
    for event, tb in zip(pruned, times[1:], strict=True):
        idx, ta, tb_ = _pieces(run, event["time"], tb)
        lo, hi = piece_extrema(run, "vo", idx, ta, tb_)
        assert event["vo_max"] == float(hi.max()) and event["vo_min"] == float(lo.min())
        assert event["il_peak"] == float(piece_extrema(run, "iL", idx, ta, tb_)[1].max())
