"""Scenario files: SI-prefixed quantities, loading, errors, round trip, replace_key.

The unit and prefix checks are against the SI prefix definitions (BIPM, The
International System of Units, 9th ed., 2019, table 7: f = 1e-15 ... G = 1e9).
The bundled scenarios are checked against textbook buck relations from
Erickson and Maksimovic, Fundamentals of Power Electronics, 3rd ed. (2020).
"""

from __future__ import annotations

import math
import pickle
from pathlib import Path

import pytest
import tomli_w

from bucksim.errors import ScenarioError
from bucksim.model.keylines import key_lines, line_of
from bucksim.model.parts import Diode, Mosfet, Scenario
from bucksim.model.scenario import (
    DEFAULT_SCENARIO_PATH,
    dump_scenario,
    load_scenario,
    loads_scenario,
    replace_key,
    scenario_to_dict,
)
from bucksim.model.units import format_si, parse_quantity

ROOT = Path(__file__).resolve().parents[2]
BUNDLED = sorted((ROOT / "scenarios").glob("*.toml")) + [DEFAULT_SCENARIO_PATH]
OPEN_LOOP = [p for p in BUNDLED if 'mode = "open-loop"' in p.read_text()]

# A complete scenario of our own (numbers invented); each error case below
# changes one line of it.
BASE = """\
schema = 1
title = "test rail"

[supply]
voltage = "12 V"
resistance = "10 mohm"
steps = [
    { time = "1 ms", voltage = "10 V" },
    { time = "2 ms", voltage = "13 V" },
]

[switching]
frequency = "1 MHz"
strategy = "forced-pwm"
dead_time = ["20 ns", "30 ns"]

[inductor]
inductance = "2.2 uH"
dcr = "10 mohm"
core = { k = 3.2, alpha = 1.4, beta = 2.5, volume = "0.5 cm^3", turns = 6, area = "20 mm^2" }

[output_capacitor]
capacitance = "100 uF"
esr = "2 mohm"

[high_side]
rds_on = "10 mohm"
body_diode = { vf = "0.8 V", r = "10 mohm", qrr = "5 nC" }
rise_time = "5 ns"
fall_time = "4 ns"
coss = "200 pF"
qg = "6 nC"
gate_voltage = "5 V"

[low_side]
device = "mosfet"
rds_on = "5 mohm"
body_diode = { vf = "0.7 V", r = "8 mohm", qrr = "20 nC" }

[load]
resistance = "1 ohm"
current = "0.5 A"

[[load.steps]]
time = "1.5 ms"
resistance = "2 ohm"

[[load.steps]]
time = "2.5 ms"
current = "1 A"

[control]
mode = "open-loop"
duty = 0.3
soft_start = "100 us"

[run]
cycles = 3000
start = "rest"
summary_cycles = 20
initial_current = "0 A"
initial_voltage = "0 V"
"""


def line_no(text, start):
    """1-based number of the first line of ``text`` that starts with ``start``."""
    for n, line in enumerate(text.splitlines(), 1):
        if line.startswith(start):
            return n
    raise AssertionError(f"no line starts with {start!r}")


def edit(old, new, text=BASE):
    assert text.count(old) == 1, old
    return text.replace(old, new)


