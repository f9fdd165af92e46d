"""Efficiency is continuous in load through the CCM boundary, for every strategy.

With fixed formulas at the edges, a stage's efficiency could step at the boundary
(a fixed recovery charge booked the moment a diode carries any current at
turn-on: 88.6 % to 82.8 % between 3.60 A and 3.65 A on the bundled core rail).
With the node in the circuit and charge-control recovery, every loss is a
continuous function of the operating point, so a step between neighbouring loads
may be no larger than the neighbouring steps explain (continuity of the
underlying functions; the bound of three times the largest neighbouring step plus
0.05 points is this test's own choice, far below the old cliff).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.studies.compare import compare

CORE = Path(__file__).resolve().parents[2] / "scenarios" / "core_rail_1v0.toml"


def _steps_are_explained(eff):
    d = np.diff(100.0 * np.asarray(eff))
    for k in range(d.shape[0]):
        neighbours = [abs(d[j]) for j in (k - 1, k + 1) if 0 <= j < d.shape[0]]
        assert abs(d[k]) <= 3.0 * max(neighbours) + 0.05, (k, d)


@pytest.mark.parametrize("strategies, loads", [
    (("forced-pwm", "diode-emulation"), np.linspace(3.3, 3.9, 7)),
    (("asynchronous",), np.linspace(4.0, 10.0, 7)),
])
def test_efficiency_is_continuous_through_the_ccm_boundary(strategies, loads):
    sc = bucksim.load_scenario(CORE)
    cmp = compare(sc, {"current": list(loads)}, output_voltage=1.0, strategies=strategies)
    for s in strategies:
        rows = cmp.rows[s]
        assert all(r.ok for r in rows), [r.error for r in rows]
        _steps_are_explained([r.efficiency for r in rows])
    # the sweep crosses a boundary where the stage can leave CCM
    modes = {r.conduction_mode for s in strategies for r in cmp.rows[s]}
    if "diode-emulation" in strategies or "asynchronous" in strategies:
        assert modes == {"ccm", "dcm"}, modes
