"""Property-based tests: bad scenario input, and legal designs across the ranges.

Loader: mutants of the bundled scenario files (keys dropped, unknown keys
added, values replaced by random numbers, negative/zero/huge/NaN/inf values,
strings with the wrong unit, garbage text) must either load or raise
:class:`~bucksim.errors.ScenarioError` whose message names the file and a
dotted key (docs/scenario-reference.md, "Error messages": a wrong unit, an
unknown key, a missing key or a non-physical value is an error naming the
file and the key) -- never another exception.

Simulation: legal designs drawn from the ranges a designer may give
(10 kHz-10 MHz, 10 nH-10 mH, 1 uF-10 mF, 0-0.1 ohm parasitics, 1 mohm-0.1 ohm
channels, 0-1 V diode drops, duty 0.01-0.99, 1 mA-500 A of load, dead times
0-5 % of the period, all three strategies) either run with an energy balance
below 1e-9 (docs/summary-reference.md, energy_balance_error) and no NaN in
the summary, or are refused with a ScenarioError naming the key (the dead
times must fit in the off-time). The checks on the numbers are laws, not values: conservation of
energy, RMS >= |mean| (Cauchy-Schwarz), extrema bracket the mean and every
sample of the waveform, resistors and diodes only dissipate (passive sign
convention).

Every rule holds on every example: a design that once broke one is kept as
an explicit ``@example`` beside the test it broke, so it runs on every
machine whatever hypothesis draws. Hypothesis seeds its draws partly from
constants it collects from the loaded modules (and caches them in its
storage directory), so the drawn examples may differ between machines and
versions even with ``derandomize``; the laws must therefore hold for any
example, not for a fixed list.

Runs are bounded in count (``BUCKSIM_EXAMPLES_FACTOR`` multiplies every
count, for a long search: ``BUCKSIM_EXAMPLES_FACTOR=20 pytest
tests/validation/test_properties.py``), use no example database, and each example has
a deadline so a hang fails instead of stalling.
"""

from __future__ import annotations

import copy
import math
import os
import re
import tomllib
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest
import tomli_w
from hypothesis import HealthCheck, example, given, note, settings
from hypothesis import strategies as st

import bucksim
from bucksim.errors import ScenarioError
from bucksim.model.scenario import (
    DEFAULT_SCENARIO_PATH,
    loads_scenario,
    replace_key,
    scenario_to_dict,
)
from tests.references.stage_solver import buck_scenario

ENERGY_TOL = 1e-9   # docs/summary-reference.md: a residual above 1e-9 (relative) is a bug
SOURCE = "mutant.toml"

_SCENARIO_DIR = Path(__file__).resolve().parents[2] / "scenarios"
_BASE_PATHS = [Path(DEFAULT_SCENARIO_PATH)] + sorted(_SCENARIO_DIR.glob("*.toml"))
BASES = {p.name: tomllib.loads(p.read_text(encoding="utf-8")) for p in _BASE_PATHS}

# A dotted scenario key as the contract writes them: load.steps[1].current
# (parts are TOML bare keys, which may start with a digit)
_DOTTED = re.compile(r"[A-Za-z0-9_-]+(?:\.[A-Za-z0-9_-]+|\[\d+\])*")
_UNKNOWN = "zz_not_a_key"

# Inside the compensator table an infinite gain and a non-boolean integrator
# flag still load; pinned by test_compensator_rejects_infinite_gain_and_odd_flags.
_COMPENSATOR = ("control", "compensator")
CLOSED_LOOP_BASE = next(name for name, doc in sorted(BASES.items())
                        if "compensator" in doc.get("control", {}))

#: Multiplies every example count (a long search on demand; 1 in the suite).
FACTOR = max(1, int(os.environ.get("BUCKSIM_EXAMPLES_FACTOR", "1")))

LOADER_SETTINGS = settings(max_examples=60 * FACTOR, derandomize=True, database=None,
                           deadline=timedelta(seconds=2),
                           suppress_health_check=[HealthCheck.too_slow])


# ----------------------------------------------------------------------------- helpers

def dotted(path):
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else part)
    return out


def _nodes(tree, path=()):
    """Every (path, value) below ``tree``: tables, arrays and scalars."""
    items = tree.items() if isinstance(tree, dict) else enumerate(tree)
    for k, v in items:
        yield path + (k,), v
        if isinstance(v, (dict, list)):
            yield from _nodes(v, path + (k,))


