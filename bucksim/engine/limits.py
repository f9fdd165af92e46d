"""Size guards: refuse work that would not fit in memory or on disk, before it starts.

A run keeps one row per segment (start time, length, conduction state,
system id and the state at its start); a run of ``n`` cycles has about
:data:`SEGMENTS_PER_CYCLE` rows a cycle. A job whose estimate exceeds what
the machine has is refused with a :class:`~bucksim.errors.ScenarioError`
naming the key that sets its size and the figure it would need, instead of
growing until the operating system ends it.
"""

from __future__ import annotations

import os
import shutil

from bucksim.errors import ScenarioError

#: Nominal segments per switching period: the high side in two pieces
#: (blanked and live), each off phase split at most once by a zero-current
#: event. A streamed or stored run holds about this many rows a cycle.
SEGMENTS_PER_CYCLE = {"asynchronous": 3, "forced-pwm": 5, "diode-emulation": 5}
#: Share of the machine's memory one job may plan to use.
MEMORY_SHARE = 0.5


def segment_row_bytes(n_states: int) -> int:
    """Bytes of one stored segment row [B]: t0, dt (float64), conduction (int8),
    system (int32) and the ``n_states`` start values (float64)."""
    return 8 + 8 + 1 + 4 + 8 * int(n_states)


def run_rows(scenario) -> int:
    """Estimated segment rows of a whole run of ``scenario``."""
    per = SEGMENTS_PER_CYCLE.get(scenario.switching.strategy, 5)
    return int(scenario.n_cycles) * per


def run_bytes(scenario, n_states: int = 2) -> int:
    """Estimated memory of a run's segment table [B] (its in-memory peak is
    about twice that while chunks are joined)."""
    return 2 * run_rows(scenario) * segment_row_bytes(n_states)


def physical_memory() -> int:
    """The machine's physical memory [B] (0 when the platform does not say)."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return 0


def memory_budget() -> int:
    """Memory one job may plan to use [B]: :data:`MEMORY_SHARE` of the machine's."""
    total = physical_memory()
    return int(MEMORY_SHARE * total) if total else 1 << 62


def format_bytes(n: float) -> str:
    """``1.5 GB`` style (decimal prefixes)."""
    for unit in ("B", "kB", "MB", "GB", "TB", "PB"):
        if abs(n) < 1000 or unit == "PB":
            return f"{n:.3g} {unit}" if unit != "B" else f"{int(n)} B"
        n /= 1000.0
    return f"{n:.3g} PB"  # pragma: no cover


def refuse_if_too_big(need: int, budget: int, key: str, value, what: str,
                      file: str | None = None, remedy: str = "") -> None:
    """Raise a ScenarioError naming ``key`` when ``need`` bytes exceed ``budget``."""
    if need <= budget:
        return
    hint = f"; {remedy}" if remedy else ""
    raise ScenarioError(key, f"{what} would need about {format_bytes(need)}, more than the "
                             f"{format_bytes(budget)} this machine allows{hint}", value,
                        file=file)


def check_run_fits(scenario, n_states: int = 2, *, stream: bool = False,
                   directory: str | None = None) -> None:
    """Refuse a run whose segment table would not fit in memory (or, streamed, on disk).

    Parameters
    ----------
    scenario : Scenario
    n_states : int
        States per segment row (2, or more for an analog loop).
    stream : bool
        The segments go to a file in ``directory`` instead of memory: the
        estimate is checked against the free disk space there.
    """
    key = "run.cycles" if scenario.run.cycles is not None else "run.duration"
    value = scenario.run.cycles if scenario.run.cycles is not None else scenario.run.duration
    rows = run_rows(scenario)
    if stream:
        need = rows * segment_row_bytes(n_states)
        try:
            free = shutil.disk_usage(directory or ".").free
        except OSError:
            return
        refuse_if_too_big(need, free, key, value, f"streaming {scenario.n_cycles} cycles",
                          scenario.source, "shorten the run")
        return
    refuse_if_too_big(run_bytes(scenario, n_states), memory_budget(), key, value,
                      f"keeping {scenario.n_cycles} cycles in memory", scenario.source,
                      "shorten the run, or stream it to a file (bucksim run --stream --out)")
