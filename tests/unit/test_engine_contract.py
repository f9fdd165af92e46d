"""The engine's contract: the constants numba reads equal the Python side's, every status
code has its message in the one table, and ``simulate`` builds each Stage once.

numba freezes a module constant's value when it compiles, so the kernels keep their
own copies of the conduction, gate and strategy codes and of the Taylor order; these
tests are what keeps the copies honest (docs/architecture.md, "The engine contract").
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.engine import cycles, kernels, propagation, status, tables
from bucksim.engine.driver import EngineResult, nominal_phases
from bucksim.model import stage as stage_mod
from bucksim.model.parts import STRATEGIES

ROOT = Path(__file__).resolve().parents[2]


# ----------------------------------------------------------------------------- mirrored constants

def test_conduction_codes_of_the_kernels_are_the_stage_codes():
    for name in ("HIGH", "LOW", "LOW_DIODE", "HIGH_DIODE", "IDLE", "OPEN", "N_CONDUCTION"):
        assert getattr(kernels, name) == getattr(stage_mod, name), name
    assert len(stage_mod.CONDUCTION_NAMES) == kernels.N_CONDUCTION
    codes = [kernels.HIGH, kernels.LOW, kernels.LOW_DIODE, kernels.HIGH_DIODE, kernels.IDLE,
             kernels.OPEN]
    assert sorted(codes) == list(range(kernels.N_CONDUCTION))


def test_gate_codes_of_the_kernels_are_the_stage_codes():
    for name in ("GATE_HIGH", "GATE_OFF", "GATE_LOW"):
        assert getattr(kernels, name) == getattr(stage_mod, name), name


def test_strategy_codes_of_the_kernels_follow_the_one_strategy_list():
    assert stage_mod.STRATEGY_CODES == {name: i for i, name in enumerate(STRATEGIES)}
    assert kernels.ASYNC == stage_mod.STRATEGY_CODES["asynchronous"]
    assert kernels.FORCED == stage_mod.STRATEGY_CODES["forced-pwm"]
    assert kernels.EMULATION == stage_mod.STRATEGY_CODES["diode-emulation"]


def test_taylor_order_is_one_number_everywhere():
    assert propagation.TAYLOR_ORDER == tables.TAYLOR_ORDER == kernels.TAYLOR_ORDER
    # the inverse factorials of taylor_zero cover exactly that order
    assert len(kernels._INV_FACTORIAL) == tables.TAYLOR_ORDER + 1
    assert np.allclose(kernels._INV_FACTORIAL,
                       [1.0 / np.prod(np.arange(1, j + 1)) for j in range(tables.TAYLOR_ORDER + 1)],
                       rtol=1e-16, atol=0)


def test_phase_count_is_that_of_the_program():
    from bucksim.engine.tables import phase_exponentials

    for name in ("default.toml",):
        sc = bucksim.load_scenario(ROOT / "bucksim" / "data" / name)
        assert nominal_phases(sc, None).shape == (cycles.N_PHASES,)
        M = stage_mod.Stage(sc).matrices
        assert phase_exponentials(M, nominal_phases(sc, None)).shape[1] == cycles.N_PHASES


def test_controller_codes_are_distinct_and_shared_by_the_loop():
    assert cycles.CONTROL_OPEN == kernels.CONTROL_OPEN
    assert cycles.CONTROL_DIGITAL == kernels.CONTROL_DIGITAL
    assert cycles.CONTROL_ANALOG == kernels.CONTROL_ANALOG
    assert len({kernels.CONTROL_OPEN, kernels.CONTROL_DIGITAL, kernels.CONTROL_ANALOG}) == 3


# ----------------------------------------------------------------------------- the status table

def test_every_run_code_has_its_message_in_the_one_table():
    codes = [status.STATUS_OK, status.STATUS_DIVERGED, status.STATUS_FULL,
             status.STATUS_LOOP_UNSETTLED]
    assert codes == [0, 1, 2, 3]
    assert sorted(status.RUN_MESSAGES) == codes
    for code in codes:
        assert status.run_message(code) == status.RUN_MESSAGES[code] != ""
    with pytest.raises(ValueError, match="not a run status code"):
        status.run_message(7)


def test_steady_state_codes_are_their_own_table():
    codes = [status.STEADY_OK, status.STEADY_FALLBACK, status.STEADY_FAILED]
    assert codes == [0, 1, 2] and sorted(status.STEADY_MESSAGES) == codes
    assert status.steady_message(status.STEADY_FAILED) != status.run_message(2)
    from bucksim.steady import result

    assert (result.STEADY_OK, result.STEADY_FALLBACK, result.STEADY_FAILED) == tuple(codes)


def test_the_status_codes_are_imported_not_copied():
    """The codes are defined in engine/status.py alone; every other module imports them."""
    assert status_copies(ROOT) == []


def status_copies(root):
    """``path: line`` of each assignment to a status name outside engine/status.py."""
    defining = re.compile(r"^(STATUS_\w+|STEADY_(OK|FALLBACK|FAILED))\b[\w, ]*=(?!=)")
    found = []
    for path in sorted((root / "bucksim").rglob("*.py")):
        if path.as_posix().endswith("engine/status.py"):
            continue
        found += [f"{path.relative_to(root)}: {line}"
                  for line in path.read_text(encoding="utf-8").splitlines()
                  if defining.match(line)]
    return found


def test_the_copy_finder_sees_the_copies_of_the_restructured_tree(tmp_path):
    """Against the code as it stood before the one table (kernels, simulation and
    steady.result each defined their own codes), the finder reports all three."""
    old = {"bucksim/engine/kernels.py": "STATUS_OK, STATUS_DIVERGED, STATUS_FULL = 0, 1, 2\n",
           "bucksim/simulation.py": "STATUS_LOOP_UNSETTLED = 3\nx = STATUS_OK == 0\n",
           "bucksim/steady/result.py": "STEADY_OK, STEADY_FALLBACK, STEADY_FAILED = 0, 1, 2\n",
           "bucksim/engine/status.py": "STATUS_OK = 0\n"}
    for rel, text in old.items():
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / rel).write_text(text, encoding="utf-8")
    assert len(status_copies(tmp_path)) == 3


def test_an_engine_result_carries_the_tables_message():
    res = EngineResult(*(np.zeros(0),) * 5, x_end=np.zeros(2), t_end=0.0,
                       status=status.STATUS_DIVERGED,
                       message=status.run_message(status.STATUS_DIVERGED))
    assert not res.success and "diverged" in res.message
    run = bucksim.simulate(bucksim.load_scenario(ROOT / "bucksim" / "data" / "default.toml"))
    assert run.status == status.STATUS_OK and run.message == status.run_message(0)
    assert run.success


# ----------------------------------------------------------------------------- one Stage per run

BUNDLED = [ROOT / "bucksim" / "data" / "default.toml", *sorted((ROOT / "scenarios").glob("*.toml"))]


@pytest.mark.parametrize("path", BUNDLED, ids=lambda p: p.name)
def test_simulate_builds_each_stage_once(path, monkeypatch):
    """One Stage for the scenario; a steady-state start adds exactly one for the periodic
    scenario the shooting runs on (no steps, no soft-start: other levels, so other
    systems), and nothing else builds one."""
    sc = bucksim.load_scenario(path)
    built = []
    original = stage_mod.Stage.__init__

    def counting(self, scenario, *args, **kwargs):
        built.append(scenario)
        original(self, scenario, *args, **kwargs)

    monkeypatch.setattr(stage_mod.Stage, "__init__", counting)
    bucksim.simulate(sc)
    steady_start = sc.run.start == "steady-state"
    assert len(built) == (2 if steady_start else 1)
    assert built[0] is sc
    if steady_start:
        from bucksim.steady.result import periodic_scenario

        periodic = periodic_scenario(sc)
        assert built[1].supply == periodic.supply and built[1].load == periodic.load


def test_the_cycle_loops_divergence_range_is_the_simulations():
    from bucksim import simulation
    from bucksim.engine import period

    assert period.STATE_RANGE == simulation.STATE_RANGE