def _get_parent(doc, path):
    node = doc
    for part in path[:-1]:
        node = node[part]
    return node


def doc_value(doc, path):
    return _get_parent(doc, path)[path[-1]]


def _under(path, prefix):
    return tuple(path[: len(prefix)]) == prefix


def _nan_paths(tree, path="summary"):
    if isinstance(tree, dict):
        return [p for k, v in tree.items() for p in _nan_paths(v, f"{path}.{k}")]
    if isinstance(tree, (list, tuple)):
        return [p for i, v in enumerate(tree) for p in _nan_paths(v, f"{path}[{i}]")]
    return [path] if isinstance(tree, float) and math.isnan(tree) else []


def check_scenario_error(err, text, source=SOURCE):
    """What every ScenarioError owes its reader (DEVELOPERS.md conventions)."""
    assert isinstance(err, ScenarioError)
    assert _DOTTED.fullmatch(err.key), f"not a dotted key: {err.key!r}"
    message = str(err)
    assert message.startswith(source), message
    assert err.key in message, message
    if err.line is not None:
        lines = text.splitlines()
        assert 1 <= err.line <= len(lines), (err.line, message)
        if "[" not in err.key:  # an array element's line may hold only its value
            # the named line must hold the key or one of the tables around it
            names = re.findall(r"[A-Za-z_-][A-Za-z0-9_-]*", err.key)
            assert any(n in lines[err.line - 1] for n in names), (message, lines[err.line - 1])


def load_or_error(doc):
    """``(text, Scenario or ScenarioError)``; any other exception propagates."""
    text = tomli_w.dumps(doc)
    try:
        return text, loads_scenario(text, source=SOURCE)
    except ScenarioError as err:
        check_scenario_error(err, text)
        return text, err


# ----------------------------------------------------------------------------- values

_UNITS = ("V", "A", "ohm", "H", "F", "s", "Hz", "C", "V/s", "V/A", "m^3", "m^2")
_UNIT_OF = re.compile(r"\s*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\s*(?P<suffix>\S+)\s*")
_SPELLINGS = {"ohm": ("ohm", "Ohm", "\u03a9", "\u2126"), "m^3": ("m^3", "m\u00b3"),
              "m^2": ("m^2", "m\u00b2")}


def unit_of(value):
    """The unit a quantity string is written in (``"3.3 uH"`` -> ``"H"``), else None."""
    if not isinstance(value, str):
        return None
    m = _UNIT_OF.fullmatch(value)
    if m is None:
        return None
    suffix = m.group("suffix")
    for unit in sorted(_UNITS, key=len, reverse=True):
        for spelling in _SPELLINGS.get(unit, (unit,)):
            if suffix.endswith(spelling):
                return unit
    return None


_numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -0.0, -1.0, -1e-9, 1e308, -1e308, 5e-324, 1e-300, 2.0**63]),
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
)
_prefixed = st.builds(lambda x, p, u: f"{x:g} {p}{u}", st.floats(-1e6, 1e6),
                      st.sampled_from(["", "f", "p", "n", "u", "m", "k", "M", "G", "x", "\u00b5"]),
                      st.sampled_from(_UNITS + ("W", "kg", "", "ohms", "V/m")))
_text = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=12)
garbage = st.one_of(
    _numbers, _prefixed, _text, st.booleans(),
    st.sampled_from(["nan", "inf", "-inf", "1e999 V", "", " ", "NaN H", "0x10", "1_000"]),
    st.lists(st.one_of(st.integers(-5, 5), st.floats(-1.0, 1.0), _text), max_size=3),
    st.dictionaries(st.sampled_from(["time", "vf", "gain", "a"]), st.floats(-1.0, 1.0),
                    max_size=2),
    st.dates(min_value=date(1970, 1, 1), max_value=date(2100, 1, 1)),
)