def write(tmp_path, text, name="rail.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def load_error(tmp_path, text):
    path = write(tmp_path, text)
    with pytest.raises(ScenarioError) as info:
        load_scenario(path)
    return path, info.value


# --------------------------------------------------------------------------- units

@pytest.mark.parametrize("text, unit, expected", [
    ("2.2 uH", "H", 2.2e-6),
    ("500 kHz", "Hz", 500e3),
    ("20 ns", "s", 20e-9),
    ("4.7mF", "F", 4.7e-3),
    ("10 mohm", "ohm", 10e-3),
    ("10 m\u03a9", "ohm", 10e-3),      # Greek capital omega
    ("10 m\u2126", "ohm", 10e-3),      # ohm sign
    ("1.5 Mohm", "ohm", 1.5e6),
    ("1.2 V", "V", 1.2),
    ("3 nC", "C", 3e-9),
    ("0.5 A", "A", 0.5),
    ("100 uF", "F", 100e-6),
    ("100 \u00b5F", "F", 100e-6),      # micro sign
    ("100 \u03bcF", "F", 100e-6),      # Greek mu
    ("5 pF", "F", 5e-12),
    ("7 fC", "C", 7e-15),
    ("2 GHz", "Hz", 2e9),
    ("1.5e3 kHz", "Hz", 1.5e6),
    (".5 V", "V", 0.5),
    ("-3 A", "A", -3.0),
    ("  12   V ", "V", 12.0),
    ("2.2e-6", "H", 2.2e-6),           # a bare number string is SI base units
    ("1.5 cm^3", "m^3", 1.5e-6),       # the prefix is cubed with the metre
    ("50 mm^2", "m^2", 50e-6),
    ("50 mm\u00b2", "m^2", 50e-6),
    ("2 m^3", "m^3", 2.0),
    ("1.2 kW/m^3", "W/m^3", 1.2e3),
    ("inf", "ohm", math.inf),
    ("inf ohm", "ohm", math.inf),
    (12, "V", 12.0),
    (2.2e-6, "H", 2.2e-6),
    (1.4, "", 1.4),
    ("1.4", "", 1.4),
])
def test_parse_quantity(text, unit, expected):
    value = parse_quantity(text, unit, "k")
    assert type(value) is float
    assert value == expected  # exact: the decimal text is rounded once


@pytest.mark.parametrize("text, unit", [
    ("2.2 uF", "H"),       # wrong unit
    ("500 khz", "Hz"),     # unit symbols are case-sensitive (mhz would be milli)
    ("2.2 uh", "H"),
    ("2.2 u", "H"),        # prefix without unit
    ("2.2 u H", "H"),
    ("2.2 xH", "H"),       # unknown prefix
    ("5 cm", "s"),         # c only for areas and volumes
    ("5 mm^3", "m^2"),
    ("abc", "V"),
    ("", "V"),
    ("1.2.3 V", "V"),
    ("1e999 V", "V"),      # overflows the float range
    ("3 k", ""),           # no prefixes on plain numbers
    (True, "V"),
    ([1.0], "V"),
    (None, "V"),
])
def test_parse_quantity_rejects(text, unit):
    with pytest.raises(ScenarioError) as info:
        parse_quantity(text, unit, "inductor.inductance")
    err = info.value
    assert err.key == "inductor.inductance"
    assert err.value == text
    message = str(err)
    assert message.startswith("inductor.inductance: ")
    assert repr(text) in message
    if unit:
        assert f" in {unit} " in message


@pytest.mark.parametrize("value, unit, expected", [
    (2.2e-6, "H", "2.2 uH"),
    (500e3, "Hz", "500 kHz"),
    (20e-9, "s", "20 ns"),
    (10e-3, "ohm", "10 mohm"),
    (-0.5, "A", "-500 mA"),
    (3.3, "V", "3.3 V"),
    (0.0, "V", "0 V"),
    (999.96e3, "Hz", "1 MHz"),          # rounding carries into the next prefix
    (1.23456e-12, "F", "1.235 pF"),
    (1.5e-6, "m^3", "1.5 cm^3"),
    (50e-6, "m^2", "50 mm^2"),
    (math.inf, "ohm", "inf ohm"),
    (0.4567, "", "0.4567"),
])
def test_format_si(value, unit, expected):
    assert format_si(value, unit) == expected


@pytest.mark.parametrize("value", [1e-14, 3.3e-9, 4.7e-6, 0.01, 1.0, 12.0, 600e3, 2.5e9, -7.5e-3])
@pytest.mark.parametrize("unit", ["H", "Hz", "ohm", "m^3", "m^2"])
def test_format_si_reads_back(value, unit):
    assert parse_quantity(format_si(value, unit, digits=6), unit) == pytest.approx(value, rel=1e-6)


# --------------------------------------------------------------------------- key lines

def test_key_lines_tracks_tables_arrays_and_strings():
    text = '''\
a = """
[fake]
x = 1
"""
b = 'it''s'   # comment = 3
[t]
"quoted.key" = 1
dotted.inner = [
    1,   # one
    { y = 2,
      z = 3 },
]
[[arr]]
k = 1
[[arr]]
k = 2
[arr.sub]
deep = 'x'
'''
    lines = key_lines(text)
    assert lines[("a",)] == 1
    assert ("fake",) not in lines and ("x",) not in lines
    assert lines[("b",)] == 5
    assert lines[("t", "quoted.key")] == 7
    assert lines[("t", "dotted")] == lines[("t", "dotted", "inner")] == 8
    assert lines[("t", "dotted", "inner", 0)] == 9
    assert lines[("t", "dotted", "inner", 1, "z")] == 11
    assert lines[("arr", 0, "k")] == 14
    assert lines[("arr", 1)] == 15
    assert lines[("arr", 1, "k")] == 16
    assert lines[("arr", 1, "sub", "deep")] == 18
    assert line_of(lines, "t.missing") == 6          # falls back to the table header
    assert line_of(lines, "nowhere.at_all") is None


@pytest.mark.parametrize("text", ['a = 1\n[broken\n', 'a = 1\nb = "open\n',
                                  "a = 1\nc = '''x\n", "a = 1\nd = [1, 2\n", "a = 1\n= 2\n"])
def test_key_lines_on_broken_text_returns_what_it_found(text):
    assert key_lines(text)[("a",)] == 1


# --------------------------------------------------------------------------- loading

def test_base_scenario_values(tmp_path):
    s = load_scenario(write(tmp_path, BASE))
    assert isinstance(s, Scenario)
    assert s.source == str(tmp_path / "rail.toml") and s.text == BASE
    assert s.supply.voltage == 12.0 and s.supply.resistance == 10e-3
    assert [(st.time, st.voltage) for st in s.supply.steps] == [(1e-3, 10.0), (2e-3, 13.0)]
    assert s.switching.frequency == 1e6 and s.switching.dead_time == (20e-9, 30e-9)
    assert s.inductor.inductance == 2.2e-6 and s.inductor.core.volume == 0.5e-6
    assert s.inductor.core.area == 20e-6
    assert s.output_capacitor.capacitance == 100e-6
    assert s.high_side.body_diode == Diode(vf=0.8, r=10e-3, qrr=5e-9)
    assert s.high_side.coss == 200e-12 and s.high_side.qg == 6e-9
    assert isinstance(s.low_side, Mosfet) and s.low_side.rds_on == 5e-3
    assert s.low_side.rise_time == 0.0 and s.low_side.body_diode.qrr == 20e-9
    assert s.load.resistance == 1.0 and s.load.current == 0.5
    assert [(st.time, st.resistance, st.current) for st in s.load.steps] == [
        (1.5e-3, 2.0, None), (2.5e-3, None, 1.0)]
    assert s.control.duty == 0.3 and s.control.soft_start == 100e-6
    assert s.run.cycles == 3000 and s.run.summary_cycles == 20


def test_defaults_of_optional_keys():
    text = edit('resistance = "10 mohm"\nsteps = [\n    { time = "1 ms", voltage = "10 V" },\n'
                '    { time = "2 ms", voltage = "13 V" },\n]\n', "")
    text = edit('dead_time = ["20 ns", "30 ns"]\n', "", text)
    text = edit('resistance = "1 ohm"\ncurrent = "0.5 A"\n', "", text)
    text = edit("[run]\ncycles = 3000\nstart = \"rest\"\nsummary_cycles = 20\n",
                '[run]\nduration = "3 ms"\n', text)
    text = edit('mode = "open-loop"\n', "", text)
    s = loads_scenario(text)
    assert s.supply.resistance == 0.0 and s.supply.steps == ()
    assert s.switching.dead_time == (0.0, 0.0)
    assert s.load.resistance is None and s.load.current == 0.0
    assert s.control.mode == "open-loop"
    assert s.run.duration == 3e-3 and s.run.cycles is None and s.run.summary_cycles == 20
    assert s.run.start == "rest"


def test_open_load_and_asynchronous_stage():
    text = edit('resistance = "1 ohm"', 'resistance = "inf"')
    text = edit('strategy = "forced-pwm"', 'strategy = "asynchronous"', text)
    text = edit('device = "mosfet"\nrds_on = "5 mohm"\n'
                'body_diode = { vf = "0.7 V", r = "8 mohm", qrr = "20 nC" }',
                'device = "diode"\nvf = "0.45 V"\nr = "20 mohm"', text)
    s = loads_scenario(text)
    assert s.load.resistance == math.inf
    assert s.low_side == Diode(vf=0.45, r=20e-3, qrr=0.0)


@pytest.mark.parametrize("path", BUNDLED, ids=lambda p: p.name)
def test_bundled_scenarios_load_and_round_trip(path, tmp_path):
    s = load_scenario(path)
    assert s.title and s.source == str(path)
    assert s.text.lstrip().startswith("#")          # each starts with its comment header
    assert "invented for demonstration" in s.text
    # an input filter's demo averages over whole periods of the filter's resonance
    assert s.run.summary_cycles == 20 or s.input_filter is not None
    if s.control.mode == "open-loop":   # closed-loop demos are timed by their events
        assert 2000 <= s.n_cycles <= 4000
    out = tmp_path / "again.toml"
    dump_scenario(s, out)
    again = load_scenario(out)
    assert again == s
    assert scenario_to_dict(again) == scenario_to_dict(s)


def test_round_trip_of_a_scenario_using_every_key(tmp_path):
    s = loads_scenario(BASE)
    d = scenario_to_dict(s)
    # Plain numbers in SI base units, no strings left for quantities.
    assert d["inductor"]["inductance"] == 2.2e-6
    assert d["switching"]["dead_time"] == [20e-9, 30e-9]
    assert d["load"]["steps"] == [{"time": 1.5e-3, "resistance": 2.0},
                                  {"time": 2.5e-3, "current": 1.0}]
    assert loads_scenario(tomli_w.dumps(d)) == s
    dump_scenario(s, tmp_path / "out.toml")
    assert load_scenario(tmp_path / "out.toml") == s


def test_round_trip_keeps_closed_loop_settings_and_open_load():
    text = edit('mode = "open-loop"\nduty = 0.3\n',
                'mode = "voltage-mode"\nreference = "3.3 V"\nslope_compensation = "50 kV/s"\n'
                'compensator = { kind = "type-3", gain = 1.5, zeros = [1e3, 2e3],'
                ' poles = [5e4] }\n')
    text = edit('resistance = "1 ohm"', "resistance = inf", text)
    s = loads_scenario(text)
    assert s.control.duty is None and s.control.reference == 3.3
    assert s.control.slope_compensation == 50e3
    assert s.control.compensator == {"kind": "type-3", "gain": 1.5, "zeros": [1e3, 2e3],
                                     "poles": [5e4]}
    again = loads_scenario(tomli_w.dumps(scenario_to_dict(s)))
    assert again == s and again.load.resistance == math.inf


# Erickson & Maksimovic (2020), ch. 5: DCM when K = 2 L / (R Ts) < Kcrit = 1 - D,
# and the DCM conversion ratio M = 2 / (1 + sqrt(1 + 4 K / D^2)). In CCM the
# ideal ratio is M = D (ch. 2); the bundled duties are raised above Vo/Vin
# for the losses, by less than 15 %.
@pytest.mark.parametrize("name, strategy, vout, dcm", [
    ("core_rail_1v0.toml", "forced-pwm", 1.0, False),
    ("sensor_rail_3v3_battery.toml", "diode-emulation", 3.3, True),
    ("aux_rail_5v_async.toml", "asynchronous", 5.0, False),
    ("meter_rail_5v_async_ring.toml", "asynchronous", 5.0, True),
    ("default.toml", "forced-pwm", 3.3, False),
])
def test_bundled_scenarios_operate_as_described(name, strategy, vout, dcm):
    path = next(p for p in BUNDLED if p.name == name)
    s = load_scenario(path)
    assert s.switching.strategy == strategy
    vin, duty, fs = s.supply.voltage, s.control.duty, s.switching.frequency
    _, g, i_sink = s.load.levels()[-1]
    r_equiv = vout / (g * vout + i_sink)                      # final load as a resistor
    k = 2 * s.inductor.inductance * fs / r_equiv
    assert (k < 1 - duty) == dcm
    ideal = vin * (2 / (1 + math.sqrt(1 + 4 * k / duty**2)) if dcm else duty)
    assert vout < ideal < 1.15 * vout


# Settling within the run: the envelope of the LC filter decays at least as
# fast as alpha = 1/(2 R C) + (DCR + ESR)/(2 L) (series RLC with a load,
# circuit theory; switch resistances only add damping). In DCM the stage has
# a single low-frequency pole wp = (2 - M) / ((1 - M) R C) (Erickson &
# Maksimovic 2020, ch. 15, DCM buck small-signal model; quoted from memory).
# Five time constants must pass after the last load step.
@pytest.mark.parametrize("path", OPEN_LOOP, ids=lambda p: p.name)
def test_bundled_scenarios_settle_before_the_summary_window(path):
    s = load_scenario(path)
    L, C = s.inductor.inductance, s.output_capacitor.capacitance
    t_last, g, _ = s.load.levels()[-1]
    duty = s.control.duty
    k = 2 * L * s.switching.frequency * g if g else math.inf
    if s.switching.strategy != "forced-pwm" and k < 1 - duty:
        m = 2 / (1 + math.sqrt(1 + 4 * k / duty**2))
        rate = (2 - m) / ((1 - m) / g * C)
    else:
        rate = g / (2 * C) + (s.inductor.dcr + s.output_capacitor.esr) / (2 * L)
    settled = max(t_last, s.control.soft_start) + 5 / rate
    assert settled < s.duration - s.run.summary_cycles * s.period


# --------------------------------------------------------------------------- errors

def test_unknown_key(tmp_path):
    text = edit('inductance = "2.2 uH"', 'inductence = "2.2 uH"')
    path, err = load_error(tmp_path, text)
    msg = str(err)
    assert msg.startswith(f"{path}:{line_no(text, 'inductence')}: inductor.inductence: ")
    assert "is not a known key" in msg and "inductance, dcr, core" in msg
    assert msg.endswith("got '2.2 uH'")


def test_unknown_key_at_top_level_and_in_inline_table(tmp_path):
    text = edit("title =", "colour = 3\ntitle =")
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:2: colour: is not a known key (allowed in the top level")
    text = edit('vf = "0.8 V", r', 'vf = "0.8 V", rr')
    path, err = load_error(tmp_path, text)
    n = line_no(text, 'body_diode = { vf = "0.8')
    assert str(err).startswith(f"{path}:{n}: high_side.body_diode.rr: is not a known key")


def test_unknown_key_for_the_low_side_device(tmp_path):
    text = edit('device = "mosfet"\nrds_on = "5 mohm"\n'
                'body_diode = { vf = "0.7 V", r = "8 mohm", qrr = "20 nC" }',
                'device = "diode"\nrds_on = "5 mohm"\nvf = "0.5 V"')
    path, err = load_error(tmp_path, text)
    msg = str(err)
    n = line_no(text, 'rds_on = "5 mohm')
    assert msg.startswith(f"{path}:{n}: low_side.rds_on: ")
    assert "device = 'diode'" in msg and "vf, r, qrr" in msg


def test_missing_key(tmp_path):
    text = edit('inductance = "2.2 uH"\n', "")
    path, err = load_error(tmp_path, text)
    assert str(err) == (f"{path}:{line_no(text, '[inductor]')}: inductor.inductance: "
                        "is required (in H, e.g. '2.2 uH')")
    assert err.key == "inductor.inductance" and err.line == line_no(text, "[inductor]")


def test_missing_table_and_missing_low_side(tmp_path):
    text = edit('[output_capacitor]\ncapacitance = "100 uF"\nesr = "2 mohm"\n', "")
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}: output_capacitor: is required: add a "
                               "[output_capacitor] table")
    text = edit('strategy = "forced-pwm"', 'strategy = "asynchronous"')
    text = text[: text.index("[low_side]")] + text[text.index("[load]"):]
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}: low_side: is required")
    text = edit('device = "mosfet"\n', "")
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, '[low_side]')}: low_side.device: "
                               "is required")


