"""The linear reservoir: one store S (mm) with dS/dt = P - E - k S and Q = k S.

Each daily step is integrated with the closed-form solution of the linear ODE under constant
input over the step, so the scheme is exact for piecewise-constant forcing and stable for any k.
With net input r = P - E (mm/day) and storage S0 at the start of the step (dt = 1 day)::

    S(t) = S0 exp(-k t) + r (1 - exp(-k t)) / k

When r < 0 the store may empty before the step ends, at

    t* = ln(1 + k S0 / (-r)) / k

after which the store stays empty, evapotranspiration is limited to the precipitation still
arriving and no flow leaves. Flow over the step follows from the mass balance of the step, so the
water balance closes to round-off:  Q = S0 + P_used - E_actual - S1.

References
----------
Chow, V. T., Maidment, D. R., Mays, L. W. (1988): Applied Hydrology, McGraw-Hill (linear
reservoir).  Nash, J. E. (1957): The form of the instantaneous unit hydrograph, IAHS Publ. 45.
"""

from __future__ import annotations

import numba
import numpy as np

from regional.models.base import Parameter

PARAMETERS = (
    Parameter(
        name="k_per_day",
        initial=0.05,
        lower=0.001,
        upper=1.5,
        unit="1/day",
        transform="log",
        description="storage constant of the linear reservoir (Q = k S)",
    ),
)


@numba.njit(cache=True, nogil=True)
def _linear_kernel(inflow, pet, k, s0, flow, aet, storage):  # pragma: no cover - compiled
    """Integrate the linear reservoir for every column; arrays (time, n), k and s0 (n,).

    ``inflow`` and ``pet`` may have one column, then shared by all n columns.
    """
    n_steps, n = flow.shape
    shared_in = inflow.shape[1] == 1
    shared_pet = pet.shape[1] == 1
    decay = np.exp(-k)
    gain = -np.expm1(-k) / k
    s = s0.copy()
    for t in range(n_steps):
        for j in range(n):
            p = inflow[t, 0] if shared_in else inflow[t, j]
            e = pet[t, 0] if shared_pet else pet[t, j]
            r = p - e
            s_start = s[j]
            s_end = s_start * decay[j] + r * gain[j]
            e_actual = e
            if s_end < 0.0:
                # S(t) falls monotonically towards r/k < 0, so S(1) < 0 means the store
                # empties at t* < 1 day; afterwards E is limited to P and no flow leaves.
                t_empty = np.log1p(k[j] * s_start / -r) / k[j]
                e_actual = p - r * t_empty
                s_end = 0.0
            flow[t, j] = s_start + p - e_actual - s_end
            aet[t, j] = e_actual
            storage[t, j] = s_end
            s[j] = s_end


class LinearReservoir:
    """The one-store linear reservoir (parameter ``k_per_day``)."""

    name = "linear"
    description = (
        "Linear reservoir: one store S (mm) with dS/dt = P - E - kS and flow Q = kS, k the "
        "storage constant (1/day); each day integrated exactly under constant input, actual "
        "evapotranspiration limited by the water available and the store floored at zero."
    )
    references = (
        "Chow, V. T., Maidment, D. R., Mays, L. W. (1988): Applied Hydrology. McGraw-Hill, "
        "ch. 8 (linear reservoir).",
        "Nash, J. E. (1957): The form of the instantaneous unit hydrograph. IAHS Publ. 45, "
        "114-121.",
    )
    parameters = PARAMETERS
    storage_unit = "mm"

    def equilibrium_storage(
        self, inflow: np.ndarray, pet: np.ndarray, params: dict[str, np.ndarray]
    ) -> np.ndarray:
        """Storage (mm) at which mean outflow matches the mean net input, a warm start.

        Parameters
        ----------
        inflow, pet : ndarray, shape (time, 1 or n)
            Liquid water reaching the store and PET, mm/day.
        params : dict
            ``k_per_day`` as an (n,) array.
        """
        net = np.maximum(inflow.mean(axis=0) - pet.mean(axis=0), 0.0)
        return net / params["k_per_day"]

    def run(
        self,
        inflow: np.ndarray,
        pet: np.ndarray,
        params: dict[str, np.ndarray],
        initial_storage: np.ndarray,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Simulate n columns at once.

        Parameters
        ----------
        inflow, pet : ndarray, shape (time, 1 or n)
            Rain plus melt reaching the store, and PET, mm/day (C-contiguous float64).
        params : dict
            ``k_per_day`` as an (n,) float64 array, 1/day.
        initial_storage : ndarray, shape (n,)
            Storage at the start, mm.

        Returns
        -------
        flow, aet, storage : ndarray, shape (time, n)
            mm/day, mm/day and mm (end of step).
        """
        k = params["k_per_day"]
        n_steps, n = inflow.shape[0], k.shape[0]
        flow = np.empty((n_steps, n))
        aet = np.empty((n_steps, n))
        storage = np.empty((n_steps, n))
        _linear_kernel(inflow, pet, k, initial_storage, flow, aet, storage)
        return flow, aet, storage