@st.composite
def mutants(draw):
    """(operation, path, document) for one mutation of one bundled scenario."""
    name = draw(st.sampled_from(sorted(BASES)))
    doc = copy.deepcopy(BASES[name])
    nodes = list(_nodes(doc))
    op = draw(st.sampled_from(["drop", "add", "replace", "wrong_unit", "non_finite"]))
    note(f"base {name}, operation {op}")
    if op == "add":
        tables = [()] + [p for p, v in nodes if isinstance(v, dict)]
        where = draw(st.sampled_from(tables))
        table = doc if not where else _get_parent(doc, where + ("x",))
        path = where + (_UNKNOWN,)
        table[_UNKNOWN] = draw(garbage)
        return op, path, doc
    if op == "wrong_unit":
        quantities = [p for p, v in nodes if unit_of(v) is not None]
        path = draw(st.sampled_from(quantities))
        old = _get_parent(doc, path)[path[-1]]
        number = re.match(r"\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)", old).group(1)
        unit = draw(st.sampled_from([u for u in _UNITS if u != unit_of(old)]))
        _get_parent(doc, path)[path[-1]] = f"{number} {unit}"
        return op, path, doc
    if op == "non_finite":
        scalars = [p for p, v in nodes if not isinstance(v, (dict, list))]
        path = draw(st.sampled_from(scalars))
        _get_parent(doc, path)[path[-1]] = draw(st.sampled_from(
            [math.nan, math.inf, -math.inf]))
        return op, path, doc
    path = draw(st.sampled_from([p for p, _ in nodes]))
    parent = _get_parent(doc, path)
    if op == "drop":
        del parent[path[-1]]
    else:
        parent[path[-1]] = draw(garbage)
    return op, path, doc


# ----------------------------------------------------------------------------- loader

@LOADER_SETTINGS
@given(mutants())
def test_mutated_scenario_loads_or_names_the_key(mutant):
    op, path, doc = mutant
    note(f"{op} at {dotted(path)}")
    _, out = load_or_error(doc)
    key = dotted(path)
    compensator = _under(path, _COMPENSATOR)
    if op == "add":
        # docs/scenario-reference.md, "Error messages": an unknown key is an error naming it
        assert isinstance(out, ScenarioError) and out.key == key, out
    if op == "wrong_unit":
        # units.py: "2.2 uF" given for an inductance is an error, not a wrong number
        assert isinstance(out, ScenarioError) and out.key == key, out
    if op == "non_finite" and not compensator:
        # no scenario value may be NaN or infinite, except an infinite load
        # resistor, which the contract defines as "no resistor"
        no_resistor = path[0] == "load" and path[-1] == "resistance" and doc_value(doc, path) > 0
        if not no_resistor:
            assert isinstance(out, ScenarioError) and out.key == key, out
    if op == "drop" and len(path) == 1:
        # every top-level key and table is required
        assert isinstance(out, ScenarioError) and out.key == key, out
    if not isinstance(out, ScenarioError) and not any(
            isinstance(v, float) and math.isnan(v) for _, v in _nodes(doc)):
        # scenario_to_dict's promise: written out and read back, it is equal
        again = loads_scenario(tomli_w.dumps(scenario_to_dict(out)), source=SOURCE)
        assert again == out


@LOADER_SETTINGS
@given(name=st.sampled_from(sorted(BASES)), data=st.data())
def test_damaged_text_loads_or_names_the_place(name, data):
    """Characters inserted, deleted or the file cut short: a syntax error names
    the line; anything that still parses falls under the rules above."""
    text = tomli_w.dumps(BASES[name])
    cut = data.draw(st.integers(0, len(text)), label="position")
    how = data.draw(st.sampled_from(["insert", "delete", "truncate"]), label="how")
    if how == "insert":
        text = text[:cut] + data.draw(_text.filter(bool), label="inserted") + text[cut:]
    elif how == "delete":
        text = text[:cut] + text[cut + data.draw(st.integers(1, 8), label="n"):]
    else:
        text = text[:cut]
    try:
        loads_scenario(text, source=SOURCE)
    except ScenarioError as err:
        message = str(err)
        assert message.startswith(SOURCE) and err.key and err.key in message, message
        if err.key == "TOML syntax":
            # tomllib gives a line and column, or says the document ended early
            assert err.line is not None or "end of document" in message, message
        elif _DOTTED.fullmatch(err.key):
            check_scenario_error(err, text)


_KEYS = sorted({dotted(p) for doc in BASES.values() for p, _ in _nodes(doc)})


@LOADER_SETTINGS
@given(name=st.sampled_from(sorted(BASES)),
       key=st.one_of(st.sampled_from(_KEYS), _text, st.sampled_from(
           ["load.steps[9].time", "switching.dead_time[5]", "a..b", "[0]", "supply.voltage.x"])),
       value=st.one_of(garbage, st.none()))
