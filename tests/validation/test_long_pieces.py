"""Pieces far longer than the stage's own dynamics: exact, and at a bounded cost.

A stage whose output filter rings at 1e11 Hz (1 pH, 1 pF) holds millions of
lobes in every segment. The summary's extrema and the iGSE core loss look
only where a lobe can stand above rounding (analysis.extrema.piece_extrema and
coreloss._decayed_end, Notes there): the first and last lobes of a ringing
piece (turning values of ``B e^{sigma t} cos(omega t - psi)`` are monotone in
magnitude), or the first 40 slow time constants of a decaying one. The
checks: the windowed results equal the full search on designs where the full
search is affordable, and the 1 pH design finishes under a cap on work.
"""

from __future__ import annotations

import numpy as np
import pytest

import bucksim
from bucksim.analysis import coreloss, extrema
from bucksim.analysis.extrema import piece_extrema
from bucksim.analysis.windows import window_pieces
from bucksim.engine import kernels
from bucksim.model.scenario import DEFAULT_SCENARIO_PATH, replace_key


def _stage(inductance, capacitance, cycles=40, **keys):
    sc = bucksim.load_scenario(DEFAULT_SCENARIO_PATH)
    sc = replace_key(sc, "inductor.inductance", inductance)
    sc = replace_key(sc, "output_capacitor.capacitance", capacitance)
    sc = replace_key(sc, "run.cycles", cycles)
    for key, value in keys.items():
        sc = replace_key(sc, key.replace("__", "."), value)
    return sc


@pytest.mark.parametrize("inductance, capacitance, load", [
    (1e-9, 1e-9, "0.66 ohm"),     # rings at 160 MHz, ~100 lobes a segment
    (1e-9, 1e-8, "0.01 ohm"),     # overdamped by the load: two real modes
])
@pytest.mark.parametrize("signal", ["iL", "vo"])
def test_end_windows_find_the_same_extrema_as_the_full_search(monkeypatch, inductance,
                                                              capacitance, load, signal):
    run = bucksim.simulate(_stage(inductance, capacitance, load__resistance=load))
    idx, tau_a, tau_b, _ = window_pieces(run, run.t_end - 5 * run.scenario.period)
    lo, hi = piece_extrema(run, signal, idx, tau_a, tau_b)
    monkeypatch.setattr(extrema, "_END_LOBES", np.inf)
    monkeypatch.setattr(extrema, "_END_DECAYS", np.inf)
    lo_full, hi_full = piece_extrema(run, signal, idx, tau_a, tau_b)
    scale = max(np.abs(lo_full).max(), np.abs(hi_full).max())
    # the same turning points, refined the same way: equal to rounding
    np.testing.assert_allclose(lo, lo_full, rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(hi, hi_full, rtol=0, atol=1e-12 * scale)


def test_truncated_core_loss_equals_the_full_integral(monkeypatch):
    # 10 nH with 10 nF rings at 16 MHz against 500 kHz switching: the full
    # iGSE integral over every lobe is affordable here
    run = bucksim.simulate(_stage(1e-8, 1e-8))
    idx, tau_a, tau_b, _ = window_pieces(run, run.t_end - 5 * run.scenario.period)
    assert np.any(coreloss._decayed_end(run, idx, tau_a, tau_b, 1.4) < tau_b)  # it truncates
    cut = coreloss.core_loss(run, idx, tau_a, tau_b)
    monkeypatch.setattr(coreloss, "_decayed_end", lambda run, idx, a, b, alpha: b)
    full = coreloss.core_loss(run, idx, tau_a, tau_b)
    assert cut["power"] == pytest.approx(full["power"], rel=1e-12)
    assert cut["delta_b"] == pytest.approx(full["delta_b"], rel=1e-12)


class _WorkCap(Exception):
    pass


def test_picohenry_stage_summarises_under_a_cap_on_work(monkeypatch):
    """1 pH with 1 pF rings ~1e6 times a 2 us period: searched lobe by lobe, two
    periods' summary evaluates the exact solution some 1e8 times and ran for
    minutes; with the end windows a few million times."""
    # the output filter's ring is the subject: no node capacitance, whose own ring
    # with 1 pH would be another 5 GHz mode in every dead time
    run = bucksim.simulate(_stage(1e-12, 1e-12, cycles=200, high_side__coss=0.0,
                                  low_side__coss=0.0))
    assert run.success
    budget = {"points": 0}
    cap = 10_000_000

    def counted(inner):
        def wrapper(*args, **kw):
            out = inner(*args, **kw)
            budget["points"] += int(np.size(args[6] if len(args) > 6 else args[-1]))
            if budget["points"] > cap:
                raise _WorkCap(budget["points"])
            return out
        return wrapper

    # every evaluation of the exact solution by extrema and core loss goes through
    # analysis.segments.segment_states, which calls
    # engine.kernels.evaluate(..., seg_idx, tau, out): count the offsets
    monkeypatch.setattr(kernels, "evaluate", counted(kernels.evaluate))
    s = run.summary(cycles=2)
    assert budget["points"] <= cap, budget
    # the filter's own current swings are bounded by the energy it can hold
    assert np.isfinite(s["inductor_current"]["max"]) and s["energy_balance_error"] < 1e-9
