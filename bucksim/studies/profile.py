"""Load profiles: the share of time a rail spends at each load, and what it costs.

A profile is a list of load levels with their share of time (summing to 1),
from ``[load] profile = [{level = ..., share = ...}, ...]`` in the scenario
file or from a small TOML file (``[[level]] load = "0.3 A"``, ``share = 0.7``).
Weighted over it, each strategy gets an energy-weighted efficiency (total
output energy over total input energy) and an energy lost per day.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass

import numpy as np

from bucksim.errors import ScenarioError
from bucksim.model.parts import STRATEGY_NAMES
from bucksim.model.units import format_si
from bucksim.studies.levels import load_kind, parse_level

HOURS_PER_DAY = 24.0


@dataclass(frozen=True)
class Profile:
    """Load levels and the share of time at each (shares add up to 1)."""

    levels: tuple
    shares: tuple
    source: str = ""

    def to_dict(self) -> dict:
        return {"levels": [lv.to_dict() for lv in self.levels], "shares": list(self.shares),
                "source": self.source}


def make_profile(entries, scenario, key="profile", source="") -> Profile:
    """A :class:`Profile` from ``[(level, share), ...]`` (levels as for :func:`parse_level`).

    Raises
    ------
    ScenarioError
        Naming the entry, when a share is not in (0, 1] or the shares do not
        add up to 1 (within 1e-3; they are then normalised).
    """
    if isinstance(entries, Profile):
        return entries
    kind = load_kind(scenario)
    levels, shares = [], []
    for i, entry in enumerate(entries):
        try:
            level, share = entry
        except (TypeError, ValueError):
            raise ScenarioError(f"{key}[{i}]", "must be a (load level, share of time) pair",
                                entry) from None
        levels.append(parse_level(level, kind, f"{key}[{i}].level"))
        if (isinstance(share, bool) or not isinstance(share, (int, float))
                or not 0 < share <= 1):
            raise ScenarioError(f"{key}[{i}].share", "must be a share of time in (0, 1]",
                                share)
        shares.append(float(share))
    if not levels:
        raise ScenarioError(key, "must hold at least one level", list(entries))
    total = sum(shares)
    if abs(total - 1.0) > 1e-3:
        raise ScenarioError(key, "shares of time must add up to 1", round(total, 6))
    return Profile(tuple(levels), tuple(s / total for s in shares), source)


def _profile_entries(tables, key, load_key, file):
    if not isinstance(tables, list) or not all(isinstance(t, dict) for t in tables):
        raise ScenarioError(key, f"must be an array of tables {{{load_key} = ..., share = ...}}",
                            tables, file=file)
    out = []
    for i, t in enumerate(tables):
        unknown = set(t) - {load_key, "share"}
        if unknown:
            bad = min(unknown)
            raise ScenarioError(f"{key}[{i}].{bad}", f"is not a known key (allowed: "
                                f"{load_key}, share)", t[bad], file=file)
        for name in (load_key, "share"):
            if name not in t:
                raise ScenarioError(f"{key}[{i}].{name}", "is required", file=file)
        out.append((t[load_key], t["share"]))
    return out


def read_profile(path, scenario) -> Profile:
    """A profile file: ``[[level]]`` tables with ``load = "0.3 A"`` and ``share = 0.7``."""
    from bucksim.model.keylines import key_lines, line_of

    text = _read_text(path)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        from bucksim.model.keylines import toml_error
        raise toml_error(exc, text, str(path)) from None
    unknown = set(doc) - {"level"}
    if unknown or "level" not in doc:
        raise ScenarioError(min(unknown) if unknown else "level",
                            "a profile file holds [[level]] tables only "
                            "(load = \"0.3 A\", share = 0.7)", file=str(path))
    try:
        entries = _profile_entries(doc["level"], "level", "load", str(path))
        return make_profile(entries, scenario, "level", str(path))
    except ScenarioError as err:
        key = err.key.replace("].level", "].load")
        raise ScenarioError(key, err.expected, err.value, str(path),
                            line_of(key_lines(text), key)) from None


def _read_text(path) -> str:
    """A TOML file's text; a file that is not UTF-8 is refused naming it."""
    with open(path, "rb") as f:
        data = f.read()
    try:
        return data.decode("utf-8-sig")  # tolerate a byte-order mark
    except UnicodeDecodeError as exc:
        raise ScenarioError("(file)", f"must be UTF-8 text ({exc.reason} at byte "
                            f"{exc.start})", file=str(path)) from None