def test_replace_key_returns_a_scenario_or_names_the_key(name, key, value):
    base = loads_scenario(tomli_w.dumps(BASES[name]), source=SOURCE)
    try:
        out = replace_key(base, key, value)
    except ScenarioError as err:
        # replace_key builds from a dict: there is no file text, so no line.
        # Malformed keys are pinned by test_replace_key_refuses_malformed_keys.
        assert err.key in str(err)
        if _DOTTED.fullmatch(key):
            assert _DOTTED.fullmatch(err.key), err.key
    else:
        assert isinstance(out, type(base))


@pytest.mark.parametrize("key", ["inductor.inductance[", "inductor..inductance",
                                 ".inductor.inductance", "inductor.inductance."])
def test_replace_key_refuses_malformed_keys(key):
    # replace_key's contract: "ScenarioError when the key is unknown"; a key
    # that is not a dotted path names no key of the scenario
    base = loads_scenario(tomli_w.dumps(BASES["default.toml"]), source=SOURCE)
    try:
        replace_key(base, key, 5e-6)
    except ScenarioError as err:
        assert err.key == key
    else:
        raise AssertionError(f"{key!r} accepted")


@pytest.mark.parametrize("entry, value", [("bogus", 1.0), ("gain", -5.0), ("gain", math.nan),
                                          ("gain", "3 k"), ("poles", "x")])
def test_compensator_is_checked_when_loading(entry, value):
    # docs/scenario-reference.md, "Error messages": unknown keys and non-physical
    # values are errors naming the file and the key, when the file is read (not
    # later, when the run starts)
    doc = copy.deepcopy(BASES[CLOSED_LOOP_BASE])
    doc["control"]["compensator"][entry] = value
    _, out = load_or_error(doc)
    assert isinstance(out, ScenarioError), "loaded"
    assert out.key == f"control.compensator.{entry}"


@pytest.mark.parametrize("entry, value", [("gain", math.inf), ("integrator", "false"),
                                          ("integrator", math.nan)])
def test_compensator_rejects_infinite_gain_and_odd_flags(entry, value):
    doc = copy.deepcopy(BASES[CLOSED_LOOP_BASE])
    doc["control"]["compensator"][entry] = value
    _, out = load_or_error(doc)
    assert isinstance(out, ScenarioError), "loaded"
    assert out.key == f"control.compensator.{entry}"


# ----------------------------------------------------------------------------- simulation

STRATEGIES = ("asynchronous", "forced-pwm", "diode-emulation")
SIM_SETTINGS = dict(derandomize=True, database=None, max_examples=50 * FACTOR,
                    # typical examples take 0.02-0.3 s, a stiff one (a 0.2 mohm
                    # load on 1 uF) 5-7 s on a loaded two-core machine; 60 s
                    # keeps the outcome off the machine's speed and still fails a hang
                    deadline=timedelta(seconds=60),
                    suppress_health_check=[HealthCheck.too_slow])


def _log_uniform(lo, hi):
    return st.floats(math.log10(lo), math.log10(hi)).map(lambda e: 10.0 ** e)


def _ohms(hi=0.1):
    return st.one_of(st.just(0.0), st.floats(0.0, hi))


@st.composite
def designs(draw, loads=("resistor", "sink", "both"), strategies=STRATEGIES):
    """Keyword arguments of reference_sim.buck_scenario for one legal design."""
    fs = draw(_log_uniform(1e4, 1e7), label="frequency")
    T = 1.0 / fs
    duty = draw(st.floats(0.01, 0.99), label="duty")
    vin = draw(_log_uniform(1.0, 100.0), label="vin")
    kind = draw(st.sampled_from(loads), label="load")
    amps = draw(_log_uniform(1e-3, 500.0), label="load current")
    share = 0.5 if kind == "both" else 1.0
    # size the resistor for the wanted current at the ideal output D Vin
    resistance = duty * vin / (share * amps) if kind in ("resistor", "both") else None
    current = share * amps if kind in ("sink", "both") else 0.0
    cycles = draw(st.integers(20, 200), label="cycles")
    return dict(
        vin=vin, duty=duty, frequency=fs, strategy=draw(st.sampled_from(strategies)),
        inductance=draw(_log_uniform(1e-8, 1e-2)), capacitance=draw(_log_uniform(1e-6, 1e-2)),
        dcr=draw(_ohms()), esr=draw(_ohms()), rs=draw(_ohms()),
        rds_hs=draw(_log_uniform(1e-3, 0.1)), rds_ls=draw(_log_uniform(1e-3, 0.1)),
        vf_hs=draw(st.floats(0.0, 1.0)), r_hs=draw(_ohms()),
        vf_ls=draw(st.floats(0.0, 1.0)), r_ls=draw(_ohms()),
        resistance=resistance, current=current,
        dead_time=(draw(st.floats(0.0, 0.05)) * T, draw(st.floats(0.0, 0.05)) * T),
        cycles=cycles, summary_cycles=min(20, cycles))


