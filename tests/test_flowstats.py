"""Flow statistics against outside references on the same series, and hand-worked checks.

References used: numpy and pandas (percentiles, rolling means, group means), scipy.stats
(L-moments, pearson3, skew), lmoments3 (reference library for L-moments and GEV by L-moments),
and hand-worked arithmetic from the published filter equation (Lyne and Hollick 1979).
"""

import lmoments3
import numpy as np
import pandas as pd
import pytest
from lmoments3 import distr
from scipy import stats

from regional import flowstats as fs
from regional.errors import InputError

START = np.datetime64("2001-01-01")


def _dates(n_days: int, start=START) -> np.ndarray:
    return np.arange(start, start + np.timedelta64(n_days, "D"))


def _series(n_years: int = 12, n_basins: int = 4, seed: int = 0, gaps: float = 0.0):
    """Invented seasonal flows with noise (mm/day), optionally with missing days."""
    dates = np.arange(START, np.datetime64(f"{2001 + n_years}-01-01"))
    rng = np.random.default_rng(seed)
    season = 1.0 + 0.8 * np.sin(2 * np.pi * np.arange(len(dates)) / 365.25)[:, None]
    flow = season * rng.gamma(0.8, 1.5, (len(dates), n_basins)) + 0.05
    if gaps:
        flow[rng.random(flow.shape) < gaps] = np.nan
    return dates, flow


def test_every_statistic_is_returned_in_order_with_its_unit():
    dates, flow = _series()
    out = fs.flow_statistics(flow, dates)
    assert tuple(out) == fs.STATISTIC_NAMES
    assert all(v.shape == (flow.shape[1],) for v in out.values())
    assert fs.statistic("q95_mm_day").unit == "mm/day"
    assert fs.statistic("baseflow_index").unit == "-"
    assert fs.statistic("amax_q100_mm_day").m3s_name == "amax_q100_m3s"
    with pytest.raises(ValueError, match="not a flow"):
        _ = fs.statistic("runoff_ratio").m3s_name
    with pytest.raises(KeyError, match="no flow statistic"):
        fs.statistic("q96_mm_day")


def test_flow_duration_equals_numpy_weibull_percentiles_column_by_column():
    # Reference: numpy.nanpercentile(method="weibull") (Hyndman and Fan 1996 type 6), run on
    # each column alone; the tool's vectorised version handles a different n per column.
    dates, flow = _series(gaps=0.05)
    out = fs.flow_statistics(flow, dates)
    for j in range(flow.shape[1]):
        for p in fs.EXCEEDANCE_PERCENT:
            expected = np.nanpercentile(flow[:, j], 100 - p, method="weibull")
            assert out[f"q{p}_mm_day"][j] == pytest.approx(expected, rel=1e-12)


def test_flow_duration_hand_worked():
    # Hand-worked, Weibull positions i / (n + 1) on 1..9: Q50 is the 5th value (5); Q10 has
    # non-exceedance 0.9, position 0.9 x 10 = 9 -> 9; Q95 has 0.05 x 10 = 0.5 < 1 -> held at 1;
    # Q70: 0.3 x 10 = 3 -> 3; Q80: 0.2 x 10 = 2 -> 2.
    flow = np.arange(1.0, 10.0)[:, None]
    points = fs.flow_duration(flow, (10, 50, 70, 80, 95))[:, 0]
    assert points == pytest.approx([9.0, 5.0, 3.0, 2.0, 1.0])


def test_mean_monthly_means_and_runoff_ratio_against_pandas():
    # Reference: pandas mean and groupby(month).mean() on the same series.
    dates, flow = _series(gaps=0.03)
    precip = 3.0 * np.random.default_rng(5).gamma(0.5, 2.0, flow.shape)
    precip[10:20, 0] = np.nan
    out = fs.flow_statistics(flow, dates, precip_mm_day=precip)
    frame = pd.DataFrame(flow, index=pd.DatetimeIndex(dates))
    assert out["mean_flow_mm_day"] == pytest.approx(frame.mean().to_numpy(), rel=1e-12)
    monthly = frame.groupby(frame.index.month).mean()
    for month in range(1, 13):
        got = out[f"flow_m{month:02d}_mm_day"]
        assert got == pytest.approx(monthly.loc[month].to_numpy(), rel=1e-12)
    both = frame.notna() & pd.DataFrame(precip, index=frame.index).notna()
    ratio = frame.where(both).sum() / pd.DataFrame(precip, index=frame.index).where(both).sum()
    assert out["runoff_ratio"] == pytest.approx(ratio.to_numpy(), rel=1e-12)


