"""Engine speed: switching cycles per second, and the ratio to a general ODE solver.

Measures, in one run on this machine:

1. forced PWM with dead time on both edges (CCM), segments kept;
2. diode emulation in DCM (a zero-current event every cycle);
3. voltage-mode closed loops in DCM (a controller decision and a zero-current
   event every cycle): digital (sampled) and analog (compensator states in the
   stage, comparator instant located on the exact solution);
4. the same forced-PWM circuit integrated by ``scipy.integrate.solve_ivp``
   (RK45, rtol 1e-9, atol 1e-12), restarted at every switching instant, and the
   agreement of the final state with the engine's.

Run:  python benchmarks/bench_engine.py [--cycles N] [--json out.json]

Figures are printed as a Markdown table for the README.
"""

from __future__ import annotations

import os

# small-matrix expm calls in the set-up slow down many times when OpenBLAS
# spreads them over threads on a busy machine
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse
import json
import platform
import time

import numpy as np
from scipy.integrate import solve_ivp

import bucksim
from bucksim.engine.driver import build_table, integrate
from bucksim.model.capacitance import CapacitanceTable
from bucksim.model.input_parts import CapacitorBank, InputCapacitor
from bucksim.model.parts import (
    Capacitor,
    Control,
    Diode,
    Inductor,
    Load,
    Mosfet,
    RunSettings,
    Scenario,
    Supply,
    Switching,
)
from bucksim.model.stage import Stage


def rail(strategy: str, load_ohm: float, cycles: int, dead=(20e-9, 25e-9),
         coss=(0.0, 0.0), network=False, edges=(0.0, 0.0)) -> Scenario:
    """A 12 V -> 3.3 V, 500 kHz bench rail (invented demo values); ``coss`` (high, low)
    [F] above 0 makes the switch node a state; ``network``: a 22 uF / 3 mohm input
    capacitor behind 10 mohm and 1 uH (two more states); ``edges``: the MOSFETs'
    (rise, fall) times [s] (with node capacitance, current ramps: two states each)."""
    net = {"input_capacitor": InputCapacitor((CapacitorBank(22e-6, 3e-3),))} if network else {}
    return Scenario(
        title=f"bench {strategy}",
        supply=Supply(12.0, 0.01, inductance=1e-6) if network else Supply(12.0),
        switching=Switching(500e3, strategy, dead),
        inductor=Inductor(4.7e-6, 0.012),
        output_capacitor=Capacitor(47e-6, 0.004),
        high_side=Mosfet(0.012, Diode(0.75, 0.02, section="high_side.body_diode"),
                         coss=coss[0], rise_time=edges[0], fall_time=edges[1],
                         section="high_side"),
        low_side=Mosfet(0.006, Diode(0.75, 0.02, section="low_side.body_diode"),
                        coss=coss[1], rise_time=edges[0], fall_time=edges[1],
                        section="low_side"),
        load=Load(load_ohm),
        control=Control(duty=0.285),
        run=RunSettings(cycles=cycles),
        **net,
    )


def sqrt_law(k: float, volts=(0.0, 0.5, 1.5, 3.0, 6.0, 12.0)) -> CapacitanceTable:
    """Charge-equivalent table of ``C = k / sqrt(v)`` [F] (see docs: scenario reference)."""
    v = np.asarray(volts)
    q = 2.0 * k * np.sqrt(v)
    caps = list(np.diff(q) / np.diff(v)) + [k / np.sqrt(v[-1])]
    return CapacitanceTable(tuple(map(float, v)), tuple(map(float, caps)))


def engine_rate(scenario: Scenario, repeats: int = 3) -> tuple[float, object]:
    """Cycles a second, best of ``repeats`` after a warm-up run. The first call of a
    process is thrown away by :func:`main`: its runs allocate their segment buffers
    (tens of MB) by fresh mmaps until glibc's malloc raises its mmap threshold, and ran
    at about 60 % of the speed of the later ones."""
    stage = Stage(scenario)
    table = build_table(stage.matrices, scenario.period)
    cache = {}
    integrate(stage, table=table, phase_cache=cache)  # warm-up (compile or load cache)
    best = np.inf
    for _ in range(repeats):
        t = time.perf_counter()
        res = integrate(stage, table=table, phase_cache=cache)
        best = min(best, time.perf_counter() - t)
    return scenario.n_cycles / best, res