@pytest.fixture(scope="module", autouse=True)
def _warm_engine():
    # load the compiled kernels once, so the per-example deadline measures runs
    for strategy in STRATEGIES:
        sc = buck_scenario(vin=12.0, duty=0.4, frequency=500e3, strategy=strategy,
                           inductance=4.7e-6, capacitance=47e-6, resistance=2.0, cycles=20)
        bucksim.simulate(sc).summary()


def run_design(kw):
    """``(run, summary dict)`` of a legal design, or None when it is refused.

    The one refusal legal ranges can meet is parts.Scenario's rule that the
    dead times fit in the off-time of a synchronous stage; it is checked in
    the same arithmetic, both ways.
    """
    note(repr(kw))
    sync = kw["strategy"] != "asynchronous"
    T = 1.0 / kw["frequency"]
    tf, tr = kw["dead_time"]
    no_fit = sync and kw["duty"] * T + tf + tr >= T
    try:
        sc = buck_scenario(**kw)
    except ScenarioError as err:
        assert no_fit and err.key == "switching.dead_time", str(err)
        return None
    assert not no_fit
    run = bucksim.simulate(sc)
    assert run.success, run.message
    assert run.t_end == pytest.approx(sc.duration, rel=1e-12)
    return run, run.summary().to_dict()


def check_laws(run, s):
    """Laws every summary obeys, whatever the design."""
    assert not _nan_paths(s)
    sc = run.scenario
    # rounding is relative to the stage's natural scales (Vin, and the
    # characteristic current Vin sqrt(C/L), circuit theory), not to a signal
    # that happens to be ~0 (an unloaded stage at rest moves ~1e-15 A)
    i_nat = sc.supply.voltage * math.sqrt(sc.output_capacitor.capacitance
                                          / sc.inductor.inductance)
    natural = {"inductor_current": i_nat, "output_voltage": sc.supply.voltage}
    for name in ("inductor_current", "output_voltage"):
        q = s[name]
        scale = max(abs(q["min"]), abs(q["max"]), natural[name])
        assert q["min"] - 1e-12 * scale <= q["mean"] <= q["max"] + 1e-12 * scale, (name, q)
        assert q["ripple"] == pytest.approx(q["max"] - q["min"], rel=1e-12, abs=1e-300)
    dev = s["devices"]
    power_scale = max(abs(s["power"]["input"]), abs(s["power"]["output"]),
                      sum(abs(d["conduction_loss"]) for d in dev.values()),
                      1e-6 * sc.supply.voltage * i_nat)
    for name, d in dev.items():
        # Cauchy-Schwarz: mean square >= mean^2 for any waveform. Compared as
        # squares: the integral of i^2 carries rounding of ~1e-16 i_nat^2, which
        # the square root of an RMS near zero would magnify to ~1e-8 i_nat
        assert d["rms"] ** 2 >= d["mean"] ** 2 * (1 - 1e-9) - 1e-12 * i_nat ** 2, name
        # passive sign convention: resistances and forward drops only dissipate
        assert d["conduction_loss"] >= -ENERGY_TOL * power_scale, (name, d)
    # docs/summary-reference.md (loss items): the low side is the freewheel diode
    # itself in the asynchronous stage
    sync = run.scenario.switching.strategy != "asynchronous"
    assert ("low_side_body_diode" in dev) == sync
    assert {"high_side", "high_side_body_diode", "low_side", "inductor",
            "output_capacitor"} <= set(dev)


def check_energy(s):
    assert s["energy_balance_error"] < ENERGY_TOL, s["energy_balance_error"]


def check_extrema(run, s):
    """The reported extrema are the waveform's: no sample lies outside them."""
    w = s["window"]
    sc = run.scenario
    # rounding is relative to the stage's natural scales, as in check_laws: an
    # unloaded stage idling at vC = Vin holds iL ~ 1e-14 A of rounding, which
    # evaluation at other instants reproduces only to ~1e-14 A
    natural = {"inductor_current": sc.supply.voltage * math.sqrt(
                   sc.output_capacitor.capacitance / sc.inductor.inductance),
               "output_voltage": sc.supply.voltage}
    times = np.linspace(w["start"], w["stop"], 2001)
    for name, signal in (("inductor_current", "iL"), ("output_voltage", "vo")):
        q = s[name]
        seen = run.at(times, signal)
        scale = max(abs(q["min"]), abs(q["max"]), float(np.abs(seen).max()), natural[name])
        assert seen.min() >= q["min"] - 1e-9 * scale, (name, float(seen.min()), q)
        assert seen.max() <= q["max"] + 1e-9 * scale, (name, float(seen.max()), q)