def test_wrong_unit(tmp_path):
    text = edit('inductance = "2.2 uH"', 'inductance = "2.2 uF"')
    path, err = load_error(tmp_path, text)
    assert str(err) == (f"{path}:{line_no(text, 'inductance')}: inductor.inductance: must be a "
                        "quantity in H (a number, or a string such as '2.2 uH'), got '2.2 uF'")


def test_wrong_unit_inside_arrays(tmp_path):
    text = edit('dead_time = ["20 ns", "30 ns"]', 'dead_time = ["20 ns", "30 nH"]')
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, 'dead_time')}: switching.dead_time[1]: ")
    assert str(err).endswith("got '30 nH'")
    text = edit('{ time = "2 ms", voltage = "13 V" }', '{ time = "2 ms", voltage = "13 A" }')
    path, err = load_error(tmp_path, text)
    n = line_no(text, '    { time = "2 ms"')
    assert str(err).startswith(f"{path}:{n}: supply.steps[1].voltage: must be a quantity in V")


def test_wrong_type(tmp_path):
    text = edit('title = "test rail"', "title = 42")
    path, err = load_error(tmp_path, text)
    assert str(err) == f"{path}:2: title: must be a string, got 42"
    text = edit("cycles = 3000", "cycles = 3000.5")
    path, err = load_error(tmp_path, text)
    assert str(err) == (f"{path}:{line_no(text, 'cycles')}: run.cycles: "
                        "must be an integer, got 3000.5")
    text = edit('dcr = "10 mohm"', "dcr = true")
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, 'dcr')}: inductor.dcr: must be a quantity")
    text = edit('dead_time = ["20 ns", "30 ns"]', 'dead_time = "20 ns"')
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, 'dead_time')}: switching.dead_time: "
                               "must be [falling, rising]")