def load_scenario_and_profile(path):
    """Read a scenario file that may hold ``[load] profile = [{level, share}, ...]``.

    The scenario loader does not know the ``profile`` key, so it is taken out
    of the raw TOML here and the rest is read as usual; errors name the
    original file and line.

    Returns
    -------
    (Scenario, Profile or None)
    """
    from bucksim.model.keylines import key_lines, line_of
    from bucksim.model.scenario import load_scenario, loads_scenario

    text = _read_text(path)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return load_scenario(path), None  # the loader words the syntax error
    load = doc.get("load")
    if not isinstance(load, dict) or "profile" not in load:
        return load_scenario(path), None
    import tomli_w
    entries = load.pop("profile")
    lines = key_lines(text)
    try:
        scenario = loads_scenario(tomli_w.dumps(doc), source=str(path))
        pairs = _profile_entries(entries, "load.profile", "level", str(path))
        profile = make_profile(pairs, scenario, "load.profile", f"{path} [load] profile")
    except ScenarioError as err:
        raise ScenarioError(err.key, err.expected, err.value, str(path),
                            line_of(lines, err.key)) from None
    return dataclasses.replace(scenario, text=text), profile


@dataclass(frozen=True)
class ProfileResult:
    """Energy-weighted figures of each strategy over a :class:`Profile`.

    Attributes
    ----------
    profile : Profile
    rows : dict   strategy -> list of Row, one per profile level
    weighted_efficiency : dict   strategy -> sum(share P_out) / sum(share P_in)
    energy_lost_per_day : dict   strategy -> [Wh/day]
    best : str
    decision : str   one sentence naming the best strategy and the deciding number
    """

    profile: Profile
    rows: dict
    weighted_efficiency: dict
    energy_lost_per_day: dict
    best: str
    decision: str

    def to_dict(self) -> dict:
        return {"profile": self.profile.to_dict(),
                "rows": {s: [r.to_dict() for r in rows] for s, rows in self.rows.items()},
                "weighted_efficiency": dict(self.weighted_efficiency),
                "energy_lost_per_day_wh": dict(self.energy_lost_per_day),
                "best": self.best, "decision": self.decision}

    def table_lines(self, strategies) -> list:
        """The report's lines: the levels and shares, each strategy's weighted
        efficiency and energy lost per day, and the verdict."""
        pr = self.profile
        lines = ["load profile: " + ", ".join(
            f"{lv} {100 * sh:.0f} %" for lv, sh in zip(pr.levels, pr.shares, strict=True))]
        for s in strategies:
            if not np.isfinite(self.weighted_efficiency[s]):
                lines.append(f"  {STRATEGY_NAMES[s]:<18} not rated: a profile level failed")
                continue
            lines.append(f"  {STRATEGY_NAMES[s]:<18} weighted efficiency "
                         f"{100 * self.weighted_efficiency[s]:.2f} %   lost "
                         f"{format_si(self.energy_lost_per_day[s], 'Wh', 4)}/day")
        return lines + ["", f"best: {self.decision}"]


def _profile_result(profile, rows_by_strategy) -> ProfileResult:
    shares = np.array(profile.shares)
    eff, lost, mean_loss = {}, {}, {}
    # a strategy with a failed profile level has no weighted figure: it is not rated
    rated = [s for s, rows in rows_by_strategy.items() if all(r.error is None for r in rows)]
    for s in rows_by_strategy:
        if s not in rated:
            eff[s] = lost[s] = float("nan")
    if not rated:
        return ProfileResult(profile, rows_by_strategy, eff, lost, "",
                             "no strategy could be rated: a profile level failed for each")
    for s in rated:
        rows = rows_by_strategy[s]
        p_out = np.array([r.output_power for r in rows])
        p_in = np.array([r.input_power for r in rows])
        eff[s] = float(shares @ p_out / (shares @ p_in))
        mean_loss[s] = float(shares @ (p_in - p_out))
        lost[s] = mean_loss[s] * HOURS_PER_DAY
    ranked = sorted(rated, key=lambda s: mean_loss[s])
    best = ranked[0]
    if len(ranked) == 1:
        only = ("the only strategy compared" if len(rows_by_strategy) == 1
                else "the only strategy rated (a profile level failed for the others)")
        return ProfileResult(profile, rows_by_strategy, eff, lost, best,
                             f"{STRATEGY_NAMES[best]} is {only}")
    second = ranked[1]
    saved = [(r2.loss - r1.loss) for r1, r2 in zip(rows_by_strategy[best],
                                                    rows_by_strategy[second], strict=True)]
    k = int(np.argmax(shares * np.array(saved)))
    row = rows_by_strategy[best][k]
    decision = (f"{STRATEGY_NAMES[best]} saves {format_si(saved[k], 'W', 3)} against "
                f"{STRATEGY_NAMES[second]} at {format_si(row.load_current, 'A', 3)}, where "
                f"the rail spends {100 * shares[k]:.0f} % of its time "
                f"({format_si(lost[second] - lost[best], 'Wh', 3)}/day over the whole "
                "profile)")
    return ProfileResult(profile, rows_by_strategy, eff, lost, best, decision)


# ----------------------------------------------------------------------------- comparison
