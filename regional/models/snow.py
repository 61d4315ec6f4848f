"""Degree-day snow store placed in front of any storage model when temperature is given.

Precipitation falls as snow on days whose mean temperature is below ``snow_threshold_c``; the pack
melts at ``melt_factor_mm_per_degc_day`` x (T - ``melt_threshold_c``) per day, limited by the pack.
Rain plus melt is the liquid input of the storage model behind.

References
----------
Martinec, J. (1960): The degree-day factor for snowmelt runoff forecasting, IUGG General Assembly
of Helsinki, IAHS Publ. 51. WMO (1986): Intercomparison of models of snowmelt runoff, Operational
Hydrology Report 23. Default values are common practice, no source.
"""

from __future__ import annotations

import numba
import numpy as np

from regional.models.base import Parameter

PARAMETERS = (
    Parameter(
        name="snow_threshold_c",
        initial=1.0,
        lower=-3.0,
        upper=4.0,
        unit="degC",
        transform="identity",
        description="precipitation falls as snow below this daily mean temperature",
    ),
    Parameter(
        name="melt_threshold_c",
        initial=0.0,
        lower=-3.0,
        upper=4.0,
        unit="degC",
        transform="identity",
        description="the pack melts above this daily mean temperature",
    ),
    Parameter(
        name="melt_factor_mm_per_degc_day",
        initial=3.0,
        lower=0.5,
        upper=10.0,
        unit="mm/degC/day",
        transform="identity",
        description="degree-day melt factor",
    ),
)


@numba.njit(cache=True, nogil=True)
def _snow_kernel(precip, temp, t_snow, t_melt, factor, pack0, liquid, pack, melt):
    """Degree-day pack for every column; precip and temp may have one shared column."""
    n_steps, n = liquid.shape
    shared_p = precip.shape[1] == 1
    shared_t = temp.shape[1] == 1
    swe = pack0.copy()
    for t in range(n_steps):
        for j in range(n):
            p = precip[t, 0] if shared_p else precip[t, j]
            tc = temp[t, 0] if shared_t else temp[t, j]
            rain = p
            if tc < t_snow[j]:
                swe[j] += p
                rain = 0.0
            m = factor[j] * (tc - t_melt[j])
            if m < 0.0:
                m = 0.0
            if m > swe[j]:
                m = swe[j]
            swe[j] -= m
            liquid[t, j] = rain + m
            melt[t, j] = m
            pack[t, j] = swe[j]


class DegreeDaySnow:
    """Snow store: splits precipitation into snow and rain and releases melt."""

    name = "snow"
    description = (
        "Degree-day snow store in front of the storage model: precipitation falls as snow on "
        "days colder than a threshold temperature (degC), and the pack melts at a factor "
        "(mm/degC/day) times the excess of temperature over a melt threshold, limited by the pack."
    )
    references = (
        "Martinec, J. (1960): The degree-day factor for snowmelt runoff forecasting. IAHS Publ. "
        "51, 468-477.",
    )
    parameters = PARAMETERS

    def run(
        self,
        precip: np.ndarray,
        temp: np.ndarray,
        params: dict[str, np.ndarray],
        initial_pack: np.ndarray,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Route precipitation through the pack for n columns at once.

        Parameters
        ----------
        precip, temp : ndarray, shape (time, 1 or n)
            Precipitation, mm/day, and daily mean air temperature, degC.
        params : dict
            The three snow parameters, each an (n,) float64 array.
        initial_pack : ndarray, shape (n,)
            Snow water equivalent at the start, mm.

        Returns
        -------
        liquid, pack, melt : ndarray, shape (time, n)
            Rain plus melt (mm/day), pack at end of step (mm), melt (mm/day).
        """
        n_steps, n = precip.shape[0], initial_pack.shape[0]
        liquid = np.empty((n_steps, n))
        pack = np.empty((n_steps, n))
        melt = np.empty((n_steps, n))
        _snow_kernel(
            precip,
            temp,
            params["snow_threshold_c"],
            params["melt_threshold_c"],
            params["melt_factor_mm_per_degc_day"],
            initial_pack,
            liquid,
            pack,
            melt,
        )
        return liquid, pack, melt
