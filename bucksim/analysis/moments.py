r"""Exact first and second moments of a linear segment, ``int z dt`` and ``int z z^T dt``.

Within a segment of system ``M = [[A, b], [0, 0]]`` the augmented state
``z = [x, 1]`` follows ``z(t) = expm(M t) z0``. The moments are taken about
the segment's start: ``x = x0 + y`` with ``y(0) = 0`` and ``y' = A y + f0``,
``f0 = A x0 + b`` the state's derivative at the start. With ``v = [y, f]``
(``f' = 0``, ``f(0) = f0``), ``v' = N v`` for ``N = [[A, I], [0, 0]]``, so
``v(t) = expm(N t) [0, f0]`` is linear in ``f0``, and

.. math::

    \int_0^d x\,dt = x_0 d + Y_1, \qquad
    \int_0^d x x^T dt = x_0 x_0^T d + x_0 Y_1^T + Y_1 x_0^T + Y_2,

where ``Y_1 = [G_N(d) v_0]_y`` and ``Y_2 = [X]_{yy}``, with ``G_N = int_0^d
expm(N t) dt`` and ``X = int_0^d expm(N t) v_0 v_0^T expm(N^T t) dt`` (linear in
``v_0 v_0^T``: summed over the segments of one system and length), both by scaling
and squaring on the integrals themselves (:mod:`bucksim.analysis.drift_integrals`;
Van Loan's block exponential [1]_ of the Kronecker sum gives the same, at
``O(k^6)``).

Why about the start: the moments of ``z`` itself come from one block
exponential of ``M (+) M`` that couples the constant drive (``Vin / L`` with
a nanohenry inductor is ~1e9 A/s) into every product. An unloaded stage
resting at ``vC = Vin`` then got its ``int iL^2`` as a difference of terms
of size ``(Vin/R)^2 d``, whose rounding read as an RMS of tens of
microamperes, a negative loss or a mean outside the extrema. Taken about the
equilibrium instead, a stage far from it (a 0.8 mohm load behind 10 mH
settles over seconds) cancels terms of the equilibrium's size. About the
start, every term beyond ``x0`` is homogeneous in ``f0``: it is as large as
the state's own excursion within the segment, a stage at rest (``f0 = 0``)
reports its state exactly, and no system needs an invertible ``A``.

References
----------
.. [1] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Automatic Control 23(3), 395-404, 1978.
"""

from __future__ import annotations

import numpy as np

from bucksim.analysis.drift_integrals import drift_integrals

#: Groups of one system and length whose blocks are held at once (bounded memory).
_GROUPS_AT_ONCE = 4096


