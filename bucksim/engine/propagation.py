"""Exact propagation over any interval: table digits, then the Taylor tail.

``advance(Ms, E, h, s, z, d, tmp)`` sets ``z <- expm(M_s d) z`` for any
``d >= 0`` from the table ``E[s, k] = expm(M_s h_k)``, ``h_k = T 2**-k``
(:mod:`bucksim.engine.tables`): the binary digits of ``d`` down to the
table's last step pick the entries to apply, and the remainder below it is
taken by the Taylor series of order :data:`TAYLOR_ORDER`, exact to rounding
there because the table stops at the first step with ``h ||A||_inf <= 0.05``
(first omitted term ``0.05**9 / 9! ~ 5e-18`` relative). Every factor is an
exact transition matrix, so the result is exact to rounding for any
eigenstructure. :mod:`bucksim.engine.kernels` names these too.
"""

from __future__ import annotations

from numba import njit, types

#: Order of the Taylor series for remainders below the table's last step
#: (mirrors tables.TAYLOR_ORDER; the table is built so it is exact to rounding).
TAYLOR_ORDER = 8


def plain_args(kernel):
    """Type every call of ``kernel`` from compiled code with plain argument types.

    numba compiles one copy of a kernel per argument types of its callers, and a
    caller's constants (``True``, ``5``) have literal types of their own, as has an
    ``int32`` index read from the segment table: the cycle loop's searches and
    propagation were compiled twice each (about 12 s of a 75 s cold start,
    ``benchmarks/bench_cli.py``). With literals as their plain type and every integer as
    ``int64``, numba compiles one copy and the caller converts its value; the values,
    and so the results, are the same. Python calls are typed as before (no literals).
    """
    typing = getattr(kernel, "get_call_template", None)
    if typing is None:      # NUMBA_DISABLE_JIT=1 (debugging): a plain Python function
        return kernel

    def get_call_template(args, kws):
        return typing(tuple(_plain(a) for a in args), kws)

    kernel.get_call_template = get_call_template
    return kernel


def _plain(t):
    t = types.unliteral(t)
    return types.int64 if isinstance(t, types.Integer) else t


@njit(cache=True, inline="always")
def apply(E, s, k, z, tmp):
    """z <- E[s, k] @ z (in place, via tmp)."""
    m = z.shape[0]
    if m == 3:  # the two-state stage: unrolled, ~3x faster than the loop
        z0, z1, z2 = z[0], z[1], z[2]
        z[0] = E[s, k, 0, 0] * z0 + E[s, k, 0, 1] * z1 + E[s, k, 0, 2] * z2
        z[1] = E[s, k, 1, 0] * z0 + E[s, k, 1, 1] * z1 + E[s, k, 1, 2] * z2
        z[2] = E[s, k, 2, 0] * z0 + E[s, k, 2, 1] * z1 + E[s, k, 2, 2] * z2
        return
    if m == 4:  # with the switch node
        z0, z1, z2, z3 = z[0], z[1], z[2], z[3]
        z[0] = E[s, k, 0, 0] * z0 + E[s, k, 0, 1] * z1 + E[s, k, 0, 2] * z2 + E[s, k, 0, 3] * z3
        z[1] = E[s, k, 1, 0] * z0 + E[s, k, 1, 1] * z1 + E[s, k, 1, 2] * z2 + E[s, k, 1, 3] * z3
        z[2] = E[s, k, 2, 0] * z0 + E[s, k, 2, 1] * z1 + E[s, k, 2, 2] * z2 + E[s, k, 2, 3] * z3
        z[3] = E[s, k, 3, 0] * z0 + E[s, k, 3, 1] * z1 + E[s, k, 3, 2] * z2 + E[s, k, 3, 3] * z3
        return
    for i in range(m):
        acc = 0.0
        for j in range(m):
            acc += E[s, k, i, j] * z[j]
        tmp[i] = acc
    for i in range(m):
        z[i] = tmp[i]


@njit(cache=True, _nrt=False)
def derivative(Ms, s, z, row):
    """Component ``row`` of M_s @ z."""
    acc = 0.0
    for j in range(z.shape[0]):
        acc += Ms[s, row, j] * z[j]
    return acc


