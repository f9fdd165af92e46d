"""bucksim's public entry points run their BLAS on one thread and restore the caller's.

Why (the small matrices, the oversubscription a threaded BLAS causes on a busy
machine): bucksim.threads; measured in benchmarks/bench_threads.py, not here.
"""

from __future__ import annotations

import dataclasses

import pytest

from bucksim import threads
from bucksim.simulation import simulate_settled
from bucksim.steady.solve import steady_state
from tests.references.stage_solver import buck_scenario


def _counts():
    return [get() for get, _ in threads._blas_controls()]


@pytest.fixture
def two_blas_threads():
    controls = threads._blas_controls()
    if not controls:
        pytest.skip("no BLAS with a thread-count entry point is loaded here")
    saved = [get() for get, _ in controls]
    for _, put in controls:
        put(2)
    yield
    for (_, put), n in zip(controls, saved, strict=True):
        put(n)


def test_entry_points_pin_blas_and_restore_the_callers_count(two_blas_threads, monkeypatch):
    seen = []
    real = steady_state.__wrapped__

    def spy(*args, **kwargs):
        seen.append(_counts())
        return real(*args, **kwargs)

    # the shooting runs inside simulate_settled's own pin: counts read there
    monkeypatch.setattr("bucksim.simulation.steady_state", spy)
    sc = buck_scenario(vin=12.0, duty=0.4, frequency=500e3, inductance=4.7e-6,
                       capacitance=47e-6, resistance=2.0, strategy="forced-pwm", cycles=1)
    assert _counts() and all(n == 2 for n in _counts())
    with threads.serial_blas():
        assert all(n == 1 for n in _counts())
    assert all(n == 2 for n in _counts())
    simulate_settled(sc).summary()
    assert seen and all(n == 1 for n in seen[0])    # pinned inside
    assert all(n == 2 for n in _counts())           # the caller's count is back


def test_results_do_not_depend_on_the_callers_blas_threads(two_blas_threads):
    sc = buck_scenario(vin=12.0, duty=0.4, frequency=500e3, inductance=4.7e-6,
                       capacitance=47e-6, resistance=2.0, strategy="diode-emulation",
                       cycles=1)
    a = simulate_settled(sc).summary().to_dict()
    for _, put in threads._blas_controls():
        put(1)
    b = simulate_settled(dataclasses.replace(sc)).summary().to_dict()
    assert a == b
