"""Refusals of the light-load modes, and their two pattern helpers against brute force.

Every bad input is a ScenarioError (a ValueError) whose message names the key;
a scenario read from a file is also named by file and line. Nothing here runs
a steady state: each refusal comes before any simulation.
"""

from __future__ import annotations

import dataclasses
import itertools
import math

import pytest

import bucksim
from bucksim.errors import ScenarioError
from bucksim.model import parts as p
from bucksim.studies.light_modes import pfm_steady_state
from bucksim.studies.pulse_skipping import (
    canonical_pattern,
    pattern_period,
    pulse_skipping_steady_state,
)
from tests.references.stage_solver import buck_scenario


def stage(strategy="diode-emulation", current=0.05, resistance=None):
    return buck_scenario(vin=12.0, duty=0.3, frequency=1e6, strategy=strategy,
                         inductance=4.7e-6, capacitance=22e-6, current=current,
                         resistance=resistance)


def refused(fn, key, *args, **kw):
    with pytest.raises(ScenarioError) as info:
        fn(*args, **kw)
    assert info.value.key == key
    assert key in str(info.value)
    return info.value


@pytest.mark.parametrize("fn, kw", [(pfm_steady_state, {"peak_current": 0.5}),
                                    (pulse_skipping_steady_state, {"min_on_time": 1e-7})])
def test_forced_pwm_is_refused_with_file_and_line(fn, kw):
    sc = bucksim.load_scenario("scenarios/core_rail_1v0.toml")
    err = refused(fn, "switching.strategy", sc, threshold=1.0, **kw)
    assert "core_rail_1v0.toml:" in str(err) and err.line is not None
    assert "never idles" in str(err)


@pytest.mark.parametrize("value", [-0.1, 0.0, math.nan, math.inf, "0.5 A", True])
def test_peak_current_must_be_a_positive_number(value):
    refused(pfm_steady_state, "peak_current", stage(), peak_current=value, threshold=3.3)


@pytest.mark.parametrize("value", [-1e-7, 0.0, math.nan])
def test_on_time_must_be_a_positive_number(value):
    refused(pfm_steady_state, "on_time", stage(), on_time=value, threshold=3.3)


def test_exactly_one_of_peak_current_and_on_time():
    err = refused(pfm_steady_state, "peak_current", stage(), threshold=3.3)
    assert "exactly one" in str(err)
    refused(pfm_steady_state, "peak_current", stage(), peak_current=0.5, on_time=1e-7,
            threshold=3.3)


@pytest.mark.parametrize("value", [12.0, 15.0, -1.0, 0.0, math.nan])
def test_threshold_must_lie_below_the_supply(value):
    refused(pfm_steady_state, "threshold", stage(), peak_current=0.5, threshold=value)
    refused(pulse_skipping_steady_state, "threshold", stage(), min_on_time=1e-7,
            threshold=value)


def test_a_load_that_draws_nothing_is_refused():
    err = refused(pfm_steady_state, "load", stage(current=0.0), on_time=1e-7, threshold=3.3)
    assert "never falls" in str(err)
    refused(pulse_skipping_steady_state, "load", stage(current=0.0), min_on_time=1e-7,
            threshold=3.3)


def test_min_on_time_is_needed_and_must_fit_the_clock_period():
    refused(pulse_skipping_steady_state, "control.min_on_time", stage(), threshold=3.3)
    err = refused(pulse_skipping_steady_state, "min_on_time", stage(), min_on_time=1e-6,
                  threshold=3.3)
    assert "fit in the clock period" in str(err)
    refused(pulse_skipping_steady_state, "min_on_time", stage(), min_on_time=-1e-7,
            threshold=3.3)


def test_min_on_time_defaults_to_the_scenario_control():
    sc = stage()
    # without a minimum on-time in the scenario or the call there is no pulse to skip with
    refused(pulse_skipping_steady_state, "control.min_on_time", sc, threshold=3.3)
    # one that does not fit the period is refused where the scenario is built
    with pytest.raises(ScenarioError, match="control.min_on_time"):
        dataclasses.replace(sc, control=p.Control(mode="open-loop", duty=0.3,
                                                  min_on_time=2e-6))


@pytest.mark.parametrize("key, value", [("max_periods", 0), ("block", 2.5),
                                        ("block", True)])
def test_block_settings_must_be_whole_numbers(key, value):
    refused(pulse_skipping_steady_state, key, stage(), min_on_time=1e-7, threshold=3.3,
            **{key: value})


@pytest.mark.parametrize("fn", [pfm_steady_state, pulse_skipping_steady_state])
def test_a_file_name_is_not_a_scenario(fn):
    with pytest.raises(TypeError, match="load_scenario"):
        fn("scenarios/radio_rail_3v3_light_load.toml")


# ----------------------------------------------------------------------------- pattern helpers

def all_patterns(max_len):
    for n in range(1, max_len + 1):
        yield from itertools.product((0, 1), repeat=n)


def test_canonical_pattern_is_the_largest_rotation():
    """Against the definition, on every 0/1 sequence up to 10 long."""
    for seq in all_patterns(10):
        best = max(seq[i:] + seq[:i] for i in range(len(seq)))
        assert canonical_pattern(seq) == best, seq


def test_pattern_period_is_the_smallest_shift_that_repeats():
    """Against the definition (smallest K with s[k] = s[k - K], repeated at least twice)."""
    for seq in all_patterns(11):
        n = len(seq)
        shifts = [k for k in range(1, n // 2 + 1)
                  if all(seq[i] == seq[i - k] for i in range(k, n))]
        want = shifts[0] if shifts else None
        # a smaller shift over the whole sequence that is longer than n // 2 means none
        whole = next(k for k in range(1, n + 1) if all(seq[i] == seq[i - k]
                                                       for i in range(k, n)))
        assert pattern_period(seq) == (whole if whole <= n // 2 else None) == want, seq
