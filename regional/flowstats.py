"""Flow statistics of daily series, for many basins at once.

:func:`flow_statistics` takes a (days, basins) array of daily flow in mm/day on consecutive days
and returns every statistic of :data:`STATISTICS` for every basin in one vectorised pass (the
baseflow filter is a compiled kernel). :func:`statistics_frame` does the same for a DataFrame
indexed by date. Definitions, distributions, plotting positions and missing-data rules are in
``docs/statistics.md``; in short:

- ``mean_flow_mm_day``: mean of the observed days;
- ``q1_mm_day`` .. ``q99_mm_day``: flow-duration curve, Qx the flow exceeded x % of the time,
  from the Weibull plotting position i / (n + 1) with linear interpolation between order
  statistics (Hyndman and Fan 1996, type 6);
- ``min7_mean_mm_day``: mean over the usable years of the annual minimum of the 7-day mean flow;
- ``min7_q10_mm_day`` ("7Q10"): the annual 7-day minimum with a 10-year return period
  (non-exceedance probability 0.1) from a log-Pearson type III distribution fitted by the
  moments of the base-10 logarithms (Riggs 1972; IACWD 1982 for the moments and skew), years
  with zero flow handled by conditional probability (Jennings and Benson 1969);
- ``baseflow_index``: total baseflow / total flow, baseflow from the Lyne and Hollick (1979)
  filter with alpha 0.925, three passes (forward, backward, forward) and 30 days reflected at
  each end of every unbroken run of observed days (Ladson et al. 2013);
- ``amax_q2_mm_day``, ``amax_q10_mm_day``, ``amax_q100_mm_day``: annual maximum daily flow with
  2-, 10- and 100-year return periods from a generalized extreme value distribution fitted by
  L-moments (Hosking, Wallis and Wood 1985; Hosking and Wallis 1997);
- ``runoff_ratio``: mean flow / mean precipitation over the days both are observed;
- ``flow_m01_mm_day`` .. ``flow_m12_mm_day``: mean flow of each calendar month.

Missing data: a year (calendar year unless ``year_start_month`` says otherwise) is usable for
the annual statistics when at most :data:`MAX_MISSING_DAYS_PER_YEAR` of its days are missing
(days outside the series count as missing); the annual statistics need
:data:`MIN_YEARS` usable years, the others :data:`MIN_OBSERVED_DAYS` observed days; else NaN.

References
----------
Hyndman, R. J., Fan, Y. (1996): Sample quantiles in statistical packages. Am. Stat. 50(4),
361-365.
Riggs, H. C. (1972): Low-flow investigations. USGS Techniques of Water-Resources
Investigations, Book 4, Chapter B1.
Interagency Advisory Committee on Water Data (IACWD) (1982): Guidelines for determining flood
flow frequency, Bulletin 17B. USGS Office of Water Data Coordination, Reston, Virginia.
Jennings, M. E., Benson, M. A. (1969): Frequency curves for annual flood series with some zero
events or incomplete data. Water Resour. Res. 5(1), 276-280.
Lyne, V., Hollick, M. (1979): Stochastic time-variable rainfall-runoff modelling. Institute of
Engineers Australia National Conference, Perth, 89-93.
Ladson, A. R., Brown, R., Neal, B., Nathan, R. (2013): A standard approach to baseflow
separation using the Lyne and Hollick filter. Australasian J. Water Resour. 17(1), 25-34.
Hosking, J. R. M. (1990): L-moments: analysis and estimation of distributions using linear
combinations of order statistics. J. R. Stat. Soc. B 52(1), 105-124.
Hosking, J. R. M., Wallis, J. R., Wood, E. F. (1985): Estimation of the generalized
extreme-value distribution by the method of probability-weighted moments. Technometrics 27(3),
251-261.
Hosking, J. R. M., Wallis, J. R. (1997): Regional Frequency Analysis: An Approach Based on
L-Moments. Cambridge University Press.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
import pandas as pd
from scipy import special

from regional.errors import InputError

EXCEEDANCE_PERCENT = (1, 5, 10, 20, 30, 50, 70, 80, 90, 95, 99)
"""Exceedance percentages of the flow-duration points (Qx exceeded x % of the time)."""
FLOOD_RETURN_YEARS = (2, 10, 100)
"""Return periods (years) of the annual maximum daily flow quantiles."""
LOW_FLOW_RETURN_YEARS = 10
"""Return period (years) of the 7-day low flow ("7Q10")."""
LOW_FLOW_DAYS = 7
"""Length (days) of the moving mean whose annual minimum is taken."""
MAX_MISSING_DAYS_PER_YEAR = 36
"""A year with more missing days (about a tenth) is left out of the annual statistics."""
MIN_YEARS = 5
"""Fewest usable years for an annual statistic (mean 7-day minimum, 7Q10, flood quantiles)."""
MIN_OBSERVED_DAYS = 365
"""Fewest observed days for the whole-record statistics (mean, flow-duration, baseflow index,
runoff ratio, monthly means)."""
ZERO_FLOW_MM_DAY = 1e-3
"""An annual 7-day minimum at or below this (mm/day) counts as a zero-flow year in the 7Q10 fit
(a simulated store drains towards zero without reaching it; gauges report zero below their
resolution)."""
BASEFLOW_ALPHA = 0.925
"""Lyne and Hollick filter parameter (Ladson et al. 2013)."""
BASEFLOW_PASSES = 3
"""Filter passes: forward, backward, forward (Ladson et al. 2013)."""
BASEFLOW_REFLECT_DAYS = 30
"""Days reflected at each end of a run before filtering (Ladson et al. 2013)."""
BLOCK_BASINS = 256
"""Basins whose statistics :func:`statistics_frame` computes at a time: each basin's numbers
do not depend on the others, so the float64 copies and temporaries grow with the block, not
the region."""
MM_DAY_PER_M3S_KM2 = 86.4
"""1 m3/s over 1 km2 is 86.4 mm/day."""

FLOW_UNIT = "mm/day"
"""Unit of every flow statistic (per basin area)."""


@dataclass(frozen=True)
class Statistic:
    """One flow statistic: its name (unit in the name), unit and what it is."""

    name: str
    unit: str
    description: str

    @property
    def is_flow(self) -> bool:
        """True for a flow (mm/day, convertible to m3/s through the area)."""
        return self.unit == FLOW_UNIT

    @property
    def m3s_name(self) -> str:
        """The name of the same statistic in m3/s (flows only)."""
        if not self.is_flow:
            raise ValueError(f"{self.name} is not a flow: it has no m3/s form")
        return self.name.removesuffix("_mm_day") + "_m3s"


_ANNUAL = frozenset(
    {"min7_mean_mm_day", "min7_q10_mm_day", *(f"amax_q{t}_mm_day" for t in FLOOD_RETURN_YEARS)}
)
"""Statistics of annual values (they follow the usable-year rule)."""


def _statistics() -> tuple[Statistic, ...]:
    rows = [Statistic("mean_flow_mm_day", FLOW_UNIT, "mean daily flow")]
    rows += [
        Statistic(f"q{p}_mm_day", FLOW_UNIT, f"flow exceeded {p}% of the time")
        for p in EXCEEDANCE_PERCENT
    ]
    rows += [
        Statistic("min7_mean_mm_day", FLOW_UNIT, "mean annual 7-day minimum flow"),
        Statistic(
            "min7_q10_mm_day", FLOW_UNIT, "7-day minimum with a 10-year return period (7Q10)"
        ),
        Statistic("baseflow_index", "-", "baseflow index (Lyne-Hollick filter)"),
    ]
    rows += [
        Statistic(
            f"amax_q{t}_mm_day", FLOW_UNIT, f"annual maximum daily flow, {t}-year return period"
        )
        for t in FLOOD_RETURN_YEARS
    ]
    rows.append(Statistic("runoff_ratio", "-", "mean flow / mean precipitation"))
    rows += [
        Statistic(f"flow_m{m:02d}_mm_day", FLOW_UNIT, f"mean flow in month {m}")
        for m in range(1, 13)
    ]
    return tuple(rows)


STATISTICS = _statistics()
"""Every statistic :func:`flow_statistics` returns, in its order."""
STATISTIC_NAMES = tuple(s.name for s in STATISTICS)
"""Their names."""


def statistic(name: str) -> Statistic:
    """The :class:`Statistic` called ``name``."""
    for item in STATISTICS:
        if item.name == name:
            return item
    raise KeyError(f"no flow statistic {name!r}; known: {', '.join(STATISTIC_NAMES)}")


def to_m3s(flow_mm_day, area_km2) -> np.ndarray:
    """mm/day -> m3/s through the basin area: Q_m3s = Q_mm_day x area_km2 / 86.4.

    Parameters
    ----------
    flow_mm_day : array_like
        Flow per unit area, mm/day.
    area_km2 : array_like
        Basin area, km2 (broadcast against ``flow_mm_day``).

    Returns
    -------
    ndarray
        Flow, m3/s.
    """
    return (
        np.asarray(flow_mm_day, dtype=float) * np.asarray(area_km2, dtype=float)
    ) / MM_DAY_PER_M3S_KM2


# --------------------------------------------------------------------------------------------
# Entry points


def flow_statistics(
    flow_mm_day,
    dates,
    *,
    precip_mm_day=None,
    year_start_month: int = 1,
) -> dict[str, np.ndarray]:
    """Every statistic of :data:`STATISTICS` for every basin, in one pass.

    Parameters
    ----------
    flow_mm_day : array_like, shape (days, basins) or (days,)
        Daily flow, mm/day (>= 0); NaN = missing.
    dates : array_like of datetime64, shape (days,)
        Consecutive days (one day apart, increasing).
    precip_mm_day : array_like, shape like ``flow_mm_day``, optional
        Daily basin precipitation, mm/day, for ``runoff_ratio`` (NaN without it).
    year_start_month : int, default 1
        First month of the year the annual statistics are taken over (1: calendar year; e.g. 4
        for a year from April, so that a low-flow season is not split).

    Returns
    -------
    dict
        Statistic name -> ndarray (basins,), in the order of :data:`STATISTICS`; NaN where the
        data do not allow the statistic (see the module notes).
    """
    flow, dates = _checked(flow_mm_day, dates)
    precip = None if precip_mm_day is None else _as_2d(precip_mm_day, flow.shape, "precip")
    years = _Years.of(dates, year_start_month)
    observed = np.isfinite(flow)
    count = observed.sum(axis=0)
    enough = count >= MIN_OBSERVED_DAYS
    filled = np.where(observed, flow, 0.0)
    out: dict[str, np.ndarray] = {}
    out["mean_flow_mm_day"] = _ratio(filled.sum(axis=0), count)
    out.update(zip(STATISTIC_NAMES[1:12], flow_duration(flow), strict=True))
    minima = years.minima(moving_mean(flow, LOW_FLOW_DAYS), observed)
    out["min7_mean_mm_day"] = _annual_mean(minima)
    out["min7_q10_mm_day"] = low_flow_quantile(minima, 1.0 / LOW_FLOW_RETURN_YEARS)
    out["baseflow_index"] = baseflow_index(flow)
    maxima = years.maxima(flow, observed)
    nonexceedance = 1.0 - 1.0 / np.asarray(FLOOD_RETURN_YEARS, dtype=float)
    for t, values in zip(FLOOD_RETURN_YEARS, gev_quantiles(maxima, nonexceedance), strict=True):
        out[f"amax_q{t}_mm_day"] = values
    out["runoff_ratio"] = _runoff_ratio(flow, precip)
    monthly = _monthly_means(filled, observed, dates)
    for month in range(12):
        out[f"flow_m{month + 1:02d}_mm_day"] = monthly[month]
    whole_record = [n for n in STATISTIC_NAMES if n not in _ANNUAL]
    for name in whole_record:
        out[name] = np.where(enough, out[name], np.nan)
    return {name: out[name] for name in STATISTIC_NAMES}


def statistics_frame(
    flow_mm_day: pd.DataFrame,
    *,
    precip_mm_day: pd.DataFrame | None = None,
    year_start_month: int = 1,
    block_basins: int | None = None,
) -> pd.DataFrame:
    """:func:`flow_statistics` of a DataFrame, one row per basin.

    Parameters
    ----------
    flow_mm_day : DataFrame
        Daily flow, mm/day: increasing DatetimeIndex (days absent from it count as missing) x
        basins; NaN = missing.
    precip_mm_day : DataFrame, optional
        Daily precipitation, mm/day, with at least the dates and columns of ``flow_mm_day``
        (for ``runoff_ratio``; only those are read, a block of basins at a time: a
        :class:`regional.series.StoreTable` reads each block's basins from the store).
    year_start_month : int, default 1
        First month of the year of the annual statistics.
    block_basins : int, default :data:`BLOCK_BASINS`
        Basins computed at a time, at least 2 (:func:`column_blocks`; the float64 copies and
        temporaries are a block's); the numbers do not depend on it (tested).

    Returns
    -------
    DataFrame
        Indexed by ``basin_id`` (str), one column per statistic of :data:`STATISTICS`.
    """
    if not isinstance(flow_mm_day, pd.DataFrame) or not isinstance(
        flow_mm_day.index, pd.DatetimeIndex
    ):
        raise TypeError(
            "flow statistics need a DataFrame of daily flow indexed by date (DatetimeIndex), "
            f"one column per basin; got {type(flow_mm_day).__name__}"
        )
    if flow_mm_day.index.has_duplicates or not flow_mm_day.index.is_monotonic_increasing:
        raise ValueError("flow statistics: the dates must be increasing with no repeats")
    parts = [
        _frame_block(flow_mm_day.iloc[:, part], precip_mm_day, year_start_month)
        for part in column_blocks(flow_mm_day.shape[1], block_basins or BLOCK_BASINS)
    ]
    values = {name: np.concatenate([part[name] for part in parts]) for name in STATISTIC_NAMES}
    index = pd.Index(flow_mm_day.columns.astype(str), name="basin_id")
    return pd.DataFrame(values, index=index)


def column_blocks(n_columns: int, block: int) -> list[slice]:
    """Consecutive column slices of about ``block`` columns, none of a single column unless
    there is only one.

    A block of one column of a frame laid out day by day would be summed over days in another
    order than inside the whole (numpy sums a contiguous column pairwise, the columns of a
    day-by-day grid one day after another): at least two columns keep each basin's sums those
    of the whole grid.
    """
    size = max(2, int(block))
    starts = list(range(0, n_columns, size)) or [0]
    if len(starts) > 1 and n_columns - starts[-1] == 1:
        starts.pop()
    ends = [*starts[1:], n_columns]
    return [slice(start, end) for start, end in zip(starts, ends, strict=True)]


def _frame_block(
    flow_mm_day: pd.DataFrame, precip_mm_day: pd.DataFrame | None, year_start_month: int
) -> dict[str, np.ndarray]:
    """:func:`flow_statistics` of some basins' columns (float64 copies of those only)."""
    flow = _daily(flow_mm_day)
    precip = None
    if precip_mm_day is not None:
        precip = _daily(precip_mm_day.reindex(columns=flow_mm_day.columns)).reindex(flow.index)
    return flow_statistics(
        flow.to_numpy(dtype=float),
        flow.index.to_numpy(dtype="datetime64[D]"),
        precip_mm_day=None if precip is None else precip.to_numpy(dtype=float),
        year_start_month=year_start_month,
    )


def _daily(frame: pd.DataFrame) -> pd.DataFrame:
    if len(frame.index) == 0:
        return frame.astype(float)
    days = pd.date_range(frame.index[0].normalize(), frame.index[-1].normalize(), freq="D")
    return frame.astype(float).set_axis(frame.index.normalize()).reindex(days)


# --------------------------------------------------------------------------------------------
# Checks and small helpers


def _checked(flow, dates) -> tuple[np.ndarray, np.ndarray]:
    flow = np.asarray(flow, dtype=float)
    if flow.ndim == 1:
        flow = flow[:, None]
    if flow.ndim != 2:
        raise ValueError(f"flow must be (days,) or (days, basins); got shape {flow.shape}")
    dates = np.asarray(dates).astype("datetime64[D]")
    if dates.shape != (flow.shape[0],):
        raise ValueError(f"dates must have one entry per day ({flow.shape[0]}): {dates.shape}")
    if len(dates) > 1 and not (np.diff(dates) == np.timedelta64(1, "D")).all():
        raise ValueError("dates must be consecutive days, increasing (no gap, no repeat)")
    if (flow < 0).any():
        raise ValueError("flow statistics need flows >= 0 (mm/day); found a negative flow")
    return flow, dates


def _as_2d(values, shape, name: str) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    values = values[:, None] if values.ndim == 1 else values
    if values.shape != shape:
        raise ValueError(f"{name} must have the shape of flow {shape}; got {values.shape}")
    return values


def _ratio(numerator, denominator) -> np.ndarray:
    numerator = np.asarray(numerator, dtype=float)
    denominator = np.asarray(denominator, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(denominator > 0, numerator / denominator, np.nan)


# --------------------------------------------------------------------------------------------
# Flow-duration curve


def flow_duration(flow, exceedance_percent=EXCEEDANCE_PERCENT) -> np.ndarray:
    """Flow-duration points of each column: the flow exceeded x % of the time.

    Weibull plotting position: the i-th smallest of n observed days has non-exceedance
    probability i / (n + 1); a point is interpolated linearly between order statistics and
    held at the smallest / largest flow beyond them (Hyndman and Fan 1996, type 6; numpy's
    ``percentile(method="weibull")``).

    Parameters
    ----------
    flow : array_like, shape (days, basins)
        Daily flow, NaN = missing.
    exceedance_percent : sequence of float
        Exceedance percentages x (0 < x < 100).

    Returns
    -------
    ndarray, shape (len(exceedance_percent), basins)
        Same unit as ``flow``; NaN for a basin without observed days.
    """
    flow = np.asarray(flow, dtype=float)
    ordered = np.sort(flow, axis=0)  # NaN sort last
    n = np.isfinite(flow).sum(axis=0)
    probability = 1.0 - np.asarray(exceedance_percent, dtype=float)[:, None] / 100.0
    position = np.clip(probability * (n + 1) - 1.0, 0.0, np.maximum(n - 1, 0))
    below = np.floor(position).astype(int)
    above = np.minimum(below + 1, np.maximum(n - 1, 0))
    share = position - below
    low = np.take_along_axis(ordered, below, axis=0)
    high = np.take_along_axis(ordered, above, axis=0)
    return np.where(n > 0, low + share * (high - low), np.nan)


# --------------------------------------------------------------------------------------------
# Years, moving means, annual extremes


def moving_mean(flow, days: int) -> np.ndarray:
    """Trailing moving mean over ``days`` days (the window ends on the day).

    A window with a missing day, and the first ``days - 1`` days, give NaN.
    """
    flow = np.asarray(flow, dtype=float)
    observed = np.isfinite(flow)
    zeros = np.zeros((1, flow.shape[1]))
    total = np.concatenate([zeros, np.cumsum(np.where(observed, flow, 0.0), axis=0)])
    present = np.concatenate([zeros, np.cumsum(observed, axis=0)])
    window_total = total[days:] - total[:-days]
    full = (present[days:] - present[:-days]) == days
    mean = np.full(flow.shape, np.nan)
    mean[days - 1 :] = np.where(full, window_total / days, np.nan)
    return mean


@dataclass(frozen=True)
class _Years:
    """Contiguous years of a run of consecutive days: start row and length in days of each."""

    starts: np.ndarray
    days_in_year: np.ndarray

    @classmethod
    def of(cls, dates: np.ndarray, start_month: int) -> _Years:
        if int(start_month) != start_month or not 1 <= start_month <= 12:
            raise ValueError(f"year_start_month must be 1 .. 12; got {start_month!r}")
        months = dates.astype("datetime64[M]").astype(np.int64) - (int(start_month) - 1)
        label = np.floor_divide(months, 12)
        starts = np.flatnonzero(np.r_[True, label[1:] != label[:-1]]) if len(dates) else []
        first = (label[starts] * 12 + int(start_month) - 1).astype("datetime64[M]")
        length = (first + 12).astype("datetime64[D]") - first.astype("datetime64[D]")
        return cls(np.asarray(starts, dtype=int), length.astype(np.int64))

    def usable(self, observed: np.ndarray) -> np.ndarray:
        """(years, basins): at most :data:`MAX_MISSING_DAYS_PER_YEAR` days missing."""
        if not len(self.starts):
            return np.zeros((0, observed.shape[1]), dtype=bool)
        present = np.add.reduceat(observed.astype(np.int64), self.starts, axis=0)
        return (self.days_in_year[:, None] - present) <= MAX_MISSING_DAYS_PER_YEAR

    def minima(self, values: np.ndarray, observed: np.ndarray) -> np.ndarray:
        """(years, basins) minimum of ``values`` per usable year, NaN elsewhere."""
        return self._reduce(np.minimum, values, np.inf, observed)

    def maxima(self, values: np.ndarray, observed: np.ndarray) -> np.ndarray:
        """(years, basins) maximum of ``values`` per usable year, NaN elsewhere."""
        return self._reduce(np.maximum, values, -np.inf, observed)

    def _reduce(self, ufunc, values, neutral, observed) -> np.ndarray:
        if not len(self.starts):
            return np.zeros((0, values.shape[1]))
        filled = np.where(np.isfinite(values), values, neutral)
        reduced = ufunc.reduceat(filled, self.starts, axis=0)
        keep = self.usable(observed) & np.isfinite(reduced)
        return np.where(keep, reduced, np.nan)


def _annual_mean(annual: np.ndarray) -> np.ndarray:
    usable = np.isfinite(annual)
    n = usable.sum(axis=0)
    mean = _ratio(np.where(usable, annual, 0.0).sum(axis=0), n)
    return np.where(n >= MIN_YEARS, mean, np.nan)


# --------------------------------------------------------------------------------------------
# Low flows: log-Pearson type III by moments of the logs, zero years by conditional probability


def low_flow_quantile(annual_minima, probability: float) -> np.ndarray:
    """Annual minimum with non-exceedance ``probability`` (0.1 for a 10-year low flow).

    Log-Pearson type III fitted by the moments of the base-10 logs of the non-zero minima
    (mean, standard deviation with n - 1, skew g = n sum(d^3) / ((n-1)(n-2) s^3); IACWD 1982;
    Riggs 1972). Years at or below :data:`ZERO_FLOW_MM_DAY` are zero-flow years: with p0 their
    share, the quantile is 0 when p0 >= probability, else the fitted distribution's quantile at
    the conditional probability (probability - p0) / (1 - p0) (Jennings and Benson 1969).

    Parameters
    ----------
    annual_minima : array_like, shape (years, basins)
        Annual minima (e.g. of the 7-day mean flow), NaN = unusable year.
    probability : float
        Non-exceedance probability in (0, 1).

    Returns
    -------
    ndarray (basins,)
        Same unit as the minima; NaN with fewer than :data:`MIN_YEARS` usable years or fewer
        than 3 non-zero ones when the fit is needed.
    """
    minima = np.asarray(annual_minima, dtype=float)
    usable = np.isfinite(minima)
    n = usable.sum(axis=0)
    positive = usable & (minima > ZERO_FLOW_MM_DAY)
    n_pos = positive.sum(axis=0)
    p_zero = _ratio(n - n_pos, n)
    logs = np.log10(np.where(positive, minima, 1.0))
    mean, sd, skew = _log_moments(logs, positive, n_pos)
    with np.errstate(invalid="ignore", divide="ignore"):
        conditional = np.clip((probability - p_zero) / (1.0 - p_zero), 1e-12, 1.0 - 1e-12)
    frequency = np.where(sd > 0, pearson3_frequency(conditional, np.nan_to_num(skew)), 0.0)
    quantile = 10.0 ** (mean + sd * frequency)
    quantile = np.where(p_zero >= probability, 0.0, np.where(n_pos >= 3, quantile, np.nan))
    return np.where(n >= MIN_YEARS, quantile, np.nan)


PEARSON3_NORMAL_SKEW = 1.6e-5
"""Below this absolute skew the Pearson type III quantile is the normal one (the switch of
``scipy.stats.pearson3``)."""


def pearson3_frequency(probability, skew) -> np.ndarray:
    """Standardised Pearson type III quantile (the frequency factor K of mean + K sd).

    With beta = 2 / skew, alpha = beta^2: P^-1(alpha, p) / beta - alpha / beta (p replaced by
    1 - p for negative skew), P the regularised lower incomplete gamma function; the normal
    quantile where |skew| < :data:`PEARSON3_NORMAL_SKEW`. The steps of
    ``scipy.stats.pearson3.ppf`` with unit scale, written with ``scipy.special`` so that
    estimates at new sites need not import ``scipy.stats``.
    """
    probability, skew = np.broadcast_arrays(
        np.asarray(probability, float), np.asarray(skew, float)
    )
    normal = np.abs(skew) < PEARSON3_NORMAL_SKEW
    beta = 2.0 / np.where(normal, 1.0, skew)
    alpha = beta**2
    p = np.where(beta < 0, 1.0 - probability, probability)
    with np.errstate(invalid="ignore"):
        gamma = special.gammaincinv(alpha, p) / beta + (0.0 - alpha / beta)
    return np.where(normal, special.ndtri(probability), gamma)


def _log_moments(logs, mask, n):
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(mask, logs, 0.0).sum(axis=0) / n
        deviation = np.where(mask, logs - mean, 0.0)
        sd = np.sqrt((deviation**2).sum(axis=0) / (n - 1))
        cubed = (deviation**3).sum(axis=0)
        skew = np.where(sd > 0, n * cubed / ((n - 1) * (n - 2) * sd**3), 0.0)
    return mean, np.nan_to_num(sd), skew


# --------------------------------------------------------------------------------------------
# Floods: GEV by L-moments


def sample_lmoments(samples) -> np.ndarray:
    """Unbiased sample L-moments l1, l2, l3 of each column (Hosking 1990).

    From the probability-weighted moments b0, b1, b2 of the ascending order statistics:
    l1 = b0, l2 = 2 b1 - b0, l3 = 6 b2 - 6 b1 + b0.

    Parameters
    ----------
    samples : array_like, shape (values, columns)
        NaN = absent value (each column uses its own n).

    Returns
    -------
    ndarray, shape (3, columns)
        NaN for columns with fewer than 3 values.
    """
    samples = np.asarray(samples, dtype=float)
    ordered = np.sort(samples, axis=0)
    n = np.isfinite(samples).sum(axis=0).astype(float)
    rank = np.arange(samples.shape[0], dtype=float)[:, None]  # j - 1
    present = rank < n
    values = np.where(present, ordered, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        b0 = values.sum(axis=0) / n
        b1 = (values * rank / (n - 1)).sum(axis=0) / n
        b2 = (values * rank * (rank - 1) / ((n - 1) * (n - 2))).sum(axis=0) / n
    moments = np.stack([b0, 2 * b1 - b0, 6 * b2 - 6 * b1 + b0])
    return np.where(n >= 3, moments, np.nan)


def gev_parameters(l1, l2, t3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """GEV location xi, scale alpha and shape k from L-moments (Hosking et al. 1985).

    Shape from tau3 = 2 (1 - 3^-k) / (1 - 2^-k) - 3, solved by Newton's method from Hosking et
    al.'s (1985) approximation k = 7.8590 c + 2.9554 c^2, c = 2 / (3 + tau3) - ln 2 / ln 3; then
    alpha = l2 k / ((1 - 2^-k) Gamma(1 + k)), xi = l1 - alpha (1 - Gamma(1 + k)) / k (the
    Gumbel limits at k = 0). Hosking's sign convention: k > 0 bounds the upper tail.

    Returns
    -------
    (xi, alpha, k) : arrays
        NaN where l2 <= 0 or tau3 lies outside (-1, 1) or the shape does not converge.
    """
    l1, l2, t3 = (np.asarray(v, dtype=float) for v in (l1, l2, t3))
    valid = (l2 > 0) & (np.abs(t3) < 1)
    target = np.where(valid, t3, 0.0)
    c = 2.0 / (3.0 + target) - np.log(2.0) / np.log(3.0)
    k = np.clip(7.8590 * c + 2.9554 * c**2, -0.99, 20.0)
    for _ in range(50):
        value, slope = _tau3_of_shape(k)
        k = np.clip(k - (value - target) / slope, -0.999, 50.0)
    converged = np.abs(_tau3_of_shape(k)[0] - target) < 1e-9
    gamma = special.gamma(1.0 + k)
    tiny = np.abs(k) < 1e-7
    safe = np.where(tiny, 1.0, k)
    alpha = np.where(tiny, l2 / np.log(2.0), l2 * safe / ((1.0 - 2.0**-safe) * gamma))
    xi = np.where(tiny, l1 - np.euler_gamma * alpha, l1 - alpha * (1.0 - gamma) / safe)
    ok = valid & converged
    return (np.where(ok, xi, np.nan), np.where(ok, alpha, np.nan), np.where(ok, k, np.nan))


def _tau3_of_shape(k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """tau3(k) of the GEV and its slope; expm1 keeps tau3 exact near the Gumbel k = 0, where the
    slope (smooth there) is taken at |k| = 1e-4 to avoid cancellation."""
    k = np.where(k == 0.0, 1e-12, k)
    value = 2.0 * np.expm1(-k * np.log(3.0)) / np.expm1(-k * np.log(2.0)) - 3.0
    near = np.where(np.abs(k) < 1e-4, np.copysign(1e-4, k), k)
    two, three = 2.0**-near, 3.0**-near
    a, b = -np.expm1(-near * np.log(3.0)), -np.expm1(-near * np.log(2.0))
    slope = 2.0 * (np.log(3.0) * three * b - np.log(2.0) * two * a) / b**2
    return value, slope


def gev_quantiles(annual_maxima, nonexceedance) -> np.ndarray:
    """GEV quantiles of each column's annual maxima, fitted by L-moments.

    x(F) = xi + alpha / k (1 - (-ln F)^k), or xi - alpha ln(-ln F) at k = 0 (Hosking and
    Wallis 1997, appendix A.5).

    Parameters
    ----------
    annual_maxima : array_like, shape (years, basins)
        NaN = unusable year.
    nonexceedance : sequence of float
        Non-exceedance probabilities F (1 - 1 / return period).

    Returns
    -------
    ndarray, shape (len(nonexceedance), basins)
        NaN with fewer than :data:`MIN_YEARS` usable years or a degenerate sample.
    """
    maxima = np.asarray(annual_maxima, dtype=float)
    l1, l2, l3 = sample_lmoments(maxima)
    xi, alpha, k = gev_parameters(l1, l2, _ratio(l3, l2))
    reduced = -np.log(np.asarray(nonexceedance, dtype=float))[:, None]
    tiny = np.abs(k) < 1e-7
    safe = np.where(tiny | ~np.isfinite(k), 1.0, k)
    general = xi + alpha / safe * (1.0 - reduced**safe)
    gumbel = xi - alpha * np.log(reduced)
    quantiles = np.where(tiny, gumbel, general)
    n = np.isfinite(maxima).sum(axis=0)
    return np.where(n >= MIN_YEARS, quantiles, np.nan)


# --------------------------------------------------------------------------------------------
# Baseflow index: Lyne and Hollick filter, three passes, reflected ends (Ladson et al. 2013)


def baseflow(
    flow,
    *,
    alpha: float = BASEFLOW_ALPHA,
    passes: int = BASEFLOW_PASSES,
    reflect_days: int = BASEFLOW_REFLECT_DAYS,
) -> np.ndarray:
    """Baseflow of each column by the Lyne and Hollick (1979) filter (Ladson et al. 2013).

    Each unbroken run of observed days (at least ``reflect_days + 1`` long) is padded with its
    first and last ``reflect_days`` days reflected (mirror about the end day, which
    is not repeated), then filtered ``passes`` times, alternately forward and backward, each pass
    filtering the previous pass's baseflow: quickflow f_t = alpha f_(t-1) + (1 + alpha) / 2
    (y_t - y_(t-1)) starting from f = 0, baseflow b_t = y_t - f_t held within [0, y_t].

    Returns
    -------
    ndarray, shape of ``flow``
        Baseflow, same unit; NaN on missing days and on runs too short to filter.
    """
    flow = np.asarray(flow, dtype=float)
    one_d = flow.ndim == 1
    values = flow[:, None] if one_d else flow
    out = np.full(values.shape, np.nan)
    _baseflow_kernel(
        np.ascontiguousarray(values), float(alpha), int(passes), int(reflect_days), out
    )
    return out[:, 0] if one_d else out


def baseflow_index(flow) -> np.ndarray:
    """Baseflow index of each column: sum of baseflow / sum of flow over the filtered days."""
    flow = np.asarray(flow, dtype=float)
    base = baseflow(flow)
    filtered = np.isfinite(base)
    return _ratio(np.where(filtered, base, 0.0).sum(axis=0), np.where(filtered, flow, 0.0).sum(0))


@numba.njit(cache=True, nogil=True)
def _filter_pass(series, alpha, forward):  # pragma: no cover - compiled
    n = series.shape[0]
    out = np.empty(n)
    gain = 0.5 * (1.0 + alpha)
    quick = 0.0
    start = 0 if forward else n - 1
    step = 1 if forward else -1
    out[start] = series[start]
    i = start + step
    for _ in range(n - 1):
        quick = alpha * quick + gain * (series[i] - series[i - step])
        base = series[i] - quick
        if base < 0.0:
            base = 0.0
        elif base > series[i]:
            base = series[i]
        out[i] = base
        i += step
    return out


@numba.njit(cache=True, nogil=True)
def _filter_run(run, alpha, passes, reflect):  # pragma: no cover - compiled
    n = run.shape[0]
    pad = min(reflect, n - 1)
    padded = np.empty(n + 2 * pad)
    for i in range(pad):
        padded[i] = run[pad - i]
        padded[n + pad + i] = run[n - 2 - i]
    padded[pad : pad + n] = run
    for p in range(passes):
        padded = _filter_pass(padded, alpha, p % 2 == 0)
    return padded[pad : pad + n]


@numba.njit(cache=True, nogil=True)
def _baseflow_kernel(flow, alpha, passes, reflect, out):  # pragma: no cover - compiled
    n_days, n_basins = flow.shape
    for j in range(n_basins):
        t = 0
        while t < n_days:
            if not np.isfinite(flow[t, j]):
                t += 1
                continue
            end = t
            while end < n_days and np.isfinite(flow[end, j]):
                end += 1
            if end - t >= reflect + 1:
                out[t:end, j] = _filter_run(flow[t:end, j].copy(), alpha, passes, reflect)
            t = end


# --------------------------------------------------------------------------------------------
# Runoff ratio and monthly means


def _runoff_ratio(flow: np.ndarray, precip: np.ndarray | None) -> np.ndarray:
    if precip is None:
        return np.full(flow.shape[1], np.nan)
    both = np.isfinite(flow) & np.isfinite(precip)
    return _ratio(np.where(both, flow, 0.0).sum(axis=0), np.where(both, precip, 0.0).sum(0))


def _monthly_means(filled: np.ndarray, observed: np.ndarray, dates: np.ndarray) -> np.ndarray:
    """(12, basins) mean of the observed days of each calendar month."""
    months = dates.astype("datetime64[M]").astype(np.int64)
    if not len(months):
        return np.full((12, filled.shape[1]), np.nan)
    starts = np.flatnonzero(np.r_[True, months[1:] != months[:-1]])
    totals = np.add.reduceat(filled, starts, axis=0)
    counts = np.add.reduceat(observed.astype(float), starts, axis=0)
    return _ratio(
        _by_calendar_month(totals, months[starts]), _by_calendar_month(counts, months[starts])
    )


def _by_calendar_month(values: np.ndarray, months: np.ndarray) -> np.ndarray:
    """(12, basins) sums of the rows of ``values`` (one per month ``months``) by calendar
    month, added in date order (a running sum), so that a basin's sum never depends on the
    other basins beside it (a matrix product's blocking does)."""
    out = np.zeros((12, values.shape[1]))
    for month in range(12):
        rows = values[months % 12 == month]
        if len(rows):
            out[month] = np.cumsum(rows, axis=0)[-1]
    return out


# --------------------------------------------------------------------------------------------
# The headline statistics of the prediction table

SUMMARY_STATISTICS = ("mean_flow_mm", "mean_flow_m3s", "q5_mm", "q50_mm", "q95_mm", "min7_mean_mm")
"""The headline statistics (mean flow, flow-duration points, 7-day minimum)."""
STATISTIC_COLUMNS = (
    *SUMMARY_STATISTICS,
    *(f"flow_m{month:02d}_mm" for month in range(1, 13)),
)
"""Statistic columns of :attr:`regional.predicted.Prediction.table` (``mean_flow_m3s`` needs
the area)."""
TABLE_STATISTICS = {
    "mean_flow_mm": "mean_flow_mm_day",
    "q5_mm": "q5_mm_day",
    "q50_mm": "q50_mm_day",
    "q95_mm": "q95_mm_day",
    "min7_mean_mm": "min7_mean_mm_day",
    **{f"flow_m{m:02d}_mm": f"flow_m{m:02d}_mm_day" for m in range(1, 13)},
}
"""Prediction table column -> the statistic of :data:`STATISTICS` it holds (mm/day)."""


def headline_statistics(
    flow_mm: pd.DataFrame, *, area_km2: pd.Series | None = None
) -> pd.DataFrame:
    """The headline statistics of the prediction table (:data:`TABLE_STATISTICS`).

    Parameters
    ----------
    flow_mm : DataFrame
        Daily flow, mm/day: a DatetimeIndex (daily) x basins; NaN = missing.
    area_km2 : Series, optional
        Basin areas, km2, indexed by basin id; adds ``mean_flow_m3s``.

    Returns
    -------
    DataFrame
        Indexed by ``basin_id``: the columns of :data:`TABLE_STATISTICS` (each the
        :data:`STATISTICS` statistic named beside it: Weibull flow-duration points, mean
        annual 7-day minimum over the usable years, monthly means; docs/statistics.md); with
        ``area_km2``, ``mean_flow_m3s``. The bounded, validated statistics are those of
        :mod:`regional.statroutes`.
    """
    _check_daily(flow_mm)
    values = statistics_frame(flow_mm)
    table = pd.DataFrame(
        {column: values[name] for column, name in TABLE_STATISTICS.items()}, index=values.index
    )
    if area_km2 is not None:
        area = pd.Series(area_km2).rename(index=str).reindex(table.index).to_numpy(dtype=float)
        table.insert(1, "mean_flow_m3s", to_m3s(table["mean_flow_mm"].to_numpy(), area))
    return table


def _check_daily(flow_mm: pd.DataFrame) -> None:
    if not isinstance(flow_mm, pd.DataFrame) or not isinstance(flow_mm.index, pd.DatetimeIndex):
        raise InputError(
            "flow statistics need a DataFrame of daily flow indexed by date (DatetimeIndex) with "
            f"one column per basin; got {type(flow_mm).__name__}"
            + (f" indexed by {type(flow_mm.index).__name__}" if hasattr(flow_mm, "index") else "")
        )
    if not flow_mm.index.is_monotonic_increasing or flow_mm.index.has_duplicates:
        raise InputError(
            "flow statistics: the dates must be increasing with no repeats; sort the series and "
            "drop duplicate days"
        )
