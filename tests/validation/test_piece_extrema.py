"""Exact extrema of segments that ring many times (filter resonance far above fs).

``measure.piece_extrema`` must return the true min and max of the output
voltage and of the inductor current however many times the LC filter rings
within one segment, and whatever its eigenvalues (complex or real).

The reference is independent of bucksim's evaluation: the circuit's own
matrices (``reference_sim.Circuit``, written from the circuit description),
``scipy.linalg.expm`` at every point of a grid four times finer than the
spacing ``pi / omega`` of the turning points (so no grid interval holds two
of them), and ``scipy.optimize.brentq`` on the analytic derivative wherever it
changes sign between grid points. Only the segment table (start times,
conduction states, start states) is taken from the run.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.optimize import brentq

import bucksim
from tests.references.stage_solver import Circuit, buck_scenario

# f0 = 1/(2 pi sqrt(L C)) for each case (a series RLC, Erickson and Maksimovic,
# Fundamentals of Power Electronics, 3rd ed., ch. 8):
# * "ringing": 10 nH and 100 nF ring at 5.03 MHz, 503 times fs = 10 kHz: ~150
#   rings in the on-time and ~350 in the off-time. The former sampler (at most
#   257 samples a segment) missed the minimum of vo here by 0.68 V (6 %).
#   (fs 100 kHz, 100 nH, 1 uF ring only ~3 times a segment: too few to tell.)
# * "ringing-esr": 10 nH, 1 uF at 10 kHz and duty 0.98 (~155 rings in the
#   on-time), an ESR in the output and a sink in the load; the former sampler
#   missed the maximum of vo by 7.5 mV.
# * "overdamped": 1 uH, 1 mF, 10 mohm load: real eigenvalues, so the
#   derivative has at most one zero in a segment (Polya and Szego, Problems
#   and Theorems in Analysis II, part V, problem 75).
CASES = {
    "ringing": dict(vin=12.0, duty=0.3, frequency=10e3, inductance=10e-9,
                    capacitance=100e-9, dcr=1e-3, resistance=100.0),
    "ringing-esr": dict(vin=12.0, duty=0.98, frequency=10e3, inductance=10e-9,
                        capacitance=1e-6, dcr=1e-3, esr=2e-3, resistance=20.0,
                        current=0.2),
    "overdamped": dict(vin=12.0, duty=0.4, frequency=100e3, inductance=1e-6,
                       capacitance=1e-3, dcr=1e-3, esr=1e-3, resistance=1e-2),
}


def _reference_extrema(run, circuit, start, stop):
    """``{"vo": (min, max), "iL": (min, max)}`` over [start, stop] (scipy expm + brentq)."""
    seg = run.segments
    # vo = k (vC + ESR iL - ESR Icc), k = 1 / (1 + ESR G), on z = [iL, vC, 1]
    # (KCL at the output node; reference_sim Notes)
    k = 1.0 / (1.0 + circuit.esr * circuit.conductance)
    rows = {"vo": np.array([k * circuit.esr, k, -k * circuit.esr * circuit.sink]),
            "iL": np.array([1.0, 0.0, 0.0])}
    out = {name: (np.inf, -np.inf) for name in rows}
    first = max(int(np.searchsorted(seg.t0, start, side="right")) - 1, 0)
    for j in range(first, len(seg)):
        t0 = seg.t0[j]
        if t0 >= stop:
            break
        a, b = max(start, t0) - t0, min(stop, t0 + seg.dt[j]) - t0
        if b <= a:
            continue
        A, src = circuit.system(int(seg.conduction[j]))
        M = np.zeros((3, 3))
        M[:2, :2], M[:2, 2] = A, src
        z0 = np.append(seg.x0[j], 1.0)
        omega = float(np.max(np.abs(np.linalg.eigvals(A).imag)))
        n = max(16, math.ceil(4 * (b - a) * omega / math.pi))
        grid = np.linspace(a, b, n + 1)
        zs = np.array([expm(M * t) @ z0 for t in grid])
        for name, c in rows.items():
            d = c @ M                      # the signal's derivative: d z
            val, der = zs @ c, zs @ d
            lo, hi = val.min(), val.max()
            for i in np.nonzero(der[:-1] * der[1:] < 0)[0]:
                t = brentq(lambda t, d=d, M=M, z0=z0: d @ expm(M * t) @ z0, grid[i], grid[i + 1],
                           xtol=1e-14 * (b - a), rtol=4 * np.finfo(float).eps)
                v = c @ expm(M * t) @ z0
                lo, hi = min(lo, v), max(hi, v)
            out[name] = (min(out[name][0], lo), max(out[name][1], hi))
    return out


@pytest.mark.parametrize("case", sorted(CASES))
def test_summary_extrema_match_a_dense_scipy_reference(case):
    sc = buck_scenario(strategy="forced-pwm", rds_hs=1e-3, rds_ls=1e-3, cycles=30,
                       summary_cycles=1, **CASES[case])
    run = bucksim.simulate(sc)
    assert run.success, run.message
    s = run.summary().to_dict()
    ref = _reference_extrema(run, Circuit.from_scenario(sc), s["window"]["start"],
                             s["window"]["stop"])
    for key, name in (("output_voltage", "vo"), ("inductor_current", "iL")):
        lo, hi = ref[name]
        # both sides are exact: they agree to rounding of the signal's size
        tol = 1e-9 * max(abs(lo), abs(hi))
        assert abs(s[key]["min"] - lo) <= tol, (key, s[key]["min"], lo)
        assert abs(s[key]["max"] - hi) <= tol, (key, s[key]["max"], hi)