def test_mean_annual_7day_minimum_against_pandas_rolling():
    # Reference: pandas rolling(7).mean() (trailing window, all 7 days present), grouped by
    # calendar year, years with more than 36 missing days left out (the stated rule).
    dates, flow = _series(gaps=0.02)
    flow[400:440, 1] = np.nan  # 40 missing days in 2002 at basin 1: that year is dropped
    out = fs.flow_statistics(flow, dates)
    frame = pd.DataFrame(flow, index=pd.DatetimeIndex(dates))
    rolling = frame.rolling(7, min_periods=7).mean()
    years = frame.index.year
    missing = frame.isna().groupby(years).sum()
    annual = rolling.groupby(years).min().where(missing <= fs.MAX_MISSING_DAYS_PER_YEAR)
    assert np.isnan(annual.loc[2002, 1])
    assert out["min7_mean_mm_day"] == pytest.approx(annual.mean().to_numpy(), rel=1e-12)


def test_annual_rule_counts_days_outside_the_series_as_missing():
    # A series starting on 1 March: its first calendar year misses 59 days, so it is not used;
    # the annual maxima of the other years are those of pandas' groupby(year).max().
    dates = _dates(365 * 8, start=np.datetime64("2001-03-01"))
    flow = np.random.default_rng(2).gamma(1.0, 1.0, (len(dates), 1))
    flow[0, 0] = 100.0  # the largest flow, in the incomplete first year
    years = fs._Years.of(dates, 1)
    maxima = years.maxima(flow, np.isfinite(flow))[:, 0]
    frame = pd.Series(flow[:, 0], index=pd.DatetimeIndex(dates))
    expected = frame.groupby(frame.index.year).max()
    assert np.isnan(maxima[0])
    assert maxima[1:-1] == pytest.approx(expected.to_numpy()[1:-1])


def test_water_year_from_october():
    # Years from October: the flows of October to December count towards the next year.
    dates = _dates(365 * 6 + 1)
    years = fs._Years.of(dates, 10)
    labels_change = dates[years.starts].astype("datetime64[M]").astype(str)
    assert list(labels_change[1:3]) == ["2001-10", "2002-10"]
    assert years.days_in_year[1] == 365


def test_sample_lmoments_against_scipy_and_lmoments3():
    # References: scipy.stats.lmoment (unbiased sample L-moments) and lmoments3.lmom_ratios.
    rng = np.random.default_rng(3)
    samples = rng.gumbel(10.0, 3.0, (40, 3))
    samples[30:, 1] = np.nan  # a shorter record in one column
    got = fs.sample_lmoments(samples)
    for j in range(3):
        column = samples[np.isfinite(samples[:, j]), j]
        expected = stats.lmoment(column, order=[1, 2, 3], standardize=False)
        assert got[:, j] == pytest.approx(expected, rel=1e-10)
        ratios = lmoments3.lmom_ratios(column, nmom=3)
        assert got[2, j] / got[1, j] == pytest.approx(ratios[2], rel=1e-10)


@pytest.mark.parametrize("shape", [-0.25, -0.05, 0.0, 0.1, 0.3])
def test_gev_quantiles_against_lmoments3(shape):
    # Reference: lmoments3.distr.gev.lmom_fit and .ppf (same sign convention as Hosking's k).
    # lmoments3 takes the shape from Hosking's rational approximation (stated accuracy about
    # 1e-5 in k), the tool solves tau3(k) to round-off, hence rel=1e-3 on the quantiles.
    rng = np.random.default_rng(4)
    maxima = stats.genextreme.rvs(shape, loc=20.0, scale=6.0, size=(30, 1), random_state=rng)
    probabilities = [0.5, 0.9, 0.99]
    got = fs.gev_quantiles(maxima, probabilities)[:, 0]
    params = distr.gev.lmom_fit(maxima[:, 0])
    expected = distr.gev.ppf(probabilities, **params)
    assert got == pytest.approx(expected, rel=1e-3)


def test_gev_shape_solves_tau3_and_reaches_gumbel():
    # Hosking and Wallis (1997), appendix A.5: tau3 = 2 (1 - 3^-k) / (1 - 2^-k) - 3; the
    # Gumbel limit k = 0 has tau3 = 2 ln 3 / ln 2 - 3 (= 0.1699, from the limit by hand), with
    # alpha = l2 / ln 2 and xi = l1 - 0.5772 alpha.
    gumbel_t3 = 2 * np.log(3) / np.log(2) - 3
    xi, alpha, k = fs.gev_parameters(
        np.array([10.0, 10.0]), np.array([2.0, 2.0]), np.array([gumbel_t3, 0.3])
    )
    assert abs(k[0]) < 1e-6
    assert alpha[0] == pytest.approx(2.0 / np.log(2), rel=1e-6)
    assert xi[0] == pytest.approx(10.0 - np.euler_gamma * 2.0 / np.log(2), rel=1e-6)
    t3_back = 2 * (1 - 3.0 ** -k[1]) / (1 - 2.0 ** -k[1]) - 3
    assert t3_back == pytest.approx(0.3, abs=1e-10)


