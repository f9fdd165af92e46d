"""The engine compiles from an empty numba cache, whatever runs first.

The cycle loop (``bucksim.engine.cycles.run_periods``) is compiled without
reference counting, and numba compiles the kernels it calls with the same
setting when the loop is the first to need them: a kernel that allocates on
any of its paths then fails to compile, but only on a machine whose cache is
empty and only when the loop comes first. This test starts a fresh
interpreter with an empty cache directory and runs, loop first, every kind of
segment the loop has: an analog loop with its integrator's hold, a digital
loop, capacitance tables (band edges), a node ring in diode emulation, and
forced PWM with partial ZVS (docs: architecture, the engine contract).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SCENARIOS = ("telemetry_rail_1v8_analog", "startup_5v_softstart", "dock_rail_5v_coss_curve",
             "radio_rail_3v3_light_load", "io_rail_1v8_light_load_zvs")

SCRIPT = """
import sys
import bucksim
for name in sys.argv[1:]:
    run = bucksim.simulate(bucksim.load_scenario(f"scenarios/{name}.toml"))
    print(name, run.status, len(run.segments.t0))
"""


def test_engine_compiles_from_an_empty_cache(tmp_path):
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path / "numba"), MPLBACKEND="Agg")
    done = subprocess.run([sys.executable, "-c", SCRIPT, *SCENARIOS], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    lines = done.stdout.split("\n")
    for name in SCENARIOS:
        row = next(line for line in lines if line.startswith(name + " ")).split()
        assert row[1] == "0" and int(row[2]) > 0, row