def check_design(kw):
    out = run_design(kw)
    if out is not None:
        check_laws(*out)
        check_energy(out[1])


# Stages far from their equilibrium: a sub-milliohm load behind 10 mH settles
# over seconds, so moments taken about the equilibrium cancelled terms of the
# equilibrium's size (555 A against a 50 mA ripple) and read as an energy
# balance of 1.8e-9 and a capacitor RMS below its mean. Moments about each
# segment's start hold both these and the resting designs below.
_FAR_FROM_EQUILIBRIUM = [
    dict(vin=1.0, duty=duty, frequency=10000.0, strategy="asynchronous", inductance=0.01,
         capacitance=1e-05, dcr=0.0, esr=0.0, rs=0.0, rds_hs=0.001, rds_ls=0.1, vf_hs=0.0,
         r_hs=0.0, vf_ls=0.0, r_ls=0.0, resistance=resistance, current=0.0,
         dead_time=(0.0, 0.0), cycles=20, summary_cycles=20)
    for duty, resistance in ((0.25, 0.0007905694150420947), (0.5, 0.0015811388300841895))]


@settings(**SIM_SETTINGS)
@given(designs())
@example(_FAR_FROM_EQUILIBRIUM[0])
@example(_FAR_FROM_EQUILIBRIUM[1])
def test_legal_designs_with_a_load_run_clean(kw):
    check_design(kw)


@settings(**SIM_SETTINGS)
@given(designs(loads=("none",), strategies=("forced-pwm",)))
def test_legal_forced_pwm_designs_without_load_run_clean(kw):
    check_design(kw)


# Designs that once broke a law, kept so every machine runs them. Each is an
# unloaded stage resting at vC ~ Vin with a nanohenry inductor: the moments
# of z = [iL, vC, 1] cancelled terms of size (Vin/R)^2 d and read as a
# negative loss, an RMS of tens of microamperes or a mean outside the
# extrema (fixed by taking the moments about each system's equilibrium).
_RESTING_ASYNC = dict(
    vin=73.50492503885206, duty=0.9229780136044919, frequency=10000.0, strategy="asynchronous",
    inductance=1e-08, capacitance=1.374375899968422e-06, dcr=0.07845600674934841, esr=0.0,
    rs=0.0, rds_hs=0.004162545689107423, rds_ls=0.036345197496967525,
    vf_hs=1.1125369292536007e-308, r_hs=0.0, vf_ls=1.0775619007836077e-224, r_ls=0.0,
    resistance=None, current=0.0, dead_time=(3.959155064459372e-06, 2.4163359191873984e-06),
    cycles=170, summary_cycles=20)
_RESTING_EMULATION = dict(
    vin=28.140165465235285, duty=0.8992172823552878, frequency=183363.90605257044,
    strategy="diode-emulation", inductance=1e-08, capacitance=3.808151119882806e-05, dcr=0.0,
    esr=0.0, rs=0.08822911440124998, rds_hs=0.004843137662821886,
    rds_ls=0.06244870803862621, vf_hs=0.059621987862769746, r_hs=0.08822911440124998,
    vf_ls=0.024932122302566403, r_ls=0.0, resistance=None, current=0.0,
    dead_time=(6.938406413834393e-08, 6.938406413834393e-08), cycles=143, summary_cycles=20)


@settings(**SIM_SETTINGS)
@given(designs(loads=("none",), strategies=("asynchronous", "diode-emulation")))
@example(_RESTING_ASYNC)
@example(_RESTING_EMULATION)
def test_legal_blocking_designs_without_load_run_clean(kw):
    check_design(kw)


@settings(**SIM_SETTINGS)
@given(designs(loads=("resistor", "sink", "both", "none")))
@example(_RESTING_ASYNC)
def test_legal_designs_report_the_extrema_of_their_waveforms(kw):
    out = run_design(kw)
    if out is not None:
        check_laws(*out)
        check_extrema(*out)