def test_annual_flood_quantiles_from_daily_series_against_lmoments3():
    # Reference: calendar-year maxima from pandas, then lmoments3 GEV fit and quantiles.
    dates, flow = _series(n_years=20, n_basins=2)
    out = fs.flow_statistics(flow, dates)
    frame = pd.DataFrame(flow, index=pd.DatetimeIndex(dates))
    maxima = frame.groupby(frame.index.year).max()
    for j in range(2):
        params = distr.gev.lmom_fit(maxima[j].to_numpy())
        for t in fs.FLOOD_RETURN_YEARS:
            expected = distr.gev.ppf(1 - 1 / t, **params)
            assert out[f"amax_q{t}_mm_day"][j] == pytest.approx(expected, rel=1e-3)


def _lp3_reference(minima: np.ndarray, probability: float) -> float:
    # Reference: log-Pearson III by moments of the base-10 logs with scipy: mean, std (n - 1),
    # scipy.stats.skew(bias=False) and scipy.stats.pearson3.ppf for the frequency factor.
    logs = np.log10(minima)
    skew = stats.skew(logs, bias=False)
    factor = stats.pearson3.ppf(probability, skew)
    return float(10 ** (logs.mean() + logs.std(ddof=1) * factor))


def test_7q10_log_pearson3_against_scipy_pearson3_on_logs():
    rng = np.random.default_rng(6)
    minima = 10 ** rng.normal(-0.5, 0.3, (25, 3))
    minima[:, 2] = 10 ** stats.pearson3.rvs(-0.8, size=25, random_state=rng) * 0.2 + 0.01
    got = fs.low_flow_quantile(minima, 0.1)
    for j in range(3):
        assert got[j] == pytest.approx(_lp3_reference(minima[:, j], 0.1), rel=1e-10)


def test_7q10_zero_years_by_conditional_probability():
    # Jennings and Benson (1969): with a share p0 of zero years, the quantile at probability P
    # is the non-zero distribution's quantile at (P - p0) / (1 - p0); 0 when p0 >= P.
    rng = np.random.default_rng(7)
    minima = 10 ** rng.normal(-1.0, 0.25, (20, 2))
    minima[0, 0] = 0.0  # one zero year in 20: p0 = 0.05
    minima[:2, 1] = 0.0  # two in 20: p0 = 0.1 = P
    got = fs.low_flow_quantile(minima, 0.1)
    assert got[0] == pytest.approx(_lp3_reference(minima[1:, 0], 0.05 / 0.95), rel=1e-10)
    assert got[1] == 0.0


def test_7q10_needs_enough_years():
    minima = np.full((fs.MIN_YEARS, 2), np.nan)
    minima[:, 0] = np.linspace(0.5, 1.0, fs.MIN_YEARS)
    minima[:-1, 1] = np.linspace(0.5, 1.0, fs.MIN_YEARS - 1)
    got = fs.low_flow_quantile(minima, 0.1)
    assert np.isfinite(got[0]) and np.isnan(got[1])


def _filter_reference(y, alpha, passes, reflect):
    """Plain-Python Lyne and Hollick filter from the published equation, one run, reflected."""
    y = list(y)
    padded = y[reflect:0:-1] + y + y[-2 : -2 - reflect : -1]
    series = padded
    for p in range(passes):
        order = range(len(series)) if p % 2 == 0 else range(len(series) - 1, -1, -1)
        order = list(order)
        out = [0.0] * len(series)
        out[order[0]] = series[order[0]]
        quick = 0.0
        for before, now in zip(order[:-1], order[1:], strict=True):
            quick = alpha * quick + (1 + alpha) / 2 * (series[now] - series[before])
            out[now] = min(max(series[now] - quick, 0.0), series[now])
        series = out
    return np.array(series[reflect : reflect + len(y)])