@pytest.mark.parametrize("old, new, key, got", [
    ('inductance = "2.2 uH"', 'inductance = "-2.2 uH"', "inductor.inductance",
     "must be > 0 H, got -2.2e-06"),
    ('capacitance = "100 uF"', "capacitance = 0", "output_capacitor.capacitance",
     "must be > 0 F, got 0.0"),
    ('frequency = "1 MHz"', 'frequency = "-1 MHz"', "switching.frequency",
     "must be > 0 Hz, got -1000000.0"),
    ('voltage = "12 V"', 'voltage = "0 V"', "supply.voltage", "must be > 0 V, got 0.0"),
    ('esr = "2 mohm"', 'esr = "-2 mohm"', "output_capacitor.esr", "must be >= 0 ohm, got -0.002"),
    ('rds_on = "10 mohm"', "rds_on = 0", "high_side.rds_on", "must be > 0 ohm, got 0.0"),
    ('resistance = "1 ohm"', 'resistance = "-1 ohm"', "load.resistance",
     "must be > 0 ohm, got -1.0"),
    ('volume = "0.5 cm^3"', "volume = 0", "inductor.core.volume", "must be > 0 m^3, got 0.0"),
])
def test_non_positive_value(tmp_path, old, new, key, got):
    text = edit(old, new)
    path, err = load_error(tmp_path, text)
    # core = { ... } is an inline table: its keys are placed on the line of "core".
    line = line_no(text, "core =" if key.startswith("inductor.core") else new)
    assert str(err) == f"{path}:{line}: {key}: {got}"


