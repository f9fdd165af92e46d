"""Scenario files (TOML, schema 1) to :class:`~bucksim.model.parts.Scenario` and back.

A scenario file describes one buck power stage, its load, its controller and
the run. Values are SI base units as plain numbers, or strings with an SI
prefix and the unit (``"2.2 uH"``, ``"500 kHz"``; see :mod:`bucksim.model.units`)::

    schema = 1
    title = "..."
    [supply]            voltage, resistance = 0, inductance = 0, steps = [{time, voltage}, ...]
    [input_capacitor]   capacitance, esr = 0, banks = [{capacitance, esr}, ...]   (optional)
    [input_filter]      inductance, dcr = 0, damping = {resistance, capacitance},
                        parallel_resistance                                    (optional)
    [switching]         frequency, strategy, dead_time = [falling, rising], node_resistance
    [inductor]          inductance, dcr = 0, core = {k, alpha, beta, volume, turns, area}
    [output_capacitor]  capacitance, esr = 0
    [high_side]         rds_on, body_diode = {vf, r, qrr, tau, qrr_current}, rise_time,
                        fall_time, coss (F, or [[V, F], ...]), qg, gate_voltage (else 0),
                        gate_resistance = {internal, external}
    [controller]        quiescent_current, driver_supply, bias_voltage, driver_resistance
                        (optional)
    [low_side]          device = "mosfet" (as [high_side]) | "diode" (the diode keys, cj)
    [load]              resistance (absent or inf: none), current = 0,
                        steps = [{time, resistance?, current?}, ...]
    [control]           mode = "open-loop", duty, soft_start = 0, reference,
                        compensator (table), slope_compensation = 0
    [run]               duration | cycles, start, summary_cycles, initial_current, initial_voltage

Rejected input raises :class:`~bucksim.errors.ScenarioError` (file, line, key, expected, value)::

    rail.toml:12: inductor.inductance: must be > 0 H, got -2.2e-06
"""

from __future__ import annotations

import copy
import re
import tomllib
from pathlib import Path

import tomli_w

from bucksim.errors import ScenarioError
from bucksim.model import parts
from bucksim.model.capacitance import as_plain, is_positive, read_capacitance
from bucksim.model.drive_tables import (
    CONTROLLER_KEYS,
    controller_dict,
    gate_resistance_dict,
    read_controller,
    read_gate_resistance,
)
from bucksim.model.input_tables import (
    INPUT_CAPACITOR_KEYS,
    INPUT_FILTER_KEYS,
    input_side_dict,
    read_input_capacitor,
    read_input_filter,
)
from bucksim.model.keylines import (
    key_lines,
    line_of,
    parse_key_path,
    toml_error,
    warn_steps_after_end,
)
from bucksim.model.toml_table import REQUIRED as _REQUIRED
from bucksim.model.toml_table import Table as _Table
from bucksim.model.units import parse_quantity

SCHEMA = 1

#: A dotted key as written in a file: ``name(.name|[index])*``.
_KEY_SYNTAX = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(?:\.[A-Za-z_][A-Za-z0-9_]*|\[[0-9]+\])*")

#: The scenario that ``bucksim run`` uses when given no file.
DEFAULT_SCENARIO_PATH = Path(__file__).resolve().parents[1] / "data" / "default.toml"

TOP_KEYS = ("schema", "title", "supply", "switching", "inductor", "output_capacitor",
            "high_side", "low_side", "load", "control", "run", "input_capacitor",
            "input_filter", "controller")
SUPPLY_KEYS = ("voltage", "resistance", "steps", "inductance")
SUPPLY_STEP_KEYS = ("time", "voltage")
SWITCHING_KEYS = ("frequency", "strategy", "dead_time", "node_resistance")
INDUCTOR_KEYS = ("inductance", "dcr", "core")
CORE_KEYS = ("k", "alpha", "beta", "volume", "turns", "area")
CAPACITOR_KEYS = ("capacitance", "esr")
DIODE_KEYS = ("vf", "r", "qrr", "cj", "tau", "qrr_current")
MOSFET_KEYS = ("rds_on", "body_diode", "rise_time", "fall_time", "coss", "qg", "gate_voltage",
               "gate_resistance")
