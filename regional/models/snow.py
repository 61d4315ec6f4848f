"""Degree-day snow store placed in front of any storage model when temperature is given.

Precipitation falls as snow on days whose mean temperature is below ``snow_threshold_c`` - 1
degC, as rain above ``snow_threshold_c`` + 1 degC, and as a mix in between (the share of snow
falling linearly with temperature: :data:`HALF_TRANSITION_C`); the pack melts at
``melt_factor_mm_per_degc_day`` x (T - ``melt_threshold_c``) per day, limited by the pack. Rain
plus melt is the liquid input of the storage model behind. Unless ``melt_threshold_c`` is
given, the pack melts above the snowfall threshold: one shared threshold.

The store's own table (:data:`PARAMETERS`: the threshold and the melt factor) is calibrated with
the model wherever the store runs, transferred with the donor's whole set and regressed like any
other parameter; a separate melt threshold (:data:`MELT_THRESHOLD`) is optional and is only ever
set by the user.

Defaults and bounds (docs/model-snow.md): a shared threshold of 0 degC, the usual default of
degree-day snow routines (e.g. HBV, Bergstroem 1995; from memory), searched within -3..+3 degC,
the range of rain/snow transition temperatures reported across climates (Kienzle 2008; from
memory); a melt factor of 2.5 mm/degC/day, searched within 0.5..10 mm/degC/day, the range of
degree-day factors for snow compiled by Hock (2003; from memory: about 2.5 to 11 mm/degC/day at
stations, lower for basin means that include shaded and forested ground).

References
----------
Martinec, J. (1960): The degree-day factor for snowmelt runoff forecasting, IUGG General Assembly
of Helsinki, IAHS Publ. 51. WMO (1986): Intercomparison of models of snowmelt runoff, Operational
Hydrology Report 23. Bergstroem, S. (1995): The HBV model, in Singh (ed.), Computer Models of
Watershed Hydrology, 443-476. Hock, R. (2003): Temperature index melt modelling in mountain areas,
J. Hydrol. 282, 104-115. Kienzle, S. W. (2008): A new temperature based method to separate rain
and snow, Hydrol. Process. 22, 5067-5085.
"""

from __future__ import annotations

import numba
import numpy as np

from regional.models.base import Parameter

PARAMETERS = (
    Parameter(
        name="snow_threshold_c",
        initial=0.0,
        lower=-3.0,
        upper=3.0,
        unit="degC",
        transform="identity",
        description="precipitation falls as snow below, and the pack melts above, this daily "
        "mean temperature",
    ),
    Parameter(
        name="melt_factor_mm_per_degc_day",
        initial=2.5,
        lower=0.5,
        upper=10.0,
        unit="mm/degC/day",
        transform="identity",
        description="degree-day melt factor",
    ),
)
MELT_THRESHOLD = Parameter(
    name="melt_threshold_c",
    initial=0.0,
    lower=-3.0,
    upper=4.0,
    unit="degC",
    transform="identity",
    description="the pack melts above this daily mean temperature (default: the snowfall "
    "threshold)",
)
"""Optional separate melt threshold; absent, the snowfall threshold is used."""
HALF_TRANSITION_C = 1.0
"""Half-width of the rain/snow transition, degC: the share of snow falls linearly from 1 at
``snow_threshold_c`` - 1 degC to 0 at ``snow_threshold_c`` + 1 degC (a mixed-phase band around
the threshold, common practice in degree-day routines, e.g. Bergstroem 1995; from memory). It
also keeps the calibration objective continuous in the threshold."""


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
            # share of snow: 1 below t_snow - half the transition, 0 above t_snow + half
            share = (t_snow[j] + HALF_TRANSITION_C - tc) / (2.0 * HALF_TRANSITION_C)
            share = min(max(share, 0.0), 1.0)
            snow = share * p
            swe[j] += snow
            rain = p - snow
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
        "days colder than a threshold temperature (degC), with a mixed band of 1 degC either "
        "side, and the pack melts at a factor "
        "(mm/degC/day) times the excess of temperature over a melt threshold, limited by the pack."
    )
    references = (
        "Martinec, J. (1960): The degree-day factor for snowmelt runoff forecasting. IAHS Publ. "
        "51, 468-477.",
    )
    parameters = PARAMETERS
    optional = (MELT_THRESHOLD,)

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
            ``snow_threshold_c`` and ``melt_factor_mm_per_degc_day``, and optionally
            ``melt_threshold_c`` (default: the snowfall threshold), each an (n,) float64 array.
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
            params.get("melt_threshold_c", params["snow_threshold_c"]),
            params["melt_factor_mm_per_degc_day"],
            initial_pack,
            liquid,
            pack,
            melt,
        )
        return liquid, pack, melt