def test_non_physical_value_in_a_body_diode(tmp_path):
    text = edit('{ vf = "0.7 V", r = "8 mohm"', '{ vf = "-0.7 V", r = "8 mohm"')
    path, err = load_error(tmp_path, text)
    n = line_no(text, 'body_diode = { vf = "-0.7')
    assert str(err) == f"{path}:{n}: low_side.body_diode.vf: must be >= 0 V, got -0.7"


def test_step_times_out_of_order_locate_the_step(tmp_path):
    text = edit('time = "2.5 ms"', 'time = "1 ms"')
    path, err = load_error(tmp_path, text)
    n = line_no(text, 'time = "1 ms"')
    assert str(err) == (f"{path}:{n}: load.steps[1].time: "
                        "must be later than the previous step, got 0.001")


def test_a_step_at_the_end_of_the_run_is_warned_about(tmp_path):
    # 3000 cycles of 1 us end at 3 ms: a step there never happens. It is
    # valid, so a warning naming the file and the key, not an error.
    path = write(tmp_path, edit('time = "2.5 ms"', 'time = "3 ms"'))
    with pytest.warns(UserWarning) as caught:
        s = load_scenario(path)
    assert s.load.steps[1].time == 3e-3
    assert [str(w.message) for w in caught] == [
        f"{path}: load.steps[1].time: the step at 3 ms is at or after the end of the run "
        "(3 ms), so it never happens"]