class SegmentMoments:
    """Memoised exact moments of segments of the systems ``matrices`` (shape ``(n_sys, m, m)``)."""

    def __init__(self, matrices: np.ndarray):
        self.matrices = matrices
        self.m = matrices.shape[1]
        self.n = self.m - 1
        self._first: dict[tuple[int, float], np.ndarray] = {}
        self._A = np.ascontiguousarray(matrices[:, :-1, :-1])
        #: groups of one system and length in the last :meth:`second_sums`
        self.last_groups = 0

    def _start(self, s, z0):
        """``(x0, f0)`` of a segment of system ``s`` starting at ``z0``: its state and
        derivative there."""
        return z0[:-1], self.matrices[s, :-1, :] @ z0

    def _g(self, s: int, d: float) -> np.ndarray:
        """The first moment's block ``H = [G_N(d)]_{yf}`` of system ``s`` (memoised):
        ``Y_1 = H f0``."""
        key = (s, d)
        H = self._first.get(key)
        if H is None:
            H = self._blocks(np.array([s]), np.array([d]), None)[0][0]
            self._first[key] = H
        return H

    def _blocks(self, systems, lengths, Qfs):
        """``(H, X_yy)`` of each group ``(systems[g], lengths[g])`` with ``Qfs[g]`` (zero
        when None): :func:`~bucksim.analysis.drift_integrals.drift_integrals`."""
        n, n_g = self.n, systems.shape[0]
        if Qfs is None:
            Qfs = np.zeros((n_g, n, n))
        H, X = np.empty((n_g, n, n)), np.empty((n_g, n, n))
        drift_integrals(self._A, np.ascontiguousarray(systems, dtype=np.int64),
                        np.ascontiguousarray(lengths, dtype=float),
                        np.ascontiguousarray(Qfs, dtype=float), H, X)
        return H, X

    def first(self, s: int, z0: np.ndarray, d: float) -> np.ndarray:
        """``int_0^d z dt`` over a segment of system ``s`` starting at ``z0`` (ends in 1)."""
        s, d = int(s), float(d)
        x0, f0 = self._start(s, z0)
        out = np.empty(self.m)
        out[:-1] = x0 * d + self._g(s, d) @ f0
        out[-1] = d
        return out

    def second_sums(self, systems, z0s, lengths, n_systems: int,
                    time_scale: float = 0.0) -> np.ndarray:
        """``sum int z z^T dt`` per system over many segments at once: ``S[s]`` sums
        :meth:`second` over the segments of system ``s`` (``systems``, start states
        ``z0s`` as rows, ``lengths`` [s]); shape ``(n_systems, m, m)``.

        Segments of one system and length share their blocks, so each such group
        is one batched product; a periodic window of ``N`` periods has as many
        groups as one period has segments. Lengths within 4 spacings of doubles at
        ``time_scale`` [s] (the window's absolute time, whose rounding every
        segment's length carries) count as one: the blocks are taken at the group's
        first length, the terms linear in the length at each segment's own.
        """
        S = np.zeros((n_systems, self.m, self.m))
        systems = np.asarray(systems, dtype=np.int64)
        lengths = np.asarray(lengths, dtype=float)
        z0s = np.asarray(z0s, dtype=float)
        if systems.shape[0] == 0:
            return S
        # lengths binned by the tolerance: two in one bin are the same length
        tol = 4.0 * np.spacing(max(abs(time_scale), float(np.max(np.abs(lengths)))))
        bins = np.floor(lengths / tol)
        order = np.lexsort((lengths, bins, systems))
        s_o, d_o, b_o = systems[order], lengths[order], bins[order]
        new = np.ones(order.shape[0], dtype=bool)
        new[1:] = (s_o[1:] != s_o[:-1]) | (b_o[1:] != b_o[:-1])
        bounds = np.append(np.flatnonzero(new), order.shape[0])
        starts = bounds[:-1]
        self.last_groups = starts.shape[0]
        for first in range(0, starts.shape[0], _GROUPS_AT_ONCE):
            self._add_groups(S, order, bounds[first:first + _GROUPS_AT_ONCE + 1], s_o, d_o,
                             z0s, lengths)
        return S

    def _add_groups(self, S, order, bounds, s_o, d_o, z0s, lengths):
        """Add to ``S`` the groups ``bounds[u]:bounds[u + 1]`` of the sorted segments."""
        n = self.n
        starts = bounds[:-1]
        # a group's integral is linear in sum v0 v0^T, v0 = [0, f0] (f0 = each
        # segment's derivative at its start)
        Qfs = np.empty((starts.shape[0], n, n))
        for u in range(starts.shape[0]):
            f0 = z0s[order[bounds[u]:bounds[u + 1]]] @ self.matrices[s_o[bounds[u]], :-1].T
            Qfs[u] = f0.T @ f0
        H, X = self._blocks(s_o[starts], d_o[starts], Qfs)
        for u in range(starts.shape[0]):
            sel = order[bounds[u]:bounds[u + 1]]
            s = int(s_o[bounds[u]])
            dd = lengths[sel]
            z = z0s[sel]
            x0 = z[:, :-1]
            y1 = (z @ self.matrices[s, :-1].T) @ H[u].T
            xd = x0 * dd[:, None]
            ix = xd.sum(axis=0) + y1.sum(axis=0)
            xy = x0.T @ y1
            out = S[s]
            out[:-1, :-1] += x0.T @ xd + xy + xy.T + X[u]
            out[:-1, -1] += ix
            out[-1, :-1] += ix
            out[-1, -1] += dd.sum()

    def second(self, s: int, z0: np.ndarray, d: float) -> np.ndarray:
        """``int_0^d z z^T dt`` over a segment of system ``s`` starting at ``z0``."""
        s, d = int(s), float(d)
        m = self.m
        x0, f0 = self._start(s, z0)
        H, X = self._blocks(np.array([s]), np.array([d]), np.outer(f0, f0)[None])
        y1 = H[0] @ f0
        y2 = X[0]
        ix = x0 * d + y1
        out = np.empty((m, m))
        out[:-1, :-1] = d * np.outer(x0, x0) + np.outer(x0, y1) + np.outer(y1, x0) + y2
        out[:-1, -1] = ix
        out[-1, :-1] = ix
        out[-1, -1] = d
        return out
