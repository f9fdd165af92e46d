"""States and signals inside stored segments, by (segment, offset) rather than by time."""

from __future__ import annotations

import numpy as np


def segment_states(run, seg_idx, tau) -> np.ndarray:
    """Augmented states ``z = [iL, vC, ..., 1]`` at offsets inside segments.

    Parameters
    ----------
    run : Run
        A run with its segments and transition table.
    seg_idx : array_like of int
        Segment of each point.
    tau : array_like of float
        Offset [s] of each point from its segment's start, in ``[0, dt]``
        (at ``dt`` the left limit: the state the segment ends on).

    Returns
    -------
    ndarray, shape (len(tau), n + 1)

    Notes
    -----
    ``z(t0 + tau) = e^{M_s tau} z0`` for the segment's system ``s`` and start
    state ``z0``, from the run's transition table (exact to rounding:
    :func:`bucksim.engine.kernels.evaluate`). By (segment, offset), not by
    absolute time: locating a time could hand a node of a very short segment
    to its neighbour.
    """
    from bucksim.engine.kernels import evaluate  # numba: loaded on first use

    seg_idx = np.ascontiguousarray(seg_idx, dtype=np.int64)
    tau = np.ascontiguousarray(tau, dtype=float)
    seg, tbl = run.segments, run.table
    z = np.empty((tau.shape[0], tbl.matrices.shape[1]))
    evaluate(tbl.matrices, tbl.exponentials, tbl.steps, seg.system, seg.x0, seg_idx, tau, z)
    return z


def segment_values(run, signal: str, seg_idx, tau) -> np.ndarray:
    """``signal`` at offsets ``tau`` [s] inside segments ``seg_idx`` (left limits at ends)."""
    seg_idx = np.asarray(seg_idx, dtype=np.int64)
    z = segment_states(run, seg_idx, tau)
    c = run.signal_table(signal)[run.segments.system[seg_idx]]
    return np.einsum("ij,ij->i", c, z)
