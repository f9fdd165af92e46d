"""The input network as a linear system driven by the switch cell's current.

Circuit (every part optional but the first capacitor bank)::

    Vs --Rs--Ls--+ T --[ (Lf + DCR_f) || Rp ]--+ X --+-- high side (draws i_d)
                                               |      |
                                    banks C_k + ESR_k  damping Rd + Cd
                                               |      |
    gnd ---------------------------------------+------+

``T`` is the converter's input terminals (the source side of the filter, or of
the capacitor when there is no filter: then ``T = X``), ``X`` the switch cell.
The high side draws ``i_d = iL`` from ``X`` while it (or its body diode)
conducts, nothing otherwise. States, in this order: the bank voltages
``vcin, vcin2, ...``, the series current from the source ``isrc`` (when an
inductance carries it: ``Ls > 0``, or a filter without ``Rp``, in which case
``Ls`` and ``Lf`` carry one current and join into one state), the filter
inductor's current ``ilf`` (only with ``Rp``) and the damping capacitor's voltage
``vcd``.

Equations (derived from KCL and KVL; each bank's current
``i_k = (v_X - vc_k) / ESR_k``, the damping leg's ``(v_X - vcd) / Rd``)::

    C_k vc_k' = i_k          Cd vcd' = i_damp
    KCL at X:   i_feed = i_d + sum_k i_k + i_damp
    no filter:            Ls isrc' = Vs - Rs isrc - v_X,        i_feed = isrc
                          (Ls = 0: i_feed = (Vs - v_X) / Rs)
    filter, no Rp:        (Ls + Lf) isrc' = Vs - (Rs + DCR_f) isrc - v_X
    filter with Rp:       Lf ilf' = v_T - v_X - DCR_f ilf,   i_feed = ilf + (v_T - v_X) / Rp
                          Ls isrc' = Vs - Rs isrc - v_T      (KCL at T fixes v_T)

The cell voltage ``v_X`` is algebraic: KCL at ``X`` is linear in it (a bank
without ESR fixes ``v_X = vc`` instead and its current closes KCL). So the whole
network is ``x' = A x + b_d i_d + b_s Vs`` and every voltage and current an
affine row over ``[x, Vs, i_d]``: exact inside the piecewise-linear engine.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 17 (input filter design; the converter's
   negative incremental input resistance).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class InputNetwork:
    """The input network's linear system and its output rows.

    Attributes
    ----------
    names : tuple of str
        State names, in order.
    A : ndarray (n, n)
        State matrix; ``b_d`` and ``b_s`` (n,) the columns of the drawn current
        ``i_d`` [A] and of the source voltage ``Vs`` [V].
    rows : dict
        Signal name -> row ``(n + 2,)`` over ``[x, Vs, i_d]``: ``vin`` (cell),
        ``vterm`` (terminals), ``isrc``, ``icin`` (all banks), ``icin1`` ..,
        ``ilf``, ``idamp``, ``irp`` (the parallel resistor's current).
    storage : ndarray (n,)
        ``C`` or ``L`` of each state: its stored energy is ``0.5 storage x^2``.
    losses : tuple of (device, signal, resistance [ohm])
        Every resistor of the network but the source's own.
    source_resistance : float
    """

    names: tuple
    A: np.ndarray
    b_d: np.ndarray
    b_s: np.ndarray
    rows: dict
    storage: np.ndarray
    losses: tuple
    source_resistance: float

    @property
    def n(self) -> int:
        return len(self.names)

    def rest_state(self, vs: float) -> np.ndarray:
        """The network at rest with the source at ``vs`` [V] and nothing drawn:
        capacitors at ``vs``, currents zero."""
        return np.array([vs if name.startswith("vc") else 0.0 for name in self.names])

    def stored_energy(self, x):
        """Energy [J] in the network's capacitors and inductors at state ``x`` (a float;
        one per row when ``x`` holds states as rows)."""
        x = np.asarray(x, dtype=float)
        e = 0.5 * (x * x) @ self.storage
        return float(e) if x.ndim == 1 else e


def input_network(scenario) -> InputNetwork | None:
    """The input network of ``scenario``; None without an ``[input_capacitor]``."""
    cap, filt, sup = scenario.input_capacitor, scenario.input_filter, scenario.supply
    if cap is None:
        return None
    names, storage = [], []
    for k, bank in enumerate(cap.banks):
        names.append("vcin" if k == 0 else f"vcin{k + 1}")
        storage.append(bank.capacitance)
    rp = None if filt is None else filt.parallel_resistance
    l_series = sup.inductance + (filt.inductance if filt is not None and rp is None else 0.0)
    if l_series > 0:
        names.append("isrc")
        storage.append(l_series)
    if rp is not None:
        names.append("ilf")
        storage.append(filt.inductance)
    damped = filt is not None and filt.damped_leg
    if damped:
        names.append("vcd")
        storage.append(filt.damping_capacitance)
    return _assemble(scenario, tuple(names), np.array(storage), l_series)


class _Rows:
    """Affine rows over ``[x (n), Vs, i_d, v_X]``, ``v_X`` eliminated at the end."""

    def __init__(self, names):
        self.names = names
        self.n = len(names)

    def state(self, name):
        r = np.zeros(self.n + 3)
        r[self.names.index(name)] = 1.0
        return r

    def unit(self, which):
        r = np.zeros(self.n + 3)
        r[self.n + {"vs": 0, "id": 1, "vx": 2}[which]] = 1.0
        return r


def _assemble(scenario, names, storage, l_series):
    cap, filt, sup = scenario.input_capacitor, scenario.input_filter, scenario.supply
    R = _Rows(names)
    n = R.n
    i_d, vx = R.unit("id"), R.unit("vx")
    rs = sup.resistance
    rp = None if filt is None else filt.parallel_resistance
    dcr = 0.0 if filt is None else filt.dcr
    feed, vt, isrc, irp, ilf = _feed(R, rs, sup.inductance, l_series, rp, dcr, filt)
    damp = None
    if filt is not None and filt.damped_leg:
        damp = (vx - R.state("vcd")) / filt.damping_resistance
    # KCL at the cell: feed - i_d - sum(bank currents) - damping = 0
    bank_rows, ideal = [], None
    rest = feed - i_d - (0.0 if damp is None else damp)
    for k, bank in enumerate(cap.banks):
        if bank.esr == 0.0:
            ideal = k
            bank_rows.append(None)
            continue
        row = (vx - R.state(names[k])) / bank.esr
        bank_rows.append(row)
        rest = rest - row
    if ideal is None:
        g = rest[n + 2]     # the cell's conductance to everything (> 0: a bank has ESR)
        vx_row = -rest.copy()
        vx_row[n + 2] = 0.0
        vx_row /= g
    else:
        vx_row = R.state(names[ideal])
        vx_row[n + 2] = 0.0

    def solved(row):
        out = row[:n + 2] + row[n + 2] * vx_row[:n + 2]
        return out

    if ideal is not None:
        bank_rows[ideal] = rest     # the ideal bank closes KCL
    rows = {"vin": solved(vx), "vterm": solved(vt), "isrc": solved(isrc)}
    for k, row in enumerate(bank_rows):
        rows[f"icin{k + 1}"] = solved(row)
    rows["icin"] = sum(rows[f"icin{k + 1}"] for k in range(len(cap.banks)))
    rows["ilf"] = solved(ilf) if ilf is not None else np.zeros(n + 2)
    rows["irp"] = solved(irp) if irp is not None else np.zeros(n + 2)
    rows["idamp"] = solved(damp) if damp is not None else np.zeros(n + 2)
    deriv = _derivatives(R, names, storage, rows, vt, vx, rs, rp, dcr, filt, solved)
    A = np.array([d[:n] for d in deriv]).reshape(n, n)
    b_s = np.array([d[n] for d in deriv])
    b_d = np.array([d[n + 1] for d in deriv])
    losses = [(f"input_capacitor{'' if k == 0 else f'_{k + 1}'}", f"icin{k + 1}", b.esr)
              for k, b in enumerate(cap.banks)]
    if filt is not None:
        losses.append(("input_filter", "ilf" if rp is not None else "isrc", filt.dcr))
        if rp is not None:
            losses.append(("input_filter", "irp", rp))
        if filt.damped_leg:
            losses.append(("input_filter_damping", "idamp", filt.damping_resistance))
    return InputNetwork(names, A, b_d, b_s, rows, storage, tuple(losses), rs)


def _feed(R, rs, ls, l_series, rp, dcr, filt):
    """Rows of the current fed into the cell, the terminal voltage, the source
    current, the parallel resistor's current and the filter inductor's current."""
    vs, vx = R.unit("vs"), R.unit("vx")
    if filt is None or rp is None:
        if l_series > 0:
            isrc = R.state("isrc")
        else:                                   # Ls = 0, no filter: the resistor feeds X
            isrc = (vs - vx) / rs
        if filt is None:
            vt = vx
        else:   # T sits between the source's impedance and Lf: Vs - Rs i - Ls i'
            di = (vs - (rs + dcr) * isrc - vx) / l_series
            vt = vs - rs * isrc - ls * di
        return isrc, vt, isrc, None, (isrc if filt is not None else None)
    ilf = R.state("ilf")
    if ls > 0:
        isrc = R.state("isrc")
        vt = vx + rp * (isrc - ilf)             # KCL at T
    elif rs > 0:
        # (Vs - vT) / Rs = ilf + (vT - vX) / Rp
        vt = (vs / rs - ilf + vx / rp) / (1.0 / rs + 1.0 / rp)
        isrc = (vs - vt) / rs
    else:
        vt = vs
        isrc = ilf + (vs - vx) / rp
    irp = (vt - vx) / rp
    return ilf + irp, vt, isrc, irp, ilf


def _derivatives(R, names, storage, rows, vt, vx, rs, rp, dcr, filt, solved):
    """Each state's derivative as a row over ``[x, Vs, i_d]``."""
    vs = R.unit("vs")
    out = []
    for k, name in enumerate(names):
        if name.startswith("vcin"):
            out.append(rows[f"icin{int(name[4:] or 1)}"] / storage[k])
        elif name == "vcd":
            out.append(rows["idamp"] / storage[k])
        elif name == "isrc":
            if filt is not None and rp is not None:      # Ls alone: Vs - Rs i - vT
                v = solved(vs - rs * R.state("isrc") - vt)
            else:                                        # Ls (+ Lf): Vs - (Rs + DCR) i - vX
                v = solved(vs - (rs + dcr) * R.state("isrc") - vx)
            out.append(v / storage[k])
        elif name == "ilf":
            out.append(solved(vt - vx - dcr * R.state("ilf")) / storage[k])
    return out