@plain_args
@njit(cache=True, _nrt=False)
def taylor_step(Ms, s, z, u, tmp):
    """z <- sum_j (M_s u)^j / j! z over j <= TAYLOR_ORDER, for short ``u``, by Horner's
    rule (``a <- z + (u / j) M_s a`` from ``j = TAYLOR_ORDER`` down to 1).

    ``tmp`` holds at least ``2 m`` entries: the iterate and its successor.
    """
    m = z.shape[0]
    A = Ms[s]
    for i in range(m):
        tmp[i] = z[i]                      # a = z
    for j in range(TAYLOR_ORDER, 0, -1):
        c = u / j
        for i in range(m):
            v = 0.0
            for q in range(m):
                v += A[i, q] * tmp[q]
            tmp[m + i] = z[i] + c * v
        for i in range(m):
            tmp[i] = tmp[m + i]
    for i in range(m):
        z[i] = tmp[i]


@njit(cache=True, inline="always")
def taylor_step4(Ms, s, z, u):
    """:func:`taylor_step` for a stage with its switch node (``m = 4``), in registers."""
    z0, z1, z2, z3 = z[0], z[1], z[2], z[3]
    a0, a1, a2, a3 = z0, z1, z2, z3
    m00, m01, m02, m03 = Ms[s, 0, 0], Ms[s, 0, 1], Ms[s, 0, 2], Ms[s, 0, 3]
    m10, m11, m12, m13 = Ms[s, 1, 0], Ms[s, 1, 1], Ms[s, 1, 2], Ms[s, 1, 3]
    m20, m21, m22, m23 = Ms[s, 2, 0], Ms[s, 2, 1], Ms[s, 2, 2], Ms[s, 2, 3]
    m30, m31, m32, m33 = Ms[s, 3, 0], Ms[s, 3, 1], Ms[s, 3, 2], Ms[s, 3, 3]
    for j in range(TAYLOR_ORDER, 0, -1):
        c = u / j
        b0 = z0 + c * (m00 * a0 + m01 * a1 + m02 * a2 + m03 * a3)
        b1 = z1 + c * (m10 * a0 + m11 * a1 + m12 * a2 + m13 * a3)
        b2 = z2 + c * (m20 * a0 + m21 * a1 + m22 * a2 + m23 * a3)
        b3 = z3 + c * (m30 * a0 + m31 * a1 + m32 * a2 + m33 * a3)
        a0, a1, a2, a3 = b0, b1, b2, b3
    z[0], z[1], z[2], z[3] = a0, a1, a2, a3


@njit(cache=True, inline="always")
def taylor_step3(Ms, s, z, u):
    """:func:`taylor_step` for the two-state stage (``m = 3``), in registers."""
    z0, z1, z2 = z[0], z[1], z[2]
    a0, a1, a2 = z0, z1, z2
    m00, m01, m02 = Ms[s, 0, 0], Ms[s, 0, 1], Ms[s, 0, 2]
    m10, m11, m12 = Ms[s, 1, 0], Ms[s, 1, 1], Ms[s, 1, 2]
    m20, m21, m22 = Ms[s, 2, 0], Ms[s, 2, 1], Ms[s, 2, 2]
    for j in range(TAYLOR_ORDER, 0, -1):
        c = u / j
        b0 = z0 + c * (m00 * a0 + m01 * a1 + m02 * a2)
        b1 = z1 + c * (m10 * a0 + m11 * a1 + m12 * a2)
        b2 = z2 + c * (m20 * a0 + m21 * a1 + m22 * a2)
        a0, a1, a2 = b0, b1, b2
    z[0], z[1], z[2] = a0, a1, a2


@plain_args
@njit(cache=True, _nrt=False)
def advance(Ms, E, h, s, z, d, tmp):
    """z <- expm(M_s d) @ z for any d >= 0: binary digits of d over the table,
    then the Taylor series for the remainder below its last step. ``tmp``:
    work space of at least ``2 m`` entries (the cycle loop, compiled without
    reference counting, calls this: it must not allocate)."""
    K = h.shape[0]
    r = d
    while r >= h[0]:
        apply(E, s, 0, z, tmp)
        r -= h[0]
    for k in range(1, K):
        if r >= h[k]:
            apply(E, s, k, z, tmp)
            r -= h[k]
    if r > 0.0:
        if z.shape[0] == 3:
            taylor_step3(Ms, s, z, r)
        elif z.shape[0] == 4:
            taylor_step4(Ms, s, z, r)
        else:
            taylor_step(Ms, s, z, r, tmp)