LOW_SIDE_DEVICES = ("mosfet", "diode")
#: ``profile`` (load levels with their share of time) is read by
#: ``bucksim compare`` from the file itself; it does not change a run.
LOAD_KEYS = ("resistance", "current", "steps", "profile")
PROFILE_KEYS = ("level", "share")
LOAD_STEP_KEYS = ("time", "resistance", "current")
CONTROL_KEYS = ("mode", "duty", "soft_start", "reference", "compensator", "slope_compensation",
                "sense_gain", "ramp", "current_sense", "current_limit", "max_duty",
                "min_on_time", "pulse_skipping", "pfm_peak_current", "delay", "duty_bits",
                "implementation")
RUN_KEYS = ("duration", "cycles", "start", "summary_cycles", "initial_current",
            "initial_voltage")



# ----------------------------------------------------------------------------- reading

def load_scenario(path):
    """Read a scenario file.

    Parameters
    ----------
    path : str or os.PathLike
        TOML file, schema 1.

    Returns
    -------
    Scenario
        With ``source`` set to ``str(path)`` and ``text`` to the file's text.

    Raises
    ------
    ScenarioError
        On a syntax error or any rejected value; the message names the file
        and, where it can be located, the line.
    """
    with open(path, "rb") as f:
        data = f.read()
    source = str(path)
    try:
        text = data.decode("utf-8-sig")  # tolerate a byte-order mark
    except UnicodeDecodeError as exc:
        raise ScenarioError("(file)", f"must be UTF-8 text ({exc.reason} at byte {exc.start})",
                            file=source) from None
    return loads_scenario(text, source=source)


