"""GR4J: the four-parameter daily rainfall-runoff model of Perrin, Michel and Andreassian (2003).

Two stores and two unit hydrographs, with a groundwater exchange term (all in mm, one step = one
day). With P the liquid input (rain plus melt), E the PET, S the production store and R the
routing store:

1. Neutralisation: Pn = max(P - E, 0), En = max(E - P, 0); min(P, E) evaporates at once.
2. Production store (capacity X1), with s = S / X1::

       Ps = X1 (1 - s^2) tanh(Pn / X1) / (1 + s tanh(Pn / X1))
       Es = S (2 - s) tanh(En / X1) / (1 + (1 - s) tanh(En / X1))
       S <- S + Ps - Es

3. Percolation: Perc = S [1 - (1 + (4/9 S / X1)^4)^(-1/4)], S <- S - Perc.
4. Effective rainfall Pr = Perc + (Pn - Ps), split 90 % into UH1 (time base X4) and 10 % into
   UH2 (time base 2 X4); the ordinates are differences of the S-curves::

       SH1(t) = (t / X4)^(5/2)                      0 < t < X4,   1 for t >= X4
       SH2(t) = 1/2 (t / X4)^(5/2)                  0 < t <= X4
              = 1 - 1/2 (2 - t / X4)^(5/2)          X4 < t < 2 X4, 1 for t >= 2 X4
       UH1(j) = SH1(j) - SH1(j - 1),  UH2(j) = SH2(j) - SH2(j - 1),  j = 1, 2, ...

5. Groundwater exchange F = X2 (R / X3)^(7/2) (R at the start of the step; F > 0 gains water).
6. Routing store: R <- max(0, R + Q9 + F); Qr = R [1 - (1 + (R / X3)^4)^(-1/4)]; R <- R - Qr.
7. Direct flow Qd = max(0, Q1 + F); total flow Q = Qr + Qd.

Every term is tracked so the water balance closes to round-off::

    sum(P) + sum(exchange) = sum(AET) + sum(Q) + dS + dR + d(water in transit in the UHs)

where ``exchange`` is the exchange actually applied (F on each branch, less what the floors at
zero cut off) and AET = min(P, E) + Es. The rounding clamps (Ps at most Pn and X1 - S, Es at most
En and S) only act at the last bits and keep the stores within [0, X1] and >= 0.

References
----------
Perrin, C., Michel, C., Andreassian, V. (2003): Improvement of a parsimonious model for streamflow
simulation, J. Hydrol. 279, 275-289.
"""

from __future__ import annotations

from typing import NamedTuple

import numba
import numpy as np

from regional.models.base import Parameter

PARAMETERS = (
    # Initial values: the medians Perrin et al. (2003) report over their 429 basins (from
    # memory: X1 350 mm, X2 0 mm/day, X3 90 mm, X4 1.7 days; 80 % intervals about 100-1200 mm,
    # -5..3 mm/day, 20-300 mm, 1.1-2.9 days). Bounds are wider than those intervals so
    # calibration can reach dry, wet, leaky and large basins; chosen here, no source.
    Parameter(
        name="x1_mm",
        initial=350.0,
        lower=10.0,
        upper=2000.0,
        unit="mm",
        transform="log",
        description="GR4J X1: capacity of the production (soil moisture) store",
    ),
    Parameter(
        name="x2_mm_per_day",
        initial=0.0,
        lower=-10.0,
        upper=5.0,
        unit="mm/day",
        transform="identity",
        description="GR4J X2: groundwater exchange coefficient (> 0 gains, < 0 loses water)",
    ),
    Parameter(
        name="x3_mm",
        initial=90.0,
        lower=5.0,
        upper=1000.0,
        unit="mm",
        transform="log",
        description="GR4J X3: capacity of the non-linear routing store",
    ),
    Parameter(
        name="x4_days",
        initial=1.7,
        lower=0.5,
        upper=10.0,
        unit="day",
        transform="log",
        description="GR4J X4: time base of unit hydrograph UH1 (UH2: twice as long)",
    ),
)

WARM_START_FRACTION = 0.5
"""Default filling of both stores at the start, as a share of X1 and of X3 (common practice, no
source); the unit hydrographs start empty."""

