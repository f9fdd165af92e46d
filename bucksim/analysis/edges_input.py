"""The node's charge drawn from the input network when the high side closes.

With an input capacitor the high side's channel, closing on the node at
``v_a``, takes the charge ``Q = integral_{v_a}^{v_b} Cn dv`` from the switch cell
at once: the engine changes the network's state by ``b_d Q``
(:func:`bucksim.engine.period.node_jump`, ``b_d`` the network's column of the
drawn current, :mod:`bucksim.model.input_network`), so the segment's stored
start state is the state after it. The banks give up their share of ``Q``; a
purely resistive source path gives the rest, from the ideal source. The energy
the transfer dissipates is what the sources give less what the node stores,

.. math::

    E = E_{net}(x^-) - E_{net}(x^+) + V_s Q_{src} - \\int_{v_a}^{v_b} v\\,C_n(v)\\,dv,

booked to the closing channel (the channel, the banks' ESR and the source's
resistance share it in the real spike; the limit of an instant transfer does
not say how). The node's later drift while the channel conducts (its drop and
the cell voltage move) is booked as before: drawn from the ideal source at the
cell's voltage (:func:`bucksim.analysis.edges.node_transfers`).
"""

from __future__ import annotations

import numpy as np

from bucksim.model.stage import HIGH


def _live(stage) -> bool:
    return stage.net is not None and stage.node


def jump_energies(run, idx, tau_a, z_a, cond) -> dict:
    """For the conducting pieces ``idx`` (segments, piece starts ``tau_a`` [s], start
    states ``z_a``, conduction states ``cond``): which are jumps (a high-side segment's
    start), and for each ``v_b`` [V] (the node after the jump), ``loss`` and
    ``supply`` [J] (from the ideal source). Zeros where there is no jump."""
    stage = run.stage
    n = len(idx)
    out = {"jump": np.zeros(n, bool), "v_b": np.zeros(n), "loss": np.zeros(n),
           "supply": np.zeros(n)}
    if not _live(stage) or n == 0:
        return out
    seg = run.segments
    jump = (cond == HIGH) & (tau_a == 0.0)
    z_j = z_a[jump]
    v_b = _node_after(run, idx[jump], z_j)
    v_a = z_j[:, stage.i_node]
    net, lo, hi = stage.net, stage.i_in, stage.i_in + stage.n_in
    caps = np.array([name.startswith("vc") for name in net.names])
    loss, supply = np.zeros(len(v_b)), np.zeros(len(v_b))
    levels = np.array([stage.split_id(s)[0] for s in seg.system[idx[jump]]], dtype=int)
    post = z_j[:, lo:hi]
    for level in np.unique(levels):     # one curve and supply voltage per level
        j = levels == level
        curve, vs = stage.curves[level], stage.levels[level].vin
        va, vb = v_a[j], v_b[j]
        q = np.asarray(curve.charge(va, vb), dtype=float)
        dx = np.outer(q, net.b_d)
        pre = post[j] - dx
        q_src = q + dx[:, caps] @ net.storage[caps]     # the banks' share left
        supply[j] = vs * q_src
        loss[j] = (net.stored_energy(pre) - net.stored_energy(post[j]) + supply[j]
                   - (curve.stored(vb) - curve.stored(va)))
    out["jump"][jump] = True
    out["v_b"][jump], out["loss"][jump], out["supply"][jump] = v_b, loss, supply
    return out


def _node_after(run, k, z):
    """The node voltage the closed high side holds at the starts ``z`` of segments ``k``."""
    return np.einsum("ij,ij->i", run.signal_table("vsw")[run.segments.system[k]], z)


def network_state_before(run, t: float, x: np.ndarray) -> np.ndarray:
    """``x`` (the state :meth:`bucksim.Run.at` gives at ``t``: a segment's stored start)
    with the input network as it was just before a jump at ``t``, if one happens there."""
    stage = run.stage
    if not _live(stage):
        return x
    seg = run.segments
    k = int(np.searchsorted(seg.t0, t, side="left"))
    if k >= len(seg) or seg.t0[k] != t or seg.conduction[k] != HIGH:
        return x
    z = np.append(seg.x0[k], 1.0)
    level = stage.split_id(seg.system[k])[0]
    v_b = _node_after(run, np.array([k]), z[None, :])[0]
    q = float(stage.curves[level].charge(z[stage.i_node], v_b))
    x = np.array(x, dtype=float, copy=True)
    x[stage.i_in:stage.i_in + stage.n_in] -= stage.net.b_d * q
    return x