def closed_loop_rate(cycles: int, repeats: int = 3, implementation: str = "digital") -> float:
    """Voltage mode, diode emulation in DCM: a controller decision and a
    zero-current event every period."""
    import dataclasses

    from bucksim.engine.controlled import integrate_closed_loop
    from bucksim.model.compensator import design

    sc = rail("diode-emulation", 30.0, cycles)
    sc = dataclasses.replace(sc, control=Control(mode="voltage-mode", reference=3.3,
                                                 compensator={"gain": 1000.0},
                                                 implementation=implementation))
    stage = Stage(sc)
    table = build_table(stage.matrices, sc.period)
    comp = None if stage.analog else design(sc.control.compensator, sc.period)
    cache = {}
    integrate_closed_loop(stage, comp, table=table, phase_cache=cache)
    best = np.inf
    for _ in range(repeats):
        t = time.perf_counter()
        integrate_closed_loop(stage, comp, table=table, phase_cache=cache)
        best = min(best, time.perf_counter() - t)
    return cycles / best


def ode_reference(scenario: Scenario, cycles: int):
    """Forced PWM by solve_ivp, restarted at each switching instant (CCM only:
    every gate phase maps to one linear system, chosen from the sign of iL)."""
    stage = Stage(scenario)
    T = scenario.period
    ton = scenario.control.duty * T
    tf, tr = scenario.switching.dead_time
    edges = [0.0, ton, ton + tf, T - tr, T]
    from bucksim.model.stage import HIGH, HIGH_DIODE, LOW, LOW_DIODE
    z = np.array([0.0, 0.0, 1.0])
    n_rhs = 0
    for c in range(cycles):
        for p in range(4):
            if p == 0:
                k = HIGH
            elif p == 2:
                k = LOW
            else:
                k = LOW_DIODE if z[0] > 0 else HIGH_DIODE
            M = stage.matrices[k]
            sol = solve_ivp(lambda t, y, M=M: M @ y, (c * T + edges[p], c * T + edges[p + 1]), z,
                            method="RK45", rtol=1e-9, atol=1e-12)
            n_rhs += sol.nfev
            z = sol.y[:, -1]
    return z[:2], n_rhs


