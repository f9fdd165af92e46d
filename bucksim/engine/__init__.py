"""The exact engine: transition tables, propagation and event location (numba kernels),
the cycle loop and its controllers, the chunked driver, status codes and size guards.

Entry points: :func:`bucksim.engine.driver.integrate` (open loop) and
:func:`bucksim.engine.controlled.integrate_closed_loop`; both return an
:class:`~bucksim.engine.driver.EngineResult`.
"""
