"""The one-period map's Jacobian with the channels' ramps, against central differences.

A ramp that starts at the period's first gate edge takes its slope from the start
state (``k = RAMP_SCALE max(iL, 0) / t_r``, :mod:`bucksim.engine.ramps`): the
monodromy must carry that reset too, or Newton's shooting converges linearly. The
reference is the map itself, differenced (central, step 1e-7 of each state's
scale): a route that shares nothing with the monodromy's assembly of transition
matrices, resets and saltation terms.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.steady.open_loop import PeriodMap, open_loop_steady_state
from bucksim.studies.compare import strategy_scenario
from bucksim.studies.levels import LoadLevel, with_level

RAIL = Path(__file__).resolve().parents[2] / "scenarios" / "core_rail_1v0.toml"


@pytest.mark.parametrize("strategy, duty, ohm", [
    # the node is open at the period's start (the freewheel ended): the turn-on ramp's
    # slope, set from iL there, moves the whole swing
    ("asynchronous", 0.112309, 3.65016),
    ("diode-emulation", 0.082125, 2.38639),
])
def test_monodromy_matches_the_differenced_map(strategy, duty, ohm):
    sc = with_level(strategy_scenario(bucksim.load_scenario(RAIL), strategy, None),
                    LoadLevel("resistance", ohm))
    sc = dataclasses.replace(sc, control=dataclasses.replace(sc.control, duty=duty))
    ss = open_loop_steady_state(sc)
    assert ss.success, ss.message
    pmap = PeriodMap(sc)
    x = ss.x
    _, J, res = pmap(x)
    assert res.conduction[0] == 5          # open at the start: the case this is about
    for k in (0, 1, 2):                    # iL, vC, vn
        h = 1e-7 * max(abs(x[k]), 1e-2)
        dx = np.zeros_like(x)
        dx[k] = h
        fd = (pmap.step(x + dx)[0] - pmap.step(x - dx)[0]) / (2 * h)
        np.testing.assert_allclose(J[:3, k], fd[:3], rtol=1e-5, atol=1e-6)
    # quadratic convergence: a handful of updates from the averaged guess
    assert ss.iterations <= 6