def loads_scenario(text, source="<string>"):
    """Read a scenario from TOML text; ``source`` names it in error messages."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise toml_error(exc, text, source) from None
    try:
        scenario = _build(doc, source, text)
    except ScenarioError as err:
        raise err.located(source, line_of(key_lines(text), err.key)) from None
    warn_steps_after_end(scenario)
    return scenario


def _build(doc, source=None, text=None):
    """Scenario from a parsed TOML document (``dict``)."""
    top = _Table(doc, "", TOP_KEYS)
    schema = top._get("schema", _REQUIRED, f"schema = {SCHEMA}")
    if isinstance(schema, bool) or not isinstance(schema, int) or schema != SCHEMA:
        raise ScenarioError("schema", f"must be {SCHEMA} (the scenario schema this version "
                            "of bucksim reads)", schema)
    switching = _switching(top.table("switching", SWITCHING_KEYS, required=True))
    return parts.Scenario(
        title=top.string("title"),
        supply=_supply(top.table("supply", SUPPLY_KEYS, required=True)),
        switching=switching,
        inductor=_inductor(top.table("inductor", INDUCTOR_KEYS, required=True)),
        output_capacitor=_capacitor(top.table("output_capacitor", CAPACITOR_KEYS,
                                              required=True)),
        high_side=_mosfet(top.table("high_side", MOSFET_KEYS, required=True)),
        low_side=_low_side(top),
        load=_load(top.table("load", LOAD_KEYS, required=True)),
        control=_control(top.table("control", CONTROL_KEYS, required=True)),
        run=_run(top.table("run", RUN_KEYS, required=True)),
        input_capacitor=read_input_capacitor(top.table("input_capacitor",
                                                       INPUT_CAPACITOR_KEYS)),
        input_filter=read_input_filter(top.table("input_filter", INPUT_FILTER_KEYS)),
        controller=read_controller(top.table("controller", CONTROLLER_KEYS)),
        source=source,
        text=text,
    )


def _supply(t):
    steps = tuple(parts.SupplyStep(time=s.quantity("time", "s"), voltage=s.quantity("voltage", "V"))
                  for s in t.tables("steps", SUPPLY_STEP_KEYS))
    return parts.Supply(voltage=t.quantity("voltage", "V"),
                        resistance=t.quantity("resistance", "ohm", 0.0), steps=steps,
                        inductance=t.quantity("inductance", "H", 0.0))


def _switching(t):
    dead_time = t.data.get("dead_time", [0.0, 0.0])
    if not isinstance(dead_time, list) or len(dead_time) != 2:
        raise ScenarioError("switching.dead_time", "must be [falling, rising] in s, "
                            "e.g. [\"20 ns\", \"30 ns\"]", dead_time)
    dead_time = tuple(parse_quantity(v, "s", f"switching.dead_time[{i}]")
                      for i, v in enumerate(dead_time))
    return parts.Switching(frequency=t.quantity("frequency", "Hz"),
                           strategy=t.string("strategy"), dead_time=dead_time,
                           node_resistance=t.quantity("node_resistance", "ohm", 0.0))


def _inductor(t):
    core = t.table("core", CORE_KEYS)
    if core is not None:
        core = parts.CoreLoss(k=core.quantity("k", "W/m^3"), alpha=core.quantity("alpha", ""),
                              beta=core.quantity("beta", ""), volume=core.quantity("volume", "m^3"),
                              turns=core.quantity("turns", ""), area=core.quantity("area", "m^2"))
    return parts.Inductor(inductance=t.quantity("inductance", "H"),
                          dcr=t.quantity("dcr", "ohm", 0.0), core=core)


def _capacitor(t):
    return parts.Capacitor(t.quantity("capacitance", "F"), t.quantity("esr", "ohm", 0.0))


def _diode(t):
    extra = {k: t.quantity(k, u, 0.0) for k, u in (("tau", "s"), ("qrr_current", "A"))}
    extra["cj"] = read_capacitance(t, "cj")
    return parts.Diode(vf=t.quantity("vf", "V"), r=t.quantity("r", "ohm", 0.0),
                       qrr=t.quantity("qrr", "C", 0.0), section=t.key, **extra)


def _mosfet(t):
    body = t.table("body_diode", DIODE_KEYS, required=True)
    return parts.Mosfet(rds_on=t.quantity("rds_on", "ohm"), body_diode=_diode(body),
                        rise_time=t.quantity("rise_time", "s", 0.0),
                        fall_time=t.quantity("fall_time", "s", 0.0),
                        coss=read_capacitance(t, "coss"), qg=t.quantity("qg", "C", 0.0),
                        gate_voltage=t.quantity("gate_voltage", "V", 0.0),
                        gate_resistance=read_gate_resistance(t), section=t.key)


def _low_side(top):
    data = top.data.get("low_side")
    if data is None:
        raise ScenarioError("low_side", "is required: add a [low_side] table with "
                            "device = \"mosfet\" (synchronous strategies) or "
                            "device = \"diode\" (asynchronous)")
    if not isinstance(data, dict):
        raise ScenarioError("low_side", "must be a table with device = \"mosfet\" or "
                            "\"diode\"", data)
    if "device" not in data:
        raise ScenarioError("low_side.device", "is required: \"mosfet\" or \"diode\"")
    device = data["device"]
    if device not in LOW_SIDE_DEVICES:
        raise ScenarioError("low_side.device", "must be one of 'mosfet', 'diode'", device)
    keys = ("device",) + (MOSFET_KEYS if device == "mosfet" else DIODE_KEYS)
    t = _Table(data, "low_side", keys, f"[low_side] with device = {device!r}")
    return _mosfet(t) if device == "mosfet" else _diode(t)


def _load(t):
    # the profile is read by `bucksim compare`; its entries' keys are checked here, so
    # a misspelt key is refused where the file is read, with its line
    t.tables("profile", PROFILE_KEYS)
    steps = tuple(parts.LoadStep(time=s.quantity("time", "s"),
                                 resistance=s.quantity("resistance", "ohm", None),
                                 current=s.quantity("current", "A", None))
                  for s in t.tables("steps", LOAD_STEP_KEYS))
    return parts.Load(resistance=t.quantity("resistance", "ohm", None),
                      current=t.quantity("current", "A", 0.0), steps=steps)


def _control(t):
    compensator = t.data.get("compensator")
    if compensator is not None and not isinstance(compensator, dict):
        raise ScenarioError("control.compensator", "must be a table", compensator)
    return parts.Control(mode=t.string("mode", "open-loop"), duty=t.quantity("duty", "", None),
                         soft_start=t.quantity("soft_start", "s", 0.0),
                         reference=t.quantity("reference", "V", None),
                         compensator=copy.deepcopy(compensator),
                         slope_compensation=t.quantity("slope_compensation", "V/s", 0.0),
                         sense_gain=t.quantity("sense_gain", "", 1.0),
                         ramp=t.quantity("ramp", "V", 1.0),
                         current_sense=t.quantity("current_sense", "V/A", 0.0),
                         current_limit=t.quantity("current_limit", "A", None),
                         max_duty=t.quantity("max_duty", "", 0.95),
                         min_on_time=t.quantity("min_on_time", "s", 0.0),
                         pulse_skipping=t._get("pulse_skipping", False, "true or false"),
                         pfm_peak_current=t.quantity("pfm_peak_current", "A", 0.0),
                         delay=t.integer("delay", 0),
                         duty_bits=t.integer("duty_bits", 0),
                         implementation=t.string("implementation", "digital"))


def _run(t):
    return parts.RunSettings(duration=t.quantity("duration", "s", None),
                             cycles=t.integer("cycles", None),
                             start=t.string("start", "rest"),
                             summary_cycles=t.integer("summary_cycles", 20),
                             initial_current=t.quantity("initial_current", "A", 0.0),
                             initial_voltage=t.quantity("initial_voltage", "V", 0.0))


# ----------------------------------------------------------------------------- writing

def _drop_none(d):
    return {k: v for k, v in d.items() if v is not None}


def _diode_dict(d):
    extra = {k: as_plain(getattr(d, k)) for k in ("cj", "tau", "qrr_current")
             if is_positive(getattr(d, k))}
    return {"vf": d.vf, "r": d.r, "qrr": d.qrr, **extra}


def _mosfet_dict(m):
    return {"rds_on": m.rds_on, "body_diode": _diode_dict(m.body_diode),
            "rise_time": m.rise_time, "fall_time": m.fall_time, "coss": as_plain(m.coss),
            "qg": m.qg, "gate_voltage": m.gate_voltage, **gate_resistance_dict(m.gate_resistance)}


def scenario_to_dict(scenario):
    """The scenario as a TOML-ready ``dict`` of plain numbers in SI base units.

    Every value is resolved (defaults written out); keys whose value is
    ``None`` (no load resistor, no duty in closed loop, ...) and empty step
    lists are left out, as in a file. ``loads_scenario(tomli_w.dumps(d))``
    gives back an equal scenario.
    """
    s = scenario
    supply = {"voltage": s.supply.voltage, "resistance": s.supply.resistance}
    if s.supply.inductance > 0:
        supply["inductance"] = s.supply.inductance
    if s.supply.steps:
        supply["steps"] = [{"time": st.time, "voltage": st.voltage} for st in s.supply.steps]
    inductor = {"inductance": s.inductor.inductance, "dcr": s.inductor.dcr}
    if s.inductor.core is not None:
        c = s.inductor.core
        inductor["core"] = {"k": c.k, "alpha": c.alpha, "beta": c.beta, "volume": c.volume,
                            "turns": c.turns, "area": c.area}
    if isinstance(s.low_side, parts.Mosfet):
        low_side = {"device": "mosfet", **_mosfet_dict(s.low_side)}
    else:
        low_side = {"device": "diode", **_diode_dict(s.low_side)}
    load = _drop_none({"resistance": s.load.resistance, "current": s.load.current})
    if s.load.steps:
        load["steps"] = [_drop_none({"time": st.time, "resistance": st.resistance,
                                     "current": st.current}) for st in s.load.steps]
    ctl = s.control
    control = _drop_none({"mode": ctl.mode, "duty": ctl.duty, "soft_start": ctl.soft_start,
                          "reference": ctl.reference,
                          "compensator": copy.deepcopy(ctl.compensator),
                          "slope_compensation": ctl.slope_compensation,
                          # an open loop's pulse limits, where set (they shape its pulses)
                          **({k: v for k, v in (("min_on_time", ctl.min_on_time),
                                                ("pulse_skipping", ctl.pulse_skipping))
                              if v} if ctl.mode == "open-loop" else {
                              "sense_gain": ctl.sense_gain, "ramp": ctl.ramp,
                              "current_sense": ctl.current_sense,
                              "current_limit": ctl.current_limit, "max_duty": ctl.max_duty,
                              "min_on_time": ctl.min_on_time,
                              "pulse_skipping": ctl.pulse_skipping,
                              **({"pfm_peak_current": ctl.pfm_peak_current}
                                 if ctl.pfm_peak_current else {}),
                              "delay": ctl.delay,
                              "duty_bits": ctl.duty_bits,
                              "implementation": ctl.implementation})})
    r = s.run
    run = _drop_none({"duration": r.duration, "cycles": r.cycles, "start": r.start,
                      "summary_cycles": r.summary_cycles,
                      "initial_current": r.initial_current,
                      "initial_voltage": r.initial_voltage})
    return {
        "schema": SCHEMA, "title": s.title, "supply": supply,
        "switching": {"frequency": s.switching.frequency, "strategy": s.switching.strategy,
                      "dead_time": list(s.switching.dead_time),
                      "node_resistance": s.switching.node_resistance},
        "inductor": inductor,
        "output_capacitor": {"capacitance": s.output_capacitor.capacitance,
                             "esr": s.output_capacitor.esr},
        "high_side": _mosfet_dict(s.high_side),
        "low_side": low_side,
        "load": load, "control": control, "run": run, **input_side_dict(s),
        **controller_dict(s.controller),
    }


def dump_scenario(scenario, path):
    """Write ``scenario`` to ``path`` as a schema-1 TOML file (SI base units)."""
    header = (f"# bucksim scenario, schema {SCHEMA}: {scenario.title}\n"
              "# All values in SI base units (V, A, ohm, H, F, s, Hz, C).\n\n")
    with open(path, "wb") as f:
        f.write(header.encode("utf-8"))
        f.write(tomli_w.dumps(scenario_to_dict(scenario)).encode("utf-8"))


def locate_in(scenario, err):
    """``err`` (a ScenarioError) with the file and line of its key in ``scenario``'s
    source text, when the scenario was read from a file."""
    if scenario.text is None or err.line is not None:
        return err
    return err.located(scenario.source, line_of(key_lines(scenario.text), err.key))


def require_scenario(obj, what: str):
    """Return ``obj`` if it is a :class:`~bucksim.model.parts.Scenario`, else raise TypeError.

    ``what`` names the function that was called, so the message says which
    call received what (a file name, None, ...) and how to get a Scenario.
    """
    if isinstance(obj, parts.Scenario):
        return obj
    hint = ""
    if isinstance(obj, (str, Path)):
        hint = f"; to read the file, call bucksim.load_scenario({str(obj)!r}) and pass its result"
    raise TypeError(f"{what}: expected a Scenario (from bucksim.load_scenario(path) or built "
                    f"from bucksim.model.parts), got {type(obj).__name__} {obj!r:.80}{hint}")


def replace_key(scenario, key, value):
    """A new scenario with one value changed, validated like a file.

    Parameters
    ----------
    scenario : Scenario
        The scenario to start from (left unchanged).
    key : str
        Dotted key path as in a file, e.g. ``"inductor.inductance"``,
        ``"switching.dead_time[0]"``, ``"load.steps[1].current"``.
    value : object
        New value: a number in SI base units, a prefixed string (``"4.7 uH"``)
        or any TOML value. ``None`` removes the key (its default applies).

    Returns
    -------
    Scenario
        With the same ``source``; ``text`` is ``None`` (the file no longer
        describes it).

    Raises
    ------
    ScenarioError
        When the key is unknown or the new scenario is rejected.
    """
    if not isinstance(key, str):
        # the key itself is the bad value: name it (repr: 123 and "123" differ)
        raise ScenarioError(repr(key), f"is not a scenario key: keys are dotted strings "
                            f"such as 'inductor.inductance', not {type(key).__name__}")
    path = parse_key_path(key)
    if not _KEY_SYNTAX.fullmatch(key) or not path or not isinstance(path[0], str):
        raise ScenarioError(key, "must be a dotted scenario key such as "
                            "'inductor.inductance'", value)
    doc = scenario_to_dict(scenario)
    node = doc
    for n, part in enumerate(path[:-1]):
        here = key_of(path[: n + 1])
        nxt = path[n + 1]
        if isinstance(part, int):
            if not isinstance(node, list) or not 0 <= part < len(node):
                raise ScenarioError(here, "is not an element of the scenario", value)
            node = node[part]
        else:
            if not isinstance(node, dict):
                raise ScenarioError(here, "is not a table of the scenario", value)
            if part not in node:
                node[part] = [] if isinstance(nxt, int) else {}
            node = node[part]
    last = path[-1]
    if isinstance(last, int):
        if not isinstance(node, list) or not 0 <= last < len(node):
            raise ScenarioError(key, "is not an element of the scenario", value)
        node[last] = value
    elif not isinstance(node, dict):
        raise ScenarioError(key, "is not a key of the scenario", value)
    elif value is None:
        node.pop(last, None)
    else:
        node[last] = value
    return _build(doc, source=scenario.source)


def key_of(path):
    """Dotted key from a path tuple: ``("load", "steps", 1)`` -> ``"load.steps[1]"``."""
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else part)
    return out
