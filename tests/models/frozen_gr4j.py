"""The GR4J kernel as it stood before the calibration work, frozen as a second route.

A verbatim copy of ``regional.models.gr4j._gr4j_kernel`` (and its helpers) at the time the
kernel was first optimised; ``tests/models/test_gr4j.py`` asserts the live kernel equals it to
1e-10 on random parameter sets. Do not edit: it is the reference, not the implementation.
"""

import numba
import numpy as np

PERCOLATION_CONSTANT = 4.0 / 9.0


@numba.njit(cache=False, nogil=True)
def _s_curve_1(t, x4):  # pragma: no cover - compiled
    if t <= 0.0:
        return 0.0
    if t < x4:
        return (t / x4) ** 2.5
    return 1.0


@numba.njit(cache=False, nogil=True)
def _s_curve_2(t, x4):  # pragma: no cover - compiled
    if t <= 0.0:
        return 0.0
    if t <= x4:
        return 0.5 * (t / x4) ** 2.5
    if t < 2.0 * x4:
        return 1.0 - 0.5 * (2.0 - t / x4) ** 2.5
    return 1.0


@numba.njit(cache=False, nogil=True)
def _tanh(x):  # pragma: no cover - compiled
    """tanh(x) for x >= 0 from one expm1: (1 - e^(-2x)) / (1 + e^(-2x)), accurate near 0."""
    m = np.expm1(-2.0 * x)
    return -m / (2.0 + m)


@numba.njit(cache=False, nogil=True)
def _ordinates(x4, uh1, uh2):  # pragma: no cover - compiled
    """Fill uh1 (length ceil(X4)) and uh2 (length ceil(2 X4)) from the S-curves."""
    for i in range(uh1.shape[0]):
        uh1[i] = _s_curve_1(i + 1.0, x4) - _s_curve_1(float(i), x4)
    for i in range(uh2.shape[0]):
        uh2[i] = _s_curve_2(i + 1.0, x4) - _s_curve_2(float(i), x4)


@numba.njit(cache=False, nogil=True)
def frozen_gr4j_kernel(
    inflow, pet, x1, x2, x3, x4, s0, r0, flow, aet, storage, exchange, production, routing
):  # pragma: no cover - compiled
    """GR4J for every column; arrays (time, n), parameters and start states (n,).

    ``inflow`` and ``pet`` may have one column, then shared by all n columns. ``production``
    and ``routing`` are filled only when shaped like ``flow`` (pass (0, 0) arrays to skip).
    """
    n_steps, n = flow.shape
    shared_in = inflow.shape[1] == 1
    shared_pet = pet.shape[1] == 1
    detail = production.shape[0] == n_steps
    n1 = np.empty(n, np.int64)
    n2 = np.empty(n, np.int64)
    for j in range(n):
        n1[j] = int(np.ceil(x4[j]))
        n2[j] = int(np.ceil(2.0 * x4[j]))
    uh1 = np.zeros((n, n1.max()))
    uh2 = np.zeros((n, n2.max()))
    for j in range(n):
        _ordinates(x4[j], uh1[j, : n1[j]], uh2[j, : n2[j]])
    inv_x1 = 1.0 / x1
    inv_x3 = 1.0 / x3
    held1 = np.zeros_like(uh1)  # held1[j, i]: routed water leaving UH1 i steps from now
    held2 = np.zeros_like(uh2)
    s = s0.copy()
    r = r0.copy()
    for t in range(n_steps):
        for j in range(n):
            p = inflow[t, 0] if shared_in else inflow[t, j]
            e = pet[t, 0] if shared_pet else pet[t, j]
            cap = x1[j]
            inv_cap = inv_x1[j]
            # 1. neutralisation of rain and PET
            if p >= e:
                pn = p - e
                en = 0.0
                e_direct = e
            else:
                pn = 0.0
                en = e - p
                e_direct = p
            # 2. production store
            ps = 0.0
            es = 0.0
            if pn > 0.0:
                fill = s[j] * inv_cap
                th = _tanh(pn * inv_cap)
                ps = cap * (1.0 - fill * fill) * th / (1.0 + fill * th)
                ps = min(ps, pn, cap - s[j])
                ps = max(ps, 0.0)
                s[j] += ps
            elif en > 0.0:
                fill = s[j] * inv_cap
                th = _tanh(en * inv_cap)
                es = s[j] * (2.0 - fill) * th / (1.0 + (1.0 - fill) * th)
                es = max(min(es, en, s[j]), 0.0)
                s[j] -= es
            # 3. percolation
            ratio = PERCOLATION_CONSTANT * s[j] * inv_cap
            ratio *= ratio
            perc = s[j] * (1.0 - 1.0 / np.sqrt(np.sqrt(1.0 + ratio * ratio)))
            s[j] -= perc
            # 4. effective rainfall through the two unit hydrographs
            pr = perc + (pn - ps)
            pr9 = 0.9 * pr
            pr1 = pr - pr9
            transit = 0.0
            q9 = held1[j, 0] + uh1[j, 0] * pr9
            for i in range(n1[j] - 1):
                held1[j, i] = held1[j, i + 1] + uh1[j, i + 1] * pr9
                transit += held1[j, i]
            q1 = held2[j, 0] + uh2[j, 0] * pr1
            for i in range(n2[j] - 1):
                held2[j, i] = held2[j, i + 1] + uh2[j, i + 1] * pr1
                transit += held2[j, i]
            # 5. groundwater exchange from the routing level at the start of the step
            level = r[j] * inv_x3[j]
            f = x2[j] * level * level * level * np.sqrt(level)
            # 6. routing store
            r_new = r[j] + q9 + f
            gained = f
            if r_new < 0.0:
                gained = -(r[j] + q9)
                r_new = 0.0
            level = r_new * inv_x3[j]
            level *= level
            qr = r_new * (1.0 - 1.0 / np.sqrt(np.sqrt(1.0 + level * level)))
            r[j] = r_new - qr
            # 7. direct flow
            qd = q1 + f
            if qd < 0.0:
                gained -= q1
                qd = 0.0
            else:
                gained += f
            flow[t, j] = qr + qd
            aet[t, j] = e_direct + es
            exchange[t, j] = gained
            storage[t, j] = s[j] + r[j] + transit
            if detail:
                production[t, j] = s[j]
                routing[t, j] = r[j]
