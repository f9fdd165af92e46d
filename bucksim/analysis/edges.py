"""The switch node's charge: what each closing channel or diode moves, exactly.

With node capacitance ``Cn`` the node is a state while it is open and
algebraic while a channel or a diode conducts (:mod:`bucksim.model.stage`).
Whatever conducts sets the node's voltage, and the charge ``Cn dv`` that this
takes flows through the conducting path: at once when a channel closes on
the node at another voltage (a jump from ``v_a`` to ``v_b``), and
continuously as the path's drop ``R iL`` changes while it conducts. For a
path whose far end sits at the source voltage ``V_p`` (``Vin`` behind the
high side, ground behind the low side) the energy that the path dissipates
while the node moves from ``v_a`` to ``v_b`` is

.. math::

    E = V_p C_n (v_b - v_a) - \\tfrac12 C_n (v_b^2 - v_a^2),

the source's work less the change of the stored energy [1]_. A channel
closing on a node at rest at ``v_a = 0`` with ``V_p = Vin``, ``v_b = Vin``
gives the familiar ``0.5 Cn Vin^2``; a node that a negative current swung up
to ``v_a`` costs ``0.5 Cn (Vin - v_a)^2``, and none when it reached the
high-side clamp (full ZVS). The high-side source delivers ``Vin Cn (v_b -
v_a)`` with it. The engine stores the node voltage at the end of every
segment in the state ``vn`` (the cycle loop keeps it so), so a segment's
``x0[vn]`` is the node voltage just before it, and ``v_b`` at its end is the
next segment's ``x0[vn]``.

With a voltage-dependent capacitance (a ``coss`` table,
:mod:`bucksim.model.capacitance`) the same work-less-stored-energy reads
``E = integral_{v_a}^{v_b} (V_p - v) Cn(v) dv``, computed band by band: the
low side's ``coss`` charged from 0 to ``Vin`` costs ``Qoss Vin - Eoss``, the
high side's own discharge its ``Eoss`` (common practice).

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 4 (the energy lost when a switch charges a
   capacitance from a voltage source).
"""

from __future__ import annotations

import numpy as np

from bucksim.analysis.edges_input import jump_energies
from bucksim.analysis.moments import SegmentMoments
from bucksim.analysis.windows import window_pieces
from bucksim.model.stage import HIGH, HIGH_DIODE, LOW, LOW_DIODE, N_CONDUCTION

#: The switch each conducting state's path belongs to (its charge's energy is booked there).
PATH_DEVICE = {HIGH: "high_side", HIGH_DIODE: "high_side", LOW: "low_side",
               LOW_DIODE: "low_side"}


def _clipped(run, t_start: float, t_stop: float | None):
    """Window pieces of ``[t_start, t_stop]`` with the state at each piece's end."""
    seg = run.segments
    idx, tau_a, tau_b, z_a = window_pieces(run, t_start)
    if t_stop is not None:
        end = seg.t0[idx] + tau_b
        tau_b = np.where(end > t_stop, t_stop - seg.t0[idx], tau_b)
        keep = tau_b > tau_a
        idx, tau_a, tau_b, z_a = idx[keep], tau_a[keep], tau_b[keep], z_a[keep]
    return idx, tau_a, tau_b, z_a


