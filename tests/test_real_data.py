"""The whole chain on real, observed basins (CAMELS-US in Caravan; see the dataset's README).

A subset small enough for CI: the 59 basins of USGS parts 01 (North Atlantic slope) and 03
(Ohio), warm-up 1989, calibration 1990-1999, validation 2000-2009, NSE objective, linear store
and GR4J, both with the degree-day snow store in front (its parameters calibrated);
regression, similarity, proximity and blended transfer with the number of donors chosen in
leave-one-out from 1 to 10. Skipped when the dataset is absent (it is kept outside the
repository). The figures for every basin come from ``benchmarks/real_data.py`` and are
recorded in docs/validation.md.
"""

from __future__ import annotations

import warnings

import pytest
from real_region import available, build_region

from regional.crossval import CALIBRATED, MEDIAN

pytestmark = pytest.mark.skipif(
    not available(),
    reason="real dataset not found (set REGIONAL_REAL_DATA or ../shared/data/real)",
)


@pytest.fixture(scope="module")
def real_result(tmp_path_factory):
    from regional.errors import InputWarning
    from regional.pipeline import run

    folder = build_region(tmp_path_factory.mktemp("real"), parts=["01", "03"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return run(folder)


def _median_nse(result, model: str):
    rows = result.summary[result.summary["model"] == model]
    return rows.set_index("method")["median_nse"]


def test_region_reads_points_with_area_and_snow(real_result):
    region = real_result.region
    assert region.is_point
    assert len(region.gauged) == 59
    assert region.temp_c is not None
    assert real_result.runs["gr4j"].context.temp_c is not None  # snow store in front


def test_gr4j_best_transfer_beats_median_and_nothing_beats_calibrated_by_much(real_result):
    # With the snow store calibrated, donors' sets score about as well as the basins' own in
    # the validation period (0.567-0.571 against 0.567 median NSE on these basins, measured):
    # calibration on 1990-1999 is no upper bound for 2000-2009. Asserted: no transfer beats the
    # basins' own calibration by more than 0.02.
    nse = _median_nse(real_result, "gr4j")
    transfers = nse.drop([CALIBRATED, MEDIAN])
    assert transfers.max() > nse[MEDIAN]
    assert (nse.drop(CALIBRATED) < nse[CALIBRATED] + 0.02).all()


@pytest.mark.xfail(
    strict=True,
    reason="not met: with the snow store calibrated and the NSE objective the regional median "
    "set itself scores well on these 59 basins (0.544 median NSE), and the best transfer "
    "(similarity 0.571) beats it by 0.027; even the basins' own calibration (0.567) beats it "
    "by only 0.023, so no transfer can reach the margin here (docs/validation.md)",
)
def test_gr4j_best_transfer_beats_median_by_a_tenth(real_result):
    # the target set for this dataset (issue 13): at least 0.10 of median NSE over the median
    nse = _median_nse(real_result, "gr4j")
    assert nse.drop([CALIBRATED, MEDIAN]).max() >= nse[MEDIAN] + 0.10


def test_gr4j_several_donors_beat_a_single_donor(real_result):
    # averaging the flows of several donors beats taking one donor's set (McIntyre et al. 2005,
    # Water Resour. Res. 41, W12434; Oudin et al. 2008, Water Resour. Res. 44, W03413: from
    # memory of their conclusions)
    table = real_result.runs["gr4j"].donor_counts
    assert set(table["method"]) == {"similarity", "proximity", "blended"}
    for method, rows in table.groupby("method"):
        by_count = rows.set_index("n_donors")["median_nse"]
        chosen = rows.loc[rows["chosen"], "n_donors"].item()
        assert chosen > 1, method
        assert by_count[chosen] > by_count[1], method


def test_linear_best_transfer_beats_median(real_result):
    # The one-store linear model explains little of these hydrographs (median calibrated NSE
    # about 0.27 here): its calibrated k is no upper bound in the validation period, where a
    # donor's k may score as well or a little better (docs/validation.md says so); only the
    # comparison with the regional median is asserted for it.
    nse = _median_nse(real_result, "linear")
    assert nse.drop([CALIBRATED, MEDIAN]).max() > nse[MEDIAN]


def test_gr4j_is_chosen_over_the_linear_store(real_result):
    assert real_result.chosen_model == "gr4j"
    assert real_result.chosen_method not in (CALIBRATED, MEDIAN)


def test_gr4j_calibrated_snow_beats_fixed_snow_where_snow_matters(real_result):
    # Basins of the subset with more than 20 % of precipitation as snow (the dataset's
    # frac_snow attribute): GR4J with the snow store calibrated (the chain's run) against the
    # same basins calibrated with the store held at its defaults; median validation NSE.
    from regional.calibrate import calibrate
    from regional.models import snow_parameters

    region, run_ = real_result.region, real_result.runs["gr4j"]
    snowy = region.attributes.index[region.attributes["frac_snow"] > 0.2]
    snowy = [b for b in snowy if b in run_.calibration.index]
    assert len(snowy) >= 5
    settings = real_result.settings.model
    held = calibrate(
        region.precip_mm[snowy],
        region.pet_mm[snowy],
        region.flow_mm[snowy],
        model="gr4j",
        temp_c=region.temp_c[snowy],
        objective=settings.objective,
        calibration=region.calibration,
        validation=settings.validation,
        warmup_days=settings.warmup_days,
        fixed_params={p.name: p.initial for p in snow_parameters()},
    )
    calibrated = run_.calibration.loc[snowy, "nse_validation"].median()
    assert calibrated > held["nse_validation"].median()


def test_held_out_coverage_of_the_bounds_is_reported_and_near_nominal(real_result):
    # Bounds where no gauge exists (issue 13): a tenth of the gauged basins held out of the
    # whole fit, repeated ([prediction] held_out_repeats); the pooled coverage of the chosen
    # bounds, pooled and on the lowest and highest flow deciles, after widening where a flow
    # class fell short, lies within 0.05 of the nominal level (measured on these 59 basins:
    # 0.901 pooled, 0.905 lowest decile, 0.892 highest). The region has no ungauged basin, so
    # the fitted region is built directly.
    from regional.fitted import fit_result

    fitted = fit_result(real_result)
    table = fitted.held_out.set_index("flow_class")["held_out_coverage_widened"]
    for row in ("all", "decile 1", "decile 10"):
        assert abs(table[row] - fitted.level) <= 0.05, (row, table[row])