def test_baseflow_one_pass_hand_worked():
    # Hand-worked single forward pass, alpha 0.925, (1 + alpha) / 2 = 0.9625, f_0 = 0:
    # f1 = 0.9625 x 2 = 1.925 -> b1 = 3 - 1.925 = 1.075;
    # f2 = 0.925 x 1.925 - 0.9625 = 0.818125 -> b2 = 2 - 0.818125 = 1.181875;
    # f3 = 0.925 x 0.818125 - 0.9625 = -0.20573 -> b3 = 1.20573 > y3 = 1, held at 1.
    base = fs.baseflow(np.array([1.0, 3.0, 2.0, 1.0]), passes=1, reflect_days=0)
    assert base == pytest.approx([1.0, 1.075, 1.181875, 1.0])


def test_baseflow_three_passes_with_reflection_against_plain_python():
    # Reference: the plain-Python filter above (Lyne and Hollick 1979 with Ladson et al. 2013's
    # alpha 0.925, three passes and 30 reflected days), run on each unbroken run alone.
    dates, flow = _series(n_years=2, n_basins=2)
    flow[100:105, 0] = np.nan  # two runs in basin 0
    flow[600:610, 1] = np.nan
    base = fs.baseflow(flow)
    for j, (a, b) in enumerate([(100, 105), (600, 610)]):
        for lo, hi in ((0, a), (b, len(dates))):
            expected = _filter_reference(flow[lo:hi, j], 0.925, 3, 30)
            assert base[lo:hi, j] == pytest.approx(expected, rel=1e-12)
        assert np.isnan(base[a:b, j]).all()
    assert (base[np.isfinite(base)] <= flow[np.isfinite(base)] + 1e-12).all()


def test_baseflow_index_of_a_constant_flow_is_one_and_of_spikes_is_small():
    flow = np.full((400, 2), 2.0)
    flow[::30, 1] = 50.0  # isolated one-day floods on a low base
    flow[:, 1] = np.where(flow[:, 1] == 2.0, 0.1, flow[:, 1])
    bfi = fs.baseflow_index(flow)
    assert bfi[0] == pytest.approx(1.0)
    assert 0.0 < bfi[1] < 0.3


def test_short_records_give_nan_not_a_guess():
    dates, flow = _series(n_years=3, n_basins=2)
    flow[200:, 1] = np.nan  # 200 observed days: too few for the whole-record statistics
    out = fs.flow_statistics(flow, dates)
    assert np.isnan(out["mean_flow_mm_day"][1]) and np.isfinite(out["mean_flow_mm_day"][0])
    assert np.isnan(out["min7_q10_mm_day"]).all()  # 3 years < MIN_YEARS
    assert np.isnan(out["amax_q2_mm_day"]).all()


def test_many_basins_at_once_equal_each_basin_alone():
    dates, flow = _series(n_basins=5, gaps=0.01)
    together = fs.flow_statistics(flow, dates)
    for j in range(5):
        alone = fs.flow_statistics(flow[:, j], dates)
        for name in fs.STATISTIC_NAMES:
            np.testing.assert_allclose(alone[name][0], together[name][j], rtol=1e-12)


def test_statistics_frame_fills_absent_days_and_keeps_basin_ids():
    dates, flow = _series(n_basins=2)
    frame = pd.DataFrame(flow, index=pd.DatetimeIndex(dates), columns=["007", "b"])
    dropped = frame.drop(frame.index[50:60])
    table = fs.statistics_frame(dropped)
    with_nan = frame.copy()
    with_nan.iloc[50:60] = np.nan
    expected = fs.flow_statistics(with_nan.to_numpy(), dates)
    assert list(table.index) == ["007", "b"]
    for name in fs.STATISTIC_NAMES:
        np.testing.assert_allclose(table[name].to_numpy(), expected[name], rtol=1e-12)


def test_statistics_frame_does_not_depend_on_the_block_of_basins():
    # Each basin's statistics are its own: computed a few basins at a time they are the same
    # to the bit as all at once, whatever the memory layout of the frame (days or basins
    # contiguous) and with precipitation over more days and basins than the flow.
    dates, flow = _series(n_basins=11, gaps=0.02)
    flow[:400, 3] = np.nan  # a basin with a shorter record
    index = pd.DatetimeIndex(dates)
    rng = np.random.default_rng(5)
    wide = pd.date_range(index[0] - pd.Timedelta(days=30), index[-1], freq="D")
    precip = pd.DataFrame(
        rng.gamma(0.6, 4.0, (len(wide), 13)).astype(np.float32),
        index=wide,
        columns=[f"b{j}" for j in range(13)],
    )
    columns = [f"b{j}" for j in range(11)][::-1]
    for values in (np.ascontiguousarray(flow), np.asfortranarray(flow)):
        frame = pd.DataFrame(values, index=index, columns=columns, copy=False)
        whole = fs.statistics_frame(
            frame, precip_mm_day=precip.loc[index, columns], block_basins=11
        )
        for block in (1, 2, 4, 5):
            blocks = fs.statistics_frame(frame, precip_mm_day=precip, block_basins=block)
            pd.testing.assert_frame_equal(blocks, whole, check_exact=True)
    assert whole["runoff_ratio"].notna().all()
    sizes = [[s.stop - s.start for s in fs.column_blocks(n, 5)] for n in (1, 10, 11, 12)]
    assert sizes == [[1], [5, 5], [5, 6], [5, 5, 2]]