def node_transfers(run, t_start: float, t_stop: float | None = None) -> dict:
    """Energy of the node charge moved by each conducting piece of ``[t_start, t_stop]``.

    Parameters
    ----------
    run : bucksim.Run
    t_start, t_stop : float
        Window [s]; ``t_stop`` defaults to the end of the run.

    Returns
    -------
    dict
        Arrays over the conducting pieces: ``index`` (segment), ``t`` [s],
        ``conduction``, ``v_from`` and ``v_to`` [V] (the node just before the
        piece and at its end), ``loss`` [J] (dissipated in the path, see the
        module notes), ``supply`` [J] (delivered by the input source: high-side
        paths only); and ``high_side`` and ``low_side`` [J], the losses summed
        per switch. All empty or zero without node capacitance.
    """
    stage = run.stage
    empty = np.zeros(0)
    out = {"index": np.zeros(0, int), "t": empty, "conduction": np.zeros(0, int),
           "v_from": empty, "v_to": empty, "loss": empty, "supply": empty,
           "high_side": 0.0, "low_side": 0.0}
    if not stage.node:
        return out
    seg = run.segments
    idx, tau_a, tau_b, z_a = _clipped(run, t_start, t_stop)
    cond = seg.conduction[idx]
    live = np.isin(cond, list(PATH_DEVICE))
    idx, tau_a, tau_b, z_a, cond = idx[live], tau_a[live], tau_b[live], z_a[live], cond[live]
    vsw = run.signal_table("vsw")
    iv = stage.i_node
    rows = vsw[seg.system[idx]]
    # the node before the piece: the stored value at a segment's start, else the node row
    v_from = np.where(tau_a > 0, np.einsum("ij,ij->i", rows, z_a), z_a[:, iv])
    full = tau_b >= seg.dt[idx]
    nxt = np.minimum(idx + 1, len(seg) - 1)
    v_to = np.where(idx + 1 < len(seg), seg.x0[nxt, iv], run.x_end[iv])
    if np.any(~full):
        z_b = run.augmented_at(seg.t0[idx[~full]] + tau_b[~full])[0]
        v_to[~full] = np.einsum("ij,ij->i", rows[~full], z_b)
    level = seg.system[idx] // (N_CONDUCTION * stage.n_modes * stage.n_bands)
    if stage.net is None:
        vin = np.array([lev.vin for lev in stage.levels])[level]
    else:   # the cell's voltage as the piece starts (the input capacitor's side)
        vin = np.einsum("ij,ij->i", run.signal_table("vin")[seg.system[idx]], z_a)
    high = np.isin(cond, (HIGH, HIGH_DIODE))
    v_path = np.where(high, vin, 0.0)
    # the charge moved through the closing branch, and the energy it leaves there:
    # integral (V_path - v) Cn(v) dv (Cn (v_b - v_a)(V_path - (v_a + v_b)/2) when linear)
    # with an input network the closing high side's jump is the network's
    # (edges_input); the drift after it is booked here, from the node after the jump
    jumps = jump_energies(run, idx, tau_a, z_a, cond)
    start = np.where(jumps["jump"], jumps["v_b"], v_from)
    loss = np.zeros(len(idx))
    charge = np.zeros(len(idx))
    for lv, curve in enumerate(stage.curves):
        k = level == lv
        charge[k] = curve.charge(start[k], v_to[k])
        loss[k] = curve.transfer_loss(start[k], v_to[k], v_path[k])
    loss += jumps["loss"]
    out.update(index=idx, t=seg.t0[idx] + tau_a, conduction=cond, v_from=v_from, v_to=v_to,
               loss=loss, supply=np.where(high, vin * charge, 0.0) + jumps["supply"],
               high_side=float(np.sum(loss[high])), low_side=float(np.sum(loss[~high])))
    return out


def node_voltage_at(run, t: float) -> float:
    """The node voltage [V] the node capacitance holds at ``t``, before any jump at ``t``.

    The stored ``vn`` where the node is open or a segment starts at ``t``;
    the conducting state's node voltage inside a segment. 0 without node
    capacitance.
    """
    stage = run.stage
    if not stage.node:
        return 0.0
    seg = run.segments
    if t >= run.t_end:
        return float(run.x_end[stage.i_node])
    k = int(np.searchsorted(seg.t0, t, side="right") - 1)
    k = max(k, 0)
    if t <= seg.t0[k] or seg.conduction[k] not in PATH_DEVICE:
        z = run.augmented_at([t])[0][0] if t > seg.t0[k] else np.append(seg.x0[k], 1.0)
        return float(z[stage.i_node])
    z = run.augmented_at([t])[0][0]
    return float(run.signal_table("vsw")[seg.system[k]] @ z)