def test_dead_time_not_fitting_in_the_off_time(tmp_path):
    # T = 1 us, duty 0.9: off-time 100 ns < 60 + 50 ns.
    text = edit("duty = 0.3", "duty = 0.9")
    text = edit('dead_time = ["20 ns", "30 ns"]', 'dead_time = ["60 ns", "50 ns"]', text)
    path, err = load_error(tmp_path, text)
    msg = str(err)
    assert msg.startswith(f"{path}:{line_no(text, 'dead_time')}: switching.dead_time: "
                          "must fit in the off-time")
    assert msg.endswith("got [6e-08, 5e-08]")


def test_dead_time_not_fitting_in_the_period_in_closed_loop(tmp_path):
    text = edit("duty = 0.3", 'reference = "3.3 V"')
    text = edit('mode = "open-loop"', 'mode = "peak-current"\ncurrent_sense = "0.1 V/A"\n'
                'compensator = { gain = 1e4 }', text)
    text = edit('dead_time = ["20 ns", "30 ns"]', 'dead_time = ["0.6 us", "0.5 us"]', text)
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, 'dead_time')}: switching.dead_time: "
                               "must fit in the period")


@pytest.mark.parametrize("duty", ["1.2", "0", "-0.1", "1"])
def test_duty_outside_zero_one(tmp_path, duty):
    text = edit("duty = 0.3", f"duty = {duty}")
    path, err = load_error(tmp_path, text)
    assert str(err) == (f"{path}:{line_no(text, 'duty')}: control.duty: must be inside (0, 1), "
                        f"got {float(duty)!r}")