def test_bad_input_is_refused_with_a_reason():
    dates, flow = _series(n_years=1, n_basins=1)
    with pytest.raises(ValueError, match="consecutive days"):
        fs.flow_statistics(flow[::2], dates[::2])
    with pytest.raises(ValueError, match=">= 0"):
        fs.flow_statistics(-flow, dates)
    with pytest.raises(TypeError, match="DatetimeIndex"):
        fs.statistics_frame(pd.DataFrame(flow))
    with pytest.raises(ValueError, match="year_start_month"):
        fs.flow_statistics(flow, dates, year_start_month=13)


def test_m3s_through_the_area():
    # By hand: 1 mm/day over 86.4 km2 is 86,400 m3/day, i.e. 1 m3/s.
    assert fs.to_m3s(1.0, 86.4) == pytest.approx(1.0)
    assert fs.to_m3s(np.array([2.0, 0.5]), np.array([43.2, 172.8])) == pytest.approx([1.0, 1.0])


def _daily_frame(values: np.ndarray, start: str = "2001-01-01", columns=("A",)) -> pd.DataFrame:
    values = np.asarray(values, dtype=float)
    if values.ndim == 1:
        values = values[:, None]
    dates = pd.date_range(start, periods=len(values), freq="D")
    return pd.DataFrame(values, index=dates, columns=list(columns))


def test_table_statistics_are_the_flowstats_statistics():
    # Two names for the same numbers: the prediction table's columns and regional.flowstats
    # (whose own checks against numpy, pandas, scipy and lmoments3 are above).
    rng = np.random.default_rng(4)
    values = rng.gamma(0.8, 2.0, size=(3 * 365, 3))
    values[10:20, 1] = np.nan
    flow = _daily_frame(values, columns=("A", "B", "C"))
    table = fs.headline_statistics(flow)
    reference = fs.statistics_frame(flow)
    for column, name in fs.TABLE_STATISTICS.items():
        np.testing.assert_allclose(table[column], reference[name], rtol=1e-12)
    assert list(table.columns) == list(fs.TABLE_STATISTICS)


def test_monthly_means_and_area_conversion():
    dates = pd.date_range("2001-01-01", "2002-12-31", freq="D")
    flow = pd.DataFrame({"A": dates.month.to_numpy(dtype=float)}, index=dates)
    table = fs.headline_statistics(flow, area_km2=pd.Series({"A": 172.8}))
    for month in range(1, 13):
        assert table.loc["A", f"flow_m{month:02d}_mm"] == pytest.approx(month)
    # 1 m3/s over 1 km2 is 86.4 mm/day (86 400 s x 1 m3/s / 1e6 m2 x 1000 mm/m; unit arithmetic)
    assert table.loc["A", "mean_flow_m3s"] == pytest.approx(
        table.loc["A", "mean_flow_mm"] * 172.8 / 86.4
    )


def test_headline_statistics_reject_a_table_without_dates():
    with pytest.raises(InputError, match="indexed by date"):
        fs.headline_statistics(pd.DataFrame({"A": [1.0, 2.0]}))


def test_pearson3_frequency_is_scipys_pearson3_quantile_to_the_last_bit():
    # source: scipy.stats.pearson3.ppf (unit scale), which the function writes out with
    # scipy.special so that predictions need not import scipy.stats
    from scipy import stats

    from regional.flowstats import pearson3_frequency

    rng = np.random.default_rng(7)
    probability = rng.uniform(1e-12, 1.0 - 1e-12, 4000)
    skew = rng.normal(0.0, 2.0, 4000)
    skew[:6] = [0.0, 1e-6, -1e-6, 1.7e-5, -3.0, 4.0]  # both sides of the normal switch
    probability[6] = np.nan
    expected = stats.pearson3.ppf(probability, skew)
    np.testing.assert_array_equal(pearson3_frequency(probability, skew), expected)
