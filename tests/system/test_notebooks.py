"""The tutorial notebooks: they run, they run fast, and what they print is right.

Each notebook is executed with nbclient on a fresh ``python3`` kernel with
``BUCKSIM_NOTEBOOK_SMALL=1`` (smaller problem sizes) and ``MPLBACKEND=Agg``
(headless plots) in the kernel's environment, from the notebooks folder, with
the repository root on ``PYTHONPATH`` so the kernel imports this checkout's
``bucksim`` whether or not it is installed. One printed value per notebook is
checked against a fact from outside the project.
"""

from __future__ import annotations

import os
import re
import time
from pathlib import Path

import nbformat
import pytest

nbclient = pytest.importorskip("nbclient")
pytest.importorskip("ipykernel")

ROOT = Path(__file__).resolve().parents[2]
NOTEBOOKS = ROOT / "notebooks"
NAMES = ("01_first_tour.ipynb", "02_strategy_for_a_rail.ipynb", "03_validate_loss_budget.ipynb",
         "04_sizing_the_input_capacitor.ipynb")
CELL_TIMEOUT = 120  # s per cell
WALL_LIMIT = 60.0   # s per notebook, kernel start included

_executed: dict[str, tuple[nbformat.NotebookNode, float]] = {}


def _kernel_env() -> dict:
    env = dict(os.environ)
    env["BUCKSIM_NOTEBOOK_SMALL"] = "1"
    env["MPLBACKEND"] = "Agg"
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    env.setdefault("OMP_NUM_THREADS", "1")
    env["PYTHONPATH"] = os.pathsep.join(
        [str(ROOT)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
    return env


def run_notebook(name: str):
    """Execute a notebook once per session; return (executed notebook, wall time [s])."""
    if name not in _executed:
        nb = nbformat.read(NOTEBOOKS / name, as_version=4)
        client = nbclient.NotebookClient(nb, timeout=CELL_TIMEOUT, kernel_name="python3",
                                         resources={"metadata": {"path": str(NOTEBOOKS)}})
        t0 = time.perf_counter()
        client.execute(env=_kernel_env())
        _executed[name] = (nb, time.perf_counter() - t0)
    return _executed[name]


def printed_text(nb) -> str:
    """Everything the code cells wrote to stdout, in order."""
    parts = []
    for cell in nb.cells:
        if cell.cell_type != "code":
            continue
        for out in cell.get("outputs", []):
            if out.get("output_type") == "stream" and out.get("name") == "stdout":
                parts.append(out["text"])
    return "".join(parts)


def number_after(text: str, pattern: str) -> float:
    m = re.search(pattern, text, flags=re.MULTILINE)
    assert m, f"pattern {pattern!r} not found in the notebook's output"
    return float(m.group(1))


# ----------------------------------------------------------------------------- committed files

@pytest.mark.parametrize("name", NAMES)
def test_committed_notebook_has_no_outputs(name):
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    nbformat.validate(nb)
    for i, cell in enumerate(nb.cells):
        if cell.cell_type == "code":
            assert cell.outputs == [], f"{name} cell {i} holds stored outputs"
            assert cell.execution_count is None, f"{name} cell {i} holds an execution count"
    assert nb.metadata.get("kernelspec", {}).get("name") == "python3"


@pytest.mark.parametrize("name", NAMES)
def test_notebook_ends_with_a_caution(name):
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    last = nb.cells[-1]
    assert last.cell_type == "markdown"
    text = last.source.lower()
    for words in ("bench validation", "hazardous voltages", "store energy", "hot"):
        assert words in text, f"{name}: caution cell lacks {words!r}"


# ----------------------------------------------------------------------------- execution

@pytest.mark.parametrize("name", NAMES)
def test_notebook_runs_fast(name):
    nb, seconds = run_notebook(name)  # raises CellExecutionError on any failing cell
    for cell in nb.cells:
        if cell.cell_type == "code":
            assert not [o for o in cell.outputs if o.get("output_type") == "error"]
    text = printed_text(nb)
    assert "small run for CI" in text, "the kernel did not see BUCKSIM_NOTEBOOK_SMALL=1"
    assert f"bucksim from {ROOT / 'bucksim'}" in text, "the kernel imported another bucksim"
    assert seconds < WALL_LIMIT, f"{name} took {seconds:.1f} s (limit {WALL_LIMIT:.0f} s)"


def test_first_tour_efficiency_and_energy_balance():
    # Conservation of energy: a passive power stage has 0 < efficiency < 1 and
    # its energy balance closes (the design contract allows a 1e-9 residual).
    text = printed_text(run_notebook(NAMES[0])[0])
    eff = number_after(text, r"^efficiency = ([0-9.eE+-]+)$")
    residual = number_after(text, r"^energy balance error = ([0-9.eE+-]+)$")
    assert 0.0 < eff < 1.0
    assert abs(residual) < 1e-9


def test_strategy_forced_pwm_worst_at_lightest_load():
    # Common practice: at light load forced PWM's circulating current makes it the
    # least efficient of the three strategies on the same parts.
    text = printed_text(run_notebook(NAMES[1])[0])
    line = next((ln for ln in text.splitlines() if ln.startswith("lightest load")), None)
    assert line, "the notebook did not print its lightest-load line"
    eff = {name: float(v) for name, v in
           re.findall(r"(asynchronous|forced PWM|diode emulation) ([0-9.]+) %", line)}
    assert set(eff) == {"asynchronous", "forced PWM", "diode emulation"}, line
    assert eff["forced PWM"] < min(eff["asynchronous"], eff["diode emulation"])


def test_loss_budget_conduction_item_agrees_in_ccm():
    # Erickson & Maksimovic, Fundamentals of Power Electronics, 3rd ed., ch. 3:
    # DCR loss = DCR (Io^2 + dI^2/12) for a triangular CCM current; the exact
    # waveform integral must agree within 0.5 %.
    text = printed_text(run_notebook(NAMES[2])[0])
    m = re.search(r"^full load: mode (\w+); inductor\.conduction closed form (\S+) W, "
                  r"waveforms (\S+) W, difference ([+-][0-9.]+) %$", text, flags=re.MULTILINE)
    assert m, "the notebook did not print its full-load inductor.conduction line"
    mode, closed, simulated, percent = m.group(1), *map(float, m.group(2, 3, 4))
    assert mode == "ccm"
    assert closed > 0 and simulated > 0
    assert abs(percent) < 0.5
    assert abs(simulated / closed - 1.0) < 5e-3


def test_input_capacitor_rms_peaks_at_half_duty_and_follows_the_ripple_form():
    # Derived from the high-side current waveform (a ramp Io -/+ dI/2 over D T, the source
    # taking its mean D Io): Icin,rms = sqrt(D (Io^2 + dI^2/12) - (D Io)^2); the exact
    # waveform integral must agree within 0.5 %. D (1 - D) and the ripple
    # Vin D (1 - D) / (L fs) both peak at D = 0.5, so the sweep's largest rms is there.
    text = printed_text(run_notebook(NAMES[3])[0])
    m = re.search(r"^largest rms at duty ([0-9.]+) \(D = ([0-9.]+)\): .*; ripple-inclusive form "
                  r"\S+ \S+ \(([+-][0-9.]+) %\)", text, flags=re.MULTILINE)
    assert m, "the notebook did not print its largest-rms line"
    duty, share, percent = map(float, m.groups())
    assert abs(duty - 0.5) < 1e-9
    assert abs(share - 0.5) < 5e-3
    assert abs(percent) < 0.5