PERCOLATION_CONSTANT = 4.0 / 9.0
"""The (4/9) of the percolation law, Perrin et al. (2003)."""


@numba.njit(cache=True, nogil=True)
def _s_curve_1(t, x4):  # pragma: no cover - compiled
    if t <= 0.0:
        return 0.0
    if t < x4:
        return (t / x4) ** 2.5
    return 1.0


@numba.njit(cache=True, nogil=True)
def _s_curve_2(t, x4):  # pragma: no cover - compiled
    if t <= 0.0:
        return 0.0
    if t <= x4:
        return 0.5 * (t / x4) ** 2.5
    if t < 2.0 * x4:
        return 1.0 - 0.5 * (2.0 - t / x4) ** 2.5
    return 1.0


@numba.njit(cache=True, nogil=True)
def _tanh(x):  # pragma: no cover - compiled
    """tanh(x) for x >= 0 from one expm1: (1 - e^(-2x)) / (1 + e^(-2x)), accurate near 0."""
    m = np.expm1(-2.0 * x)
    return -m / (2.0 + m)


@numba.njit(cache=True, nogil=True)
def _ordinates(x4, uh1, uh2):  # pragma: no cover - compiled
    """Fill uh1 (length ceil(X4)) and uh2 (length ceil(2 X4)) from the S-curves."""
    for i in range(uh1.shape[0]):
        uh1[i] = _s_curve_1(i + 1.0, x4) - _s_curve_1(float(i), x4)
    for i in range(uh2.shape[0]):
        uh2[i] = _s_curve_2(i + 1.0, x4) - _s_curve_2(float(i), x4)