def supply_energy(run, t_start: float, t_stop: float | None = None) -> float:
    """Energy [J] the ideal input source delivers over ``[t_start, t_stop]``.

    ``int vin iin dt`` over the pieces (exact moments), plus the node charge
    that the high side draws from the source (:func:`node_transfers`).
    Formula energies (switching overlap, recovery, gate, core) are not in it.
    """
    seg = run.segments
    idx, tau_a, tau_b, z_a = _clipped(run, t_start, t_stop)
    keep = run.stage.plant_index
    mom = SegmentMoments(run.table.matrices[:, keep][:, :, keep])
    c_vin = run.signal_table("vin")[:, keep]
    c_iin = run.signal_table("iin")[:, keep]
    total = 0.0
    for s, z0, d in zip(seg.system[idx], z_a[:, keep], tau_b - tau_a, strict=True):
        if not np.any(c_iin[s]):
            continue
        S = mom.second(s, z0, d)
        total += float(c_vin[s] @ S @ c_iin[s])
    return total + float(np.sum(node_transfers(run, t_start, t_stop)["supply"]))


def snubbed_turn_off(v, i, t_fall: float, cn: float, rn: float = 0.0):
    """Turn-off energy [J] of a channel whose current falls linearly over ``t_fall`` [s]
    while the node capacitance ``cn`` [F] takes the rest, up to the swing ``v`` [V].

    Parameters
    ----------
    v : array_like
        Voltage the node must swing [V] (the supply voltage for the high side).
    i : array_like
        Current at the instant the channel starts to turn off [A] (``<= 0``: no loss).
    t_fall, cn : float
        The channel's fall time [s] and the node capacitance [F] (0: ``0.5 v i t_fall``).
    rn : float, optional
        The node capacitance's series resistance [ohm]: the capacitance's current
        ``I t / t_f`` drops ``rn I t / t_f`` across it, which the channel holds too.

    Notes
    -----
    With ``i_ch = I (1 - t / t_f)`` the capacitance carries ``I t / t_f``, so the
    channel's voltage is ``I t^2 / (2 Cn t_f)`` until it reaches ``V`` at
    ``t_v = sqrt(2 Cn V t_f / I)``; from then the opposite diode clamps it at
    ``V``. The channel dissipates ``int v i_ch dt`` (derived):

    .. math::

        E = \\frac{I^2}{2 C_n t_f}\\left(\\frac{t_1^3}{3} - \\frac{t_1^4}{4 t_f}\\right)
            + \\frac{V I (t_f - t_1)^2}{2 t_f}, \\qquad t_1 = \\min(t_v, t_f),

    plus ``rn I^2 (t_1^2 / (2 t_f) - t_1^3 / (3 t_f^2))`` from the series resistance
    (``rn I^2 t_f / 6`` when the swing outlasts the ramp; derived alike). That
    is ``I^2 t_f^2 / (24 C_n)`` below ``I = 2 C_n V / t_f`` (the node does not
    finish its swing within ``t_f``: the capacitance snubs the edge) and tends to
    ``0.5 V I t_f`` far above it. It is the closed form of the circuit's own ramp
    (:mod:`bucksim.model.stage_ramps`) with ``iL`` held over the edge; the loss
    budget and the crosscheck's closed-form side use it.
    """
    v = np.asarray(v, dtype=float)
    i = np.maximum(np.asarray(i, dtype=float), 0.0)
    if t_fall <= 0.0:
        return np.zeros(np.broadcast(v, i).shape)
    if cn <= 0.0:
        return 0.5 * v * i * t_fall
    with np.errstate(divide="ignore", invalid="ignore"):
        tv = np.sqrt(2.0 * cn * v * t_fall / np.where(i > 0, i, 1.0))
    t1 = np.where(i > 0, np.minimum(tv, t_fall), t_fall)
    e1 = i * i / (2.0 * cn * t_fall) * (t1 ** 3 / 3.0 - t1 ** 4 / (4.0 * t_fall))
    e2 = v * i * (t_fall - t1) ** 2 / (2.0 * t_fall)
    e3 = rn * i * i * (t1 * t1 / (2.0 * t_fall) - t1 ** 3 / (3.0 * t_fall * t_fall))
    return np.where(i > 0, e1 + e2 + e3, 0.0)
