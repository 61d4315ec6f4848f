"""The linear reservoir: one store S (mm) with dS/dt = P - E_a - k S and Q = k S.

Actual evapotranspiration E_a declines as the store empties: E_a = PET min(1, S / S_ref), with
the reference storage S_ref a fixed constant of the model (``EVAPORATION_REFERENCE_MM``); below
S_ref the ODE stays linear, dS/dt = P - (k + PET / S_ref) S. Each daily step is integrated with
the closed-form solution of the regime it is in, split at the one time it may cross S_ref, so
the scheme is exact for piecewise-constant forcing and stable for any k; the store never empties.
With S_ref = 0 (model ``linear_potential_et``) E_a = PET until the store is empty, the time of
which is also solved exactly. Every segment's outflows come from its own mass balance, so the
water balance closes to round-off. Equations: docs/model-linear.md.

References
----------
Chow, V. T., Maidment, D. R., Mays, L. W. (1988): Applied Hydrology, McGraw-Hill (linear
reservoir).  Nash, J. E. (1957): The form of the instantaneous unit hydrograph, IAHS Publ. 45.
Thornthwaite, C. W., Mather, J. R. (1955): The water balance, Publications in Climatology 8(1)
(E_a in proportion to soil moisture).  Bergstroem, S. (1995): The HBV model, in Singh (ed.),
Computer Models of Watershed Hydrology, 443-476 (E_a = PET min(1, SM / (LP FC))).
"""

from __future__ import annotations

import numba
import numpy as np

from regional.models.base import Parameter

EVAPORATION_REFERENCE_MM = 25.0
"""S_ref (mm) of ``linear``: below it, evapotranspiration declines with the storage.

A design choice (docs/model-linear.md), not a published value; fixed, so that k stays the one
parameter calibrated and transferred."""

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
def _full_rate_segment(s_start, p, e, k, duration):  # pragma: no cover - compiled
    """Store at or above the reference over ``duration`` days: E at the potential rate.

    Returns (storage at the end, the AET and the flow over the segment, both mm).
    """
    r = p - e
    s_end = s_start * np.exp(-k * duration) - r * np.expm1(-k * duration) / k
    return s_end, e * duration, s_start + r * duration - s_end


@numba.njit(cache=True, nogil=True)
def _limited_segment(s_start, p, e, k, s_ref, duration):  # pragma: no cover - compiled
    """Store below the reference over ``duration`` days: E = PET S / S_ref, dS/dt = P - a S.

    Returns (storage at the end, the AET and the flow over the segment, both mm). Both outflows
    come from the integral of S over the segment, (P duration - (S_end - S_start)) / a, so they
    are never negative and the segment's balance closes to round-off.
    """
    a = k + e / s_ref
    s_end = s_start * np.exp(-a * duration) - (p / a) * np.expm1(-a * duration)
    integral = (p * duration - (s_end - s_start)) / a
    return s_end, e / s_ref * integral, k * integral


@numba.njit(cache=True, nogil=True)
def _declining_step(s_start, p, e, k, s_ref):  # pragma: no cover - compiled
    """One day with E = PET min(1, S / S_ref); the store crosses S_ref at most once a day.

    Both regimes relax towards equilibria on the same side of S_ref ((P - E) / k < S_ref exactly
    when P / (k + E / S_ref) < S_ref), so S(t) is monotone within the day and one crossing time,
    found in closed form, splits the day into two exact segments.
    """
    if s_start >= s_ref:
        target = (p - e) / k
        s_end, e_used, q = _full_rate_segment(s_start, p, e, k, 1.0)
        if s_end >= s_ref:
            return s_end, e_used, q
        t_cross = min(np.log1p((s_start - s_ref) / (s_ref - target)) / k, 1.0)
        s_mid, e_first, q_first = _full_rate_segment(s_start, p, e, k, t_cross)
        s_end, e_rest, q_rest = _limited_segment(s_ref, p, e, k, s_ref, 1.0 - t_cross)
        return s_end, e_first + e_rest, q_first + (s_mid - s_ref) + q_rest
    s_end, e_used, q = _limited_segment(s_start, p, e, k, s_ref, 1.0)
    if s_end <= s_ref:
        return s_end, e_used, q
    a = k + e / s_ref
    target = p / a
    t_cross = min(np.log1p((s_ref - s_start) / (target - s_ref)) / a, 1.0)
    s_mid, e_first, q_first = _limited_segment(s_start, p, e, k, s_ref, t_cross)
    s_end, e_rest, q_rest = _full_rate_segment(s_ref, p, e, k, 1.0 - t_cross)
    return s_end, e_first + e_rest, q_first + (s_mid - s_ref) + q_rest


