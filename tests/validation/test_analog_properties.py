"""Laws every analog closed loop obeys, over seeded random legal designs.

Conservation of energy (the run's energy balance), the anti-windup contract
(the integrator state never leaves its range; conditional integration as in
Astrom & Hagglund, Advanced PID Control, 2006, ch. 3) and a finished run
(no event loop that stalls time). Designs span 30 kHz to 3 MHz, all three
strategies, voltage and peak-current mode, PI / type II / type III
compensators, with and without soft-start, current limit, blanking, pulse
skipping and a load step. The numbers are drawn, not taken from any product.
"""

import numpy as np
import pytest

import bucksim
from bucksim.errors import ScenarioError
from bucksim.model.parts import (
    Capacitor,
    Control,
    Diode,
    Inductor,
    Load,
    LoadStep,
    Mosfet,
    RunSettings,
    Scenario,
    Supply,
    Switching,
)


def design(rng):
    fs = 10 ** rng.uniform(4.5, 6.5)
    vin = rng.uniform(5, 48)
    vo = rng.uniform(0.05, 0.9) * vin
    L, C = 10 ** rng.uniform(-7, -4.5), 10 ** rng.uniform(-5.5, -3)
    R = 10 ** rng.uniform(-1, 3) * vo / 5
    strategy = str(rng.choice(["asynchronous", "forced-pwm", "diode-emulation"]))
    dead = (0.0, 0.0) if strategy == "asynchronous" else tuple(rng.uniform(0, 0.02, 2) / fs)
    peak = bool(rng.random() < 0.4)
    fz = 10 ** rng.uniform(2.5, 4)
    comp = {"gain": float(10 ** rng.uniform(2, 4.5)), "zeros": [float(fz)]}
    kind = int(rng.integers(0, 3))
    if kind == 1:
        comp["poles"] = [float(fs / 3)]
    elif kind == 2:
        comp["zeros"] = [float(fz), float(2 * fz)]
        comp["poles"] = [float(fs / 4), float(fs / 3)]
    ctl = Control(mode="peak-current" if peak else "voltage-mode", reference=float(vo),
                  compensator=comp, implementation="analog",
                  current_sense=0.1 if peak else 0.0,
                  slope_compensation=float(0.1 * vo / L * rng.uniform(0, 1)) if peak else 0.0,
                  soft_start=float(rng.choice([0.0, 50 / fs])), ramp=float(rng.uniform(0.5, 3)),
                  current_limit=float(3 * vo / R + 1) if rng.random() < 0.3 else None,
                  min_on_time=float(rng.choice([0.0, 0.05 / fs])),
                  pulse_skipping=bool(rng.random() < 0.3))
    hs = Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = (Diode(0.4, 0.01) if strategy == "asynchronous" else
          Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side"))
    steps = (LoadStep(150 / fs, resistance=float(R / 3)),) if rng.random() < 0.5 else ()
    return Scenario("drawn analog loop", Supply(float(vin)), Switching(float(fs), strategy, dead),
                    Inductor(float(L), 0.01), Capacitor(float(C), 0.002), hs, ls,
                    Load(float(R), steps=steps), ctl, RunSettings(cycles=300))


@pytest.mark.parametrize("seed", range(24))
def test_drawn_analog_loops_conserve_energy_and_keep_the_integrator_in_range(seed):
    try:
        sc = design(np.random.default_rng(1000 + seed))
    except ScenarioError as err:   # e.g. dead times that do not fit the period
        assert err.key.startswith("switching"), str(err)
        return
    run = bucksim.simulate(sc)
    assert run.status in (0, 3), run.message        # completed (3: loop did not settle)
    assert run.t_end == pytest.approx(sc.duration, rel=1e-12)
    s = run.summary().to_dict()
    assert s["energy_balance_error"] < 1e-9
    st = run.stage
    lo, hi = st.integrator_limits()
    w = run.segments.x0[:, st.integrator_index]
    scale = max(1.0, abs(hi) if np.isfinite(hi) else 1.0)
    assert w.min() >= lo - 1e-12 * scale and w.max() <= hi + 1e-12 * scale
    t = np.linspace(0.0, run.t_end, 2001)
    w_dense = run.at(t)[:, st.integrator_index]
    assert w_dense.min() >= lo - 1e-12 * scale and w_dense.max() <= hi + 1e-12 * scale