def test_closed_loop_needs_a_reference(tmp_path):
    text = edit('mode = "open-loop"\nduty = 0.3', 'mode = "voltage-mode"')
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, '[control]')}: control.reference: "
                               "is required in voltage-mode mode")


def test_wrong_strategy(tmp_path):
    text = edit('strategy = "forced-pwm"', 'strategy = "synchronous"')
    path, err = load_error(tmp_path, text)
    assert str(err) == (f"{path}:{line_no(text, 'strategy')}: switching.strategy: must be one of "
                        "'asynchronous', 'forced-pwm', 'diode-emulation', got 'synchronous'")


def test_device_does_not_match_strategy(tmp_path):
    text = edit('strategy = "forced-pwm"', 'strategy = "asynchronous"')
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, 'device')}: low_side.device: "
                               "must be \"diode\" for strategy 'asynchronous'")


def test_bad_or_missing_schema(tmp_path):
    text = edit("schema = 1", "schema = 2")
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:1: schema: must be 1")
    assert str(err).endswith("got 2")
    text = edit("schema = 1\n", "")
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}: schema: is required")


def test_run_needs_one_of_duration_and_cycles(tmp_path):
    text = edit("cycles = 3000", 'cycles = 3000\nduration = "3 ms"')
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, '[run]')}: run: must give exactly one")