def node_rates(cycles: int) -> dict:
    """Engine rates [cycles/s] and segments a cycle of the stages with more states:
    the node, the channels' ramps, coss tables, the input network."""
    out = {}
    # the switch node as a state (400 pF + 1.2 nF, invented): swings in both dead
    # times and, in DCM, the node's ring in the idle interval
    node = (400e-12, 1.2e-9)
    out["fpwm"], res_node = engine_rate(rail("forced-pwm", 0.66, cycles, coss=node))
    out["de"], _ = engine_rate(rail("diode-emulation", 30.0, cycles, coss=node))
    out["seg"] = len(res_node.t0) / cycles
    # the channels' current ramps (5 ns each, invented): two states per MOSFET, and
    # the ramps' own segments and events
    out["ramps"], res = engine_rate(rail("forced-pwm", 0.66, cycles, coss=node,
                                         edges=(5e-9, 5e-9)))
    out["seg_ramps"] = len(res.t0) / cycles
    # coss as tables (C ~ v^-1/2, 6 points each, invented): every band edge the
    # swing crosses is one more event
    curve = [sqrt_law(c * 5.0 ** 0.5) for c in node]     # the same C at 5 V
    out["table"], res_tab = engine_rate(rail("forced-pwm", 0.66, cycles, coss=curve))
    out["seg_table"] = len(res_tab.t0) / cycles
    # the input side as states (a bank and the source's inductance: two more)
    out["net"], _ = engine_rate(rail("forced-pwm", 0.66, cycles, network=True))
    out["node_net"], _ = engine_rate(rail("forced-pwm", 0.66, cycles, coss=node, network=True))
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=200_000)
    ap.add_argument("--ode-cycles", type=int, default=200)
    ap.add_argument("--json", help="write the figures to this JSON file")
    a = ap.parse_args(argv)

    engine_rate(rail("forced-pwm", 0.66, a.cycles))     # thrown away: see engine_rate
    fpwm, _ = engine_rate(rail("forced-pwm", 0.66, a.cycles))
    de, _ = engine_rate(rail("diode-emulation", 30.0, a.cycles))
    nodes = node_rates(a.cycles)
    fpwm_node, seg_node, de_node = nodes["fpwm"], nodes["seg"], nodes["de"]
    fpwm_ramps, seg_ramps = nodes["ramps"], nodes["seg_ramps"]
    fpwm_tab, seg_tab = nodes["table"], nodes["seg_table"]
    fpwm_net, fpwm_node_net = nodes["net"], nodes["node_net"]

    closed = closed_loop_rate(a.cycles)
    analog = closed_loop_rate(a.cycles, implementation="analog")

    short = rail("forced-pwm", 0.66, a.ode_cycles)
    t = time.perf_counter()
    x_ode, nfev = ode_reference(short, a.ode_cycles)
    ode_time = time.perf_counter() - t
    ode_rate = a.ode_cycles / ode_time
    run = bucksim.simulate(short)
    scale = np.abs(run.segments.x0).max(axis=0)
    err = float(np.max(np.abs(run.x_end - x_ode) / scale))
    # the engine's own accuracy: against the exact expm-stepping reference
    out = {
        "machine": f"{platform.processor() or platform.machine()}, "
                   f"python {platform.python_version()}",
        "forced_pwm_cycles_per_s": fpwm,
        "diode_emulation_dcm_cycles_per_s": de,
        "forced_pwm_node_cycles_per_s": fpwm_node,
        "forced_pwm_node_segments_per_cycle": seg_node,
        "forced_pwm_node_ramps_cycles_per_s": fpwm_ramps,
        "forced_pwm_node_ramps_segments_per_cycle": seg_ramps,
        "diode_emulation_dcm_node_cycles_per_s": de_node,
        "forced_pwm_coss_table_cycles_per_s": fpwm_tab,
        "forced_pwm_coss_table_segments_per_cycle": seg_tab,
        "forced_pwm_input_capacitor_cycles_per_s": fpwm_net,
        "forced_pwm_node_input_capacitor_cycles_per_s": fpwm_node_net,
        "closed_loop_dcm_cycles_per_s": closed,
        "analog_loop_dcm_cycles_per_s": analog,
        "solve_ivp_cycles_per_s": ode_rate,
        "speed_ratio_vs_solve_ivp": fpwm / ode_rate,
        "final_state_difference_vs_solve_ivp_rel": err,
        "solve_ivp_rhs_evaluations": nfev,
    }
    print("| measurement | figure |\n| --- | --- |")
    print(f"| engine, forced PWM + dead time, CCM, segments kept | {fpwm:.3g} cycles/s |")
    print(f"| engine, diode emulation, DCM (zero-current event each cycle) | {de:.3g} cycles/s |")
    print(f"| engine, forced PWM with node capacitance (node a state, {seg_node:.0f} segments "
          f"a cycle) | {fpwm_node:.3g} cycles/s |")
    print(f"| engine, forced PWM with coss tables (C ~ v^-1/2, 6 points each; {seg_tab:.0f} "
          f"segments a cycle) | {fpwm_tab:.3g} cycles/s |")
    print(f"| engine, forced PWM with node capacitance and both channels' current ramps "
          f"(5 ns; 4 more states, "
          f"{seg_ramps:.0f} segments a cycle) | {fpwm_ramps:.3g} cycles/s |")
    print(f"| engine, diode emulation in DCM with node capacitance (node ring) "
          f"| {de_node:.3g} cycles/s |")
    print(f"| engine, forced PWM with an input capacitor and source inductance (+2 states) "
          f"| {fpwm_net:.3g} cycles/s |")
    print(f"| engine, the same with node capacitance | {fpwm_node_net:.3g} cycles/s |")
    print(f"| engine, digital voltage-mode loop, diode emulation in DCM | {closed:.3g} cycles/s |")
    print(f"| engine, analog voltage-mode loop (PI, 4 states), diode emulation in DCM "
          f"| {analog:.3g} cycles/s |")
    print(f"| solve_ivp RK45 rtol 1e-9, restarted per switching instant "
          f"| {ode_rate:.3g} cycles/s |")
    print(f"| speed ratio engine / solve_ivp | {fpwm / ode_rate:.3g}x |")
    print(f"| final-state difference after {a.ode_cycles} cycles (relative) | {err:.2e} |")
    if a.json:
        with open(a.json, "w") as f:
            json.dump(out, f, indent=2)
    return out


if __name__ == "__main__":
    main()