@numba.njit(cache=True, nogil=True)
def _linear_kernel(inflow, pet, k, s0, s_ref, flow, aet, storage):  # pragma: no cover - compiled
    """Integrate the linear reservoir for every column; arrays (time, n), k and s0 (n,).

    ``inflow`` and ``pet`` may have one column, then shared by all n columns. ``s_ref`` (mm) is
    the storage below which evapotranspiration declines in proportion; 0 takes it at the
    potential rate until the store is empty.
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
            s_start = s[j]
            if s_ref > 0.0:
                s_end, e_actual, q = _declining_step(s_start, p, e, k[j], s_ref)
            else:
                r = p - e
                s_end = s_start * decay[j] + r * gain[j]
                e_actual = e
                if s_end < 0.0:
                    # S(t) falls monotonically towards r/k < 0, so S(1) < 0 means the store
                    # empties at t* < 1 day; afterwards E is limited to P and no flow leaves.
                    t_empty = np.log1p(k[j] * s_start / -r) / k[j]
                    e_actual = p - r * t_empty
                    s_end = 0.0
                q = s_start + p - e_actual - s_end
            flow[t, j] = q
            aet[t, j] = e_actual
            storage[t, j] = s_end
            s[j] = s_end


class LinearReservoir:
    """The one-store linear reservoir (parameter ``k_per_day``).

    Parameters
    ----------
    name : str, default "linear"
        Name the model is registered and configured under.
    evaporation_reference_mm : float, default EVAPORATION_REFERENCE_MM
        Storage S_ref (mm) below which actual evapotranspiration falls in proportion to the
        storage, E = PET S / S_ref; at or above it E = PET. 0 takes E at the potential rate
        until the store is empty (the simple store).
    """

    parameters = PARAMETERS
    storage_unit = "mm"

    def __init__(
        self, name: str = "linear", *, evaporation_reference_mm: float = EVAPORATION_REFERENCE_MM
    ) -> None:
        if not (np.isfinite(evaporation_reference_mm) and evaporation_reference_mm >= 0):
            raise ValueError(
                "evaporation_reference_mm must be finite and >= 0 mm: got "
                f"{evaporation_reference_mm!r}"
            )
        self.name = name
        self.evaporation_reference_mm = float(evaporation_reference_mm)

    @property
    def description(self) -> str:
        """One paragraph for the report's methods section."""
        common = (
            "Linear reservoir: one store S (mm) with dS/dt = P - E - kS and flow Q = kS, k the "
            "storage constant (1/day); each day integrated exactly under constant input"
        )
        if self.evaporation_reference_mm == 0.0:
            return (
                f"{common}, actual evapotranspiration at the potential rate, limited by the "
                "water available, and the store floored at zero."
            )
        return (
            f"{common}; actual evapotranspiration E = PET min(1, S / "
            f"{self.evaporation_reference_mm:g} mm), so it declines as the store empties and "
            "the store never runs dry."
        )

    @property
    def references(self) -> tuple[str, ...]:
        """Published sources of the model, for the report."""
        sources = (
            "Chow, V. T., Maidment, D. R., Mays, L. W. (1988): Applied Hydrology. McGraw-Hill, "
            "ch. 8 (linear reservoir).",
            "Nash, J. E. (1957): The form of the instantaneous unit hydrograph. IAHS Publ. 45, "
            "114-121.",
        )
        if self.evaporation_reference_mm == 0.0:
            return sources
        return (
            *sources,
            "Thornthwaite, C. W., Mather, J. R. (1955): The water balance. Publications in "
            "Climatology 8(1), Drexel Institute of Technology.",
            "Bergstroem, S. (1995): The HBV model. In Singh, V. P. (ed.), Computer Models of "
            "Watershed Hydrology, Water Resources Publications, 443-476.",
        )

    def equilibrium_storage(
        self, inflow: np.ndarray, pet: np.ndarray, params: dict[str, np.ndarray]
    ) -> np.ndarray:
        """Storage (mm) at which mean outflow and AET match the mean input, a warm start.

        With S_ref > 0: (P - E) / k where that is at least S_ref, else P / (k + E / S_ref); with
        S_ref = 0: max(P - E, 0) / k (P, E the mean inflow and PET).

        Parameters
        ----------
        inflow, pet : ndarray, shape (time, 1 or n)
            Liquid water reaching the store and PET, mm/day.
        params : dict
            ``k_per_day`` as an (n,) array.
        """
        k = params["k_per_day"]
        p, e = inflow.mean(axis=0), pet.mean(axis=0)
        full_rate = np.maximum(p - e, 0.0) / k
        s_ref = self.evaporation_reference_mm
        if s_ref == 0.0:
            return full_rate
        return np.where(full_rate >= s_ref, full_rate, p / (k + e / s_ref))

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
        s_ref = self.evaporation_reference_mm
        _linear_kernel(inflow, pet, k, initial_storage, s_ref, flow, aet, storage)
        return flow, aet, storage