def _lengths(x4: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x4 = np.asarray(x4, dtype=np.float64)
    return np.ceil(x4).astype(np.int64), np.ceil(2.0 * x4).astype(np.int64)


def unit_hydrograph_ordinates(x4_days: float) -> tuple[np.ndarray, np.ndarray]:
    """Ordinates of UH1 and UH2 for time base ``x4_days`` (days), as used by the kernel.

    Returns
    -------
    uh1, uh2 : ndarray
        Share of the input leaving on day 1, 2, ... (lengths ceil(X4) and ceil(2 X4)); each
        sums to 1.
    """
    if not (np.isfinite(x4_days) and x4_days > 0):
        raise ValueError(f"x4_days must be finite and > 0 days: got {x4_days!r}")
    n1, n2 = _lengths(np.array([x4_days]))
    uh1, uh2 = np.empty(int(n1[0])), np.empty(int(n2[0]))
    _ordinates(float(x4_days), uh1, uh2)
    return uh1, uh2


@numba.njit(cache=True, nogil=True)
def _gr4j_kernel(
    inflow, pet, x1, x2, x3, x4, s0, r0, flow, aet, storage, exchange, production, routing
):  # pragma: no cover - compiled
    """GR4J for every column; arrays (time, n), parameters and start states (n,).

    ``inflow`` and ``pet`` may have one column, then shared by all n columns. ``production``
    and ``routing`` are filled only when shaped like ``flow`` (pass (0, 0) arrays to skip);
    so are ``aet``, ``storage`` and ``exchange`` (a search that needs the flow only skips their
    writes).
    """
    n_steps, n = flow.shape
    shared_in = inflow.shape[1] == 1
    shared_pet = pet.shape[1] == 1
    detail = production.shape[0] == n_steps
    balance = storage.shape[0] == n_steps
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
            if balance:
                aet[t, j] = e_direct + es
                exchange[t, j] = gained
                storage[t, j] = s[j] + r[j] + transit
            if detail:
                production[t, j] = s[j]
                routing[t, j] = r[j]


class GR4JStores(NamedTuple):
    """Every output of one GR4J run, each shaped (time, n) (mm/day for fluxes, mm for stores)."""

    flow: np.ndarray
    aet: np.ndarray
    storage: np.ndarray
    exchange: np.ndarray
    production: np.ndarray
    routing: np.ndarray


class GR4J:
    """GR4J (Perrin et al. 2003): parameters ``x1_mm``, ``x2_mm_per_day``, ``x3_mm``, ``x4_days``.

    Storage (mm) is the production store plus the routing store plus the water in transit in
    the two unit hydrographs. A start storage given in mm fills both stores to the same share of
    their capacities (see :meth:`split_storage`); the unit hydrographs start empty.
    """

    name = "gr4j"
    description = (
        "GR4J: a daily model of four parameters, a production store of capacity X1 (mm), a "
        "groundwater exchange coefficient X2 (mm/day), a routing store of capacity X3 (mm) and "
        "the time base X4 (days) of two unit hydrographs that split the effective rainfall 90/10."
    )
    references = (
        "Perrin, C., Michel, C., Andreassian, V. (2003): Improvement of a parsimonious model "
        "for streamflow simulation. J. Hydrol. 279, 275-289.",
    )
    parameters = PARAMETERS
    storage_unit = "mm"

    def equilibrium_storage(
        self, inflow: np.ndarray, pet: np.ndarray, params: dict[str, np.ndarray]
    ) -> np.ndarray:
        """Default start storage, mm: both stores at :data:`WARM_START_FRACTION` of capacity.

        ``inflow`` and ``pet`` are accepted for the common model interface and not used: the
        fill of GR4J's stores has no closed-form equilibrium, and the warm-up (365 days in
        calibration) carries the state to the climate of the basin.
        """
        return WARM_START_FRACTION * (params["x1_mm"] + params["x3_mm"])

    def feasible_storage(
        self, initial_storage: np.ndarray, params: dict[str, np.ndarray]
    ) -> np.ndarray:
        """Start storage the stores can hold, mm: at most X1 + X3 (both stores full)."""
        return np.minimum(initial_storage, params["x1_mm"] + params["x3_mm"])

    def split_storage(
        self, initial_storage: np.ndarray, params: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        """Production and routing store at the start, mm, from the total ``initial_storage``.

        Both stores get the same share f = min(total / (X1 + X3), 1) of their capacity:
        S0 = f X1, R0 = f X3.
        """
        x1, x3 = params["x1_mm"], params["x3_mm"]
        share = np.minimum(np.asarray(initial_storage, dtype=np.float64) / (x1 + x3), 1.0)
        return np.ascontiguousarray(share * x1), np.ascontiguousarray(share * x3)

    def run(
        self,
        inflow: np.ndarray,
        pet: np.ndarray,
        params: dict[str, np.ndarray],
        initial_storage: np.ndarray,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Simulate n columns at once.

        Parameters
        ----------
        inflow, pet : ndarray, shape (time, 1 or n)
            Rain plus melt reaching the model, and PET, mm/day (C-contiguous float64).
        params : dict
            ``x1_mm``, ``x2_mm_per_day``, ``x3_mm``, ``x4_days``, each an (n,) float64 array.
        initial_storage : ndarray, shape (n,)
            Water in the production and routing stores at the start, mm (see
            :meth:`split_storage`).

        Returns
        -------
        flow, aet, storage, exchange : ndarray, shape (time, n)
            mm/day, mm/day, mm (end of step) and mm/day (groundwater exchange actually applied,
            positive = gained).
        """
        out = self._run(inflow, pet, params, initial_storage, detail=False)
        return out.flow, out.aet, out.storage, out.exchange

    def run_stores(
        self,
        inflow: np.ndarray,
        pet: np.ndarray,
        params: dict[str, np.ndarray],
        initial_storage: np.ndarray,
    ) -> GR4JStores:
        """As :meth:`run`, also returning the production and routing stores (mm, end of step)."""
        return self._run(inflow, pet, params, initial_storage, detail=True)

    def _run(self, inflow, pet, params, initial_storage, *, detail: bool) -> GR4JStores:
        x1 = params["x1_mm"]
        n_steps, n = inflow.shape[0], x1.shape[0]
        s0, r0 = self.split_storage(initial_storage, params)
        flow, aet, storage, exchange = (np.empty((n_steps, n)) for _ in range(4))
        shape = (n_steps, n) if detail else (0, 0)
        production, routing = np.empty(shape), np.empty(shape)
        _gr4j_kernel(
            inflow,
            pet,
            x1,
            params["x2_mm_per_day"],
            params["x3_mm"],
            params["x4_days"],
            s0,
            r0,
            flow,
            aet,
            storage,
            exchange,
            production,
            routing,
        )
        return GR4JStores(flow, aet, storage, exchange, production, routing)