def test_toml_syntax_error(tmp_path):
    text = edit('dcr = "10 mohm"', "dcr = = 3")
    path, err = load_error(tmp_path, text)
    assert str(err).startswith(f"{path}:{line_no(text, 'dcr')}: TOML syntax: ")
    assert "column" in str(err)
    assert err.line == line_no(text, "dcr")


def test_string_source_names_the_source():
    with pytest.raises(ScenarioError, match=r"^<string>:\d+: inductor\.inductance: must be > 0"):
        loads_scenario(edit('inductance = "2.2 uH"', "inductance = -1"))
    with pytest.raises(ScenarioError, match=r"^bench:\d+: inductor\.inductance"):
        loads_scenario(edit('inductance = "2.2 uH"', "inductance = -1"), source="bench")


def test_located_error_survives_pickling(tmp_path):
    _, err = load_error(tmp_path, edit('inductance = "2.2 uH"', "inductance = -1"))
    again = pickle.loads(pickle.dumps(err))
    assert str(again) == str(err) and again.line == err.line


# --------------------------------------------------------------------------- replace_key

def test_replace_key_returns_a_new_validated_scenario(tmp_path):
    s = load_scenario(write(tmp_path, BASE))
    t = replace_key(s, "inductor.inductance", "4.7 uH")
    assert t.inductor.inductance == 4.7e-6 and s.inductor.inductance == 2.2e-6
    assert t.source == s.source and t.text is None
    assert replace_key(t, "inductor.inductance", 2.2e-6) == s
    assert replace_key(s, "switching.dead_time[0]", "25 ns").switching.dead_time == (25e-9, 30e-9)
    assert replace_key(s, "load.steps[1].current", 2.5).load.steps[1].current == 2.5
    assert replace_key(s, "load.current", "0.2 A").load.current == 0.2
    assert replace_key(s, "load.resistance", None).load.resistance is None
    assert replace_key(s, "run.cycles", 100).n_cycles == 100
    assert replace_key(s, "inductor.core", None).inductor.core is None


@pytest.mark.parametrize("key, value, message", [
    ("inductor.inductance", -1.0, "inductor.inductance: must be > 0 H, got -1.0"),
    ("inductor.inductance", "2 uF", "inductor.inductance: must be a quantity in H"),
    ("control.duty", 1.5, "control.duty: must be inside (0, 1), got 1.5"),
    ("inductor.inductence", 1e-6, "inductor.inductence: is not a known key"),
    ("nothing", 1, "nothing: is not a known key"),
    ("load.steps[5].time", 1.0, "load.steps[5]: is not an element"),
    ("switching.strategy", "asynchronous", "low_side.device: must be \"diode\""),
])
def test_replace_key_validates(key, value, message):
    s = loads_scenario(BASE)
    with pytest.raises(ScenarioError) as info:
        replace_key(s, key, value)
    assert str(info.value).startswith(message)
