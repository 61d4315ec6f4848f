"""GR4J: unit hydrographs, a plain-Python reference of the equations, and the water balance."""

import math

import numpy as np
import pytest
from frozen_gr4j import frozen_gr4j_kernel
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

import regional
from regional.models import get_model
from regional.models.gr4j import (
    WARM_START_FRACTION,
    _gr4j_kernel,
    _tanh,
    unit_hydrograph_ordinates,
)

PARAMS = {"x1_mm": 320.0, "x2_mm_per_day": -0.8, "x3_mm": 70.0, "x4_days": 2.3}


def _forcing(days: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    precip = rng.gamma(0.5, 8.0, days)
    pet = 2.0 + 1.5 * np.sin(2 * np.pi * np.arange(days) / 365.25)
    return precip, pet


@pytest.mark.parametrize("x4", [0.5, 1.0, 1.37, 1.5, 2.5, 3.9, 7.25, 10.0])
def test_unit_hydrograph_ordinates_sum_to_one(x4):
    # Perrin et al. (2003), J. Hydrol. 279: UH1 and UH2 are differences of S-curves that reach 1
    # at X4 and 2 X4, so their ordinates sum to 1 and they last ceil(X4) and ceil(2 X4) days.
    uh1, uh2 = unit_hydrograph_ordinates(x4)
    assert uh1.sum() == pytest.approx(1.0, abs=1e-14)
    assert uh2.sum() == pytest.approx(1.0, abs=1e-14)
    assert len(uh1) == math.ceil(x4) and len(uh2) == math.ceil(2 * x4)
    assert (uh1 > 0).all() and (uh2 > 0).all()


def test_unit_hydrograph_ordinates_match_hand_values():
    # S-curves of Perrin et al. (2003): SH1(t) = (t/X4)^2.5 for t < X4, 1 after;
    # SH2(t) = 0.5 (t/X4)^2.5 for t <= X4, 1 - 0.5 (2 - t/X4)^2.5 for X4 < t < 2 X4, 1 after.
    # X4 = 1.5: SH1(1) = (1/1.5)^2.5 = 0.3628874, SH1(2) = 1
    #   UH1 = [0.3628874, 1 - 0.3628874 = 0.6371126]
    #   SH2(1) = 0.5 x 0.3628874 = 0.1814437; SH2(2) = 1 - 0.5 (2 - 2/1.5)^2.5 = 0.8185563
    #   UH2 = [0.1814437, 0.8185563 - 0.1814437 = 0.6371126, 1 - 0.8185563 = 0.1814437]
    uh1, uh2 = unit_hydrograph_ordinates(1.5)
    np.testing.assert_allclose(uh1, [0.3628874, 0.6371126], atol=1e-7)
    np.testing.assert_allclose(uh2, [0.1814437, 0.6371126, 0.1814437], atol=1e-7)
    # X4 = 2.5: SH1(1) = 0.4^2.5 = 0.1011929, SH1(2) = 0.8^2.5 = 0.5724334, SH1(3) = 1
    #   UH1 = [0.1011929, 0.5724334 - 0.1011929 = 0.4712405, 1 - 0.5724334 = 0.4275666]
    #   SH2(1) = 0.5 x 0.1011929 = 0.0505964; SH2(2) = 0.5 x 0.5724334 = 0.2862167;
    #   SH2(3) = 1 - 0.5 (2 - 1.2)^2.5 = 0.7137833; SH2(4) = 1 - 0.5 (2 - 1.6)^2.5 = 0.9494036
    #   UH2 = [0.0505964, 0.2356203, 0.4275666, 0.2356203, 0.0505964]
    uh1, uh2 = unit_hydrograph_ordinates(2.5)
    np.testing.assert_allclose(uh1, [0.1011929, 0.4712405, 0.4275666], atol=1e-7)
    np.testing.assert_allclose(
        uh2, [0.0505964, 0.2356203, 0.4275666, 0.2356203, 0.0505964], atol=1e-7
    )


def _reference_gr4j(precip, pet, x1, x2, x3, x4, s, r):
    """The daily equations of Perrin et al. (2003), written out in plain Python.

    Routing through the unit hydrographs is an explicit convolution of the history of
    effective rainfall, a second route to the kernel's state-shifting scheme.
    """
    uh1, uh2 = unit_hydrograph_ordinates(x4)
    pr_history, flows = [], []
    for p, e in zip(precip, pet, strict=True):
        pn, en = max(p - e, 0.0), max(e - p, 0.0)
        ps = x1 * (1 - (s / x1) ** 2) * math.tanh(pn / x1) / (1 + s / x1 * math.tanh(pn / x1))
        es = s * (2 - s / x1) * math.tanh(en / x1) / (1 + (1 - s / x1) * math.tanh(en / x1))
        s = s + ps - es
        perc = s * (1 - (1 + (4 / 9 * s / x1) ** 4) ** -0.25)
        s -= perc
        pr_history.insert(0, perc + pn - ps)
        q9 = sum(0.9 * o * q for o, q in zip(uh1, pr_history, strict=False))
        q1 = sum(0.1 * o * q for o, q in zip(uh2, pr_history, strict=False))
        f = x2 * (r / x3) ** 3.5
        r = max(0.0, r + q9 + f)
        qr = r * (1 - (1 + (r / x3) ** 4) ** -0.25)
        r -= qr
        flows.append(qr + max(0.0, q1 + f))
    return np.array(flows)


@pytest.mark.parametrize(
    "params",
    [PARAMS, {"x1_mm": 80.0, "x2_mm_per_day": 1.5, "x3_mm": 25.0, "x4_days": 0.7}],
)
def test_kernel_agrees_with_plain_reference_of_the_equations(params):
    # Reference: the equations of Perrin et al. (2003) stepped in plain Python (above).
    precip, pet = _forcing(400, seed=1)
    total = 0.3 * (params["x1_mm"] + params["x3_mm"])
    result = regional.simulate("gr4j", precip, pet, params, initial_storage=total)
    expected = _reference_gr4j(
        precip,
        pet,
        params["x1_mm"],
        params["x2_mm_per_day"],
        params["x3_mm"],
        params["x4_days"],
        0.3 * params["x1_mm"],
        0.3 * params["x3_mm"],
    )
    np.testing.assert_allclose(result.flow[:, 0], expected, rtol=1e-10, atol=1e-12)


def test_one_rain_pulse_leaves_through_both_unit_hydrographs():
    # Hand computation with the equations of Perrin et al. (2003), empty stores, no PET, X2 = 0:
    # Ps = X1 tanh(P / X1) (s = 0), Perc = S [1 - (1 + (4/9 S / X1)^4)^(-1/4)], Pr = P - Ps + Perc;
    # 90 % of Pr enters the routing store through UH1, 10 % leaves as Qd through UH2. A large
    # X3 makes Qr negligible and a large X1 makes the later percolation < 1 % of Pr.
    params = {"x1_mm": 2000.0, "x2_mm_per_day": 0.0, "x3_mm": 1000.0, "x4_days": 2.5}
    days = 8
    precip = np.zeros(days)
    precip[0] = 200.0
    columns = {name: np.array([value]) for name, value in params.items()}
    stores = get_model("gr4j").run_stores(
        precip[:, None], np.zeros((days, 1)), columns, np.zeros(1)
    )
    ps = 2000.0 * math.tanh(200.0 / 2000.0)
    perc = ps * (1 - (1 + (4 / 9 * ps / 2000.0) ** 4) ** -0.25)
    pr = 200.0 - ps + perc
    uh1, uh2 = unit_hydrograph_ordinates(2.5)
    assert stores.production[0, 0] == pytest.approx(ps - perc, rel=1e-12)
    assert stores.routing[0, 0] == pytest.approx(0.9 * pr * uh1[0], rel=1e-12)
    assert stores.flow[0, 0] == pytest.approx(0.1 * pr * uh2[0], rel=1e-12)
    np.testing.assert_allclose(stores.flow[:5, 0], 0.1 * pr * uh2, rtol=1e-2)
    np.testing.assert_allclose(stores.routing[2:, 0], 0.9 * pr, rtol=1e-2)
    assert (stores.flow[5:, 0] < 1e-2 * stores.flow[:5, 0].min()).all()


forcing = arrays(np.float64, 200, elements=st.floats(0.0, 80.0))
pets = arrays(np.float64, 200, elements=st.floats(0.0, 8.0))
temps = arrays(np.float64, 200, elements=st.floats(-15.0, 15.0))
gr4j_sets = st.fixed_dictionaries(
    {
        "x1_mm": st.floats(10.0, 2000.0),
        "x2_mm_per_day": st.floats(-10.0, 5.0),
        "x3_mm": st.floats(5.0, 1000.0),
        "x4_days": st.floats(0.5, 10.0),
    }
)


def _balance_error(result, precip):
    stored = result.storage[-1] - result.initial_storage
    if result.snowpack is not None:
        stored = stored + result.snowpack[-1]
    gained = result.exchange.sum(axis=0)
    closing = precip.sum() + gained - result.aet.sum(axis=0) - result.flow.sum(axis=0) - stored
    scale = max(precip.sum() + np.abs(result.exchange).sum(), 1.0)
    return np.abs(closing) / scale


@settings(max_examples=60, deadline=None)
@given(precip=forcing, pet=pets, params=gr4j_sets, share=st.floats(0.0, 1.0))
def test_water_balance_closes_with_exchange_and_both_stores(precip, pet, params, share):
    # sum(P) + sum(exchange) = sum(AET) + sum(Q) + d(production + routing + UH transit).
    start = share * (params["x1_mm"] + params["x3_mm"])
    result = regional.simulate("gr4j", precip, pet, params, initial_storage=start)
    assert _balance_error(result, precip).max() < 1e-9
    assert (result.aet <= pet[:, None] + 1e-12).all()
    assert (result.flow >= 0).all()
    assert (result.storage >= 0).all()
    columns = {name: np.array([value]) for name, value in params.items()}
    stores = get_model("gr4j").run_stores(
        precip[:, None], pet[:, None], columns, np.array([start])
    )
    assert (stores.production >= 0).all() and (stores.production <= params["x1_mm"]).all()
    assert (stores.routing >= 0).all()
    assert (stores.storage >= stores.production + stores.routing - 1e-9).all()
    assert (np.sign(stores.exchange) * np.sign(params["x2_mm_per_day"]) >= 0).all()


@settings(max_examples=40, deadline=None)
@given(precip=forcing, pet=pets, temp=temps, params=gr4j_sets)
def test_water_balance_closes_with_snow_pack(precip, pet, temp, params):
    result = regional.simulate("gr4j", precip, pet, params, temp=temp)
    assert _balance_error(result, precip).max() < 1e-9
    assert (result.snowpack >= 0).all()


def test_no_flow_from_precipitation_while_every_day_is_below_threshold():
    # Degree-day snow store (Martinec 1960) in front: below both thresholds all precipitation
    # stays in the pack, so with empty stores and no exchange (X2 = 0) nothing flows.
    days = 120
    precip, pet = _forcing(days, seed=2)
    params = {**PARAMS, "x2_mm_per_day": 0.0, "snow_threshold_c": 1.0, "melt_threshold_c": 0.0}
    result = regional.simulate(
        "gr4j", precip, pet, params, temp=np.full(days, -4.0), initial_storage=0.0
    )
    assert (result.flow == 0).all()
    assert (result.storage == 0).all() and (result.aet == 0).all()
    np.testing.assert_allclose(result.snowpack[:, 0], np.cumsum(precip), rtol=1e-12)
    assert (result.exchange == 0).all()


def test_many_sets_in_one_call_equal_one_at_a_time():
    rng = np.random.default_rng(5)
    precip, pet = rng.gamma(0.5, 6.0, (500, 3)), rng.uniform(0, 4, (500, 3))
    params = {
        "x1_mm": np.array([50.0, 400.0, 1500.0]),
        "x2_mm_per_day": np.array([-3.0, 0.0, 2.0]),
        "x3_mm": np.array([10.0, 90.0, 600.0]),
        "x4_days": np.array([0.6, 1.7, 8.2]),
    }
    together = regional.simulate("gr4j", precip, pet, params, warmup_days=50)
    for j in range(3):
        alone = regional.simulate(
            "gr4j", precip[:, j], pet[:, j], {name: v[j] for name, v in params.items()}
        )
        np.testing.assert_allclose(together.flow[:, j], alone.flow[:, 0], rtol=1e-13)
        np.testing.assert_allclose(together.exchange[:, j], alone.exchange[:, 0], rtol=1e-13)
    assert together.scored_flow.shape == (450, 3)


def test_default_and_explicit_initial_storage():
    precip, pet = _forcing(30)
    capacity = PARAMS["x1_mm"] + PARAMS["x3_mm"]
    default = regional.simulate("gr4j", precip, pet, PARAMS)
    assert default.initial_storage[0] == pytest.approx(WARM_START_FRACTION * capacity)
    half = regional.simulate("gr4j", precip, pet, PARAMS, initial_storage=0.5 * capacity)
    np.testing.assert_array_equal(default.flow, half.flow)
    # More than both stores hold is capped at X1 + X3 (both full) and reported as used.
    full = regional.simulate("gr4j", precip, pet, PARAMS, initial_storage=1e6)
    assert full.initial_storage[0] == pytest.approx(capacity)
    model = get_model("gr4j")
    columns = {name: np.array([value]) for name, value in PARAMS.items()}
    s0, r0 = model.split_storage(np.array([0.25 * capacity]), columns)
    assert s0[0] == pytest.approx(0.25 * PARAMS["x1_mm"])
    assert r0[0] == pytest.approx(0.25 * PARAMS["x3_mm"])


def test_linear_model_reports_no_exchange():
    result = regional.simulate("linear", [1.0, 2.0], [0.5, 0.5], {"k_per_day": 0.1})
    assert result.exchange is None


def test_parameter_table_declares_units_bounds_and_transforms():
    table = {p.name: p for p in get_model("gr4j").parameters}
    assert list(table) == ["x1_mm", "x2_mm_per_day", "x3_mm", "x4_days"]
    assert [table[n].unit for n in table] == ["mm", "mm/day", "mm", "day"]
    assert [table[n].transform for n in table] == ["log", "identity", "log", "log"]
    for parameter in table.values():
        assert parameter.lower < parameter.initial < parameter.upper
    assert "gr4j" in regional.models.model_names()


@pytest.mark.parametrize(
    ("params", "match"),
    [
        ({**PARAMS, "x1_mm": 5.0}, r"parameter x1_mm = 5.0 mm is outside its bounds"),
        ({**PARAMS, "x2_mm_per_day": -20.0}, r"parameter x2_mm_per_day = -20.0 mm/day"),
        ({**PARAMS, "x3_mm": np.nan}, r"parameter x3_mm = nan mm is outside"),
        ({**PARAMS, "x4_days": 12.0}, r"parameter x4_days = 12.0 day is outside"),
        ({k: v for k, v in PARAMS.items() if k != "x4_days"}, "missing parameter 'x4_days'"),
        ({**PARAMS, "k_per_day": 0.1}, r"unknown parameter\(s\) \['k_per_day'\]"),
    ],
)
def test_bad_input_raises_value_error_naming_the_parameter(params, match):
    with pytest.raises(ValueError, match=match):
        regional.simulate("gr4j", [1.0, 2.0], [0.5, 0.5], params)


def test_bad_unit_hydrograph_time_base_raises():
    with pytest.raises(ValueError, match=r"x4_days must be finite and > 0 days: got -1.0"):
        unit_hydrograph_ordinates(-1.0)


def test_kernel_tanh_matches_numpy():
    # Reference: numpy.tanh; the kernel uses tanh(x) = -expm1(-2x) / (2 + expm1(-2x)), x >= 0.
    x = np.concatenate([[0.0, 1e-300, 1e-12], np.geomspace(1e-8, 800.0, 400)])
    np.testing.assert_allclose([_tanh(v) for v in x], np.tanh(x), rtol=4e-16, atol=0)


@settings(max_examples=40, deadline=None)
@given(
    precip=forcing,
    pet=pets,
    sets=st.lists(gr4j_sets, min_size=1, max_size=4),
    share=st.floats(0.0, 1.0),
    detail=st.booleans(),
)
def test_kernel_equals_the_frozen_kernel(precip, pet, sets, share, detail):
    # Second route: the kernel as it stood before it was optimised (tests/models/frozen_gr4j.py).
    names = ("x1_mm", "x2_mm_per_day", "x3_mm", "x4_days")
    x1, x2, x3, x4 = (np.array([s[name] for s in sets]) for name in names)
    s0, r0 = share * x1, share * x3
    n, days = len(sets), len(precip)
    shape = (days, n) if detail else (0, 0)
    outputs = []
    for kernel in (_gr4j_kernel, frozen_gr4j_kernel):
        out = [np.empty((days, n)) for _ in range(4)] + [np.empty(shape), np.empty(shape)]
        kernel(precip[:, None], pet[:, None], x1, x2, x3, x4, s0.copy(), r0.copy(), *out)
        outputs.append(out)
    for new, old in zip(*outputs, strict=True):
        np.testing.assert_allclose(new, old, rtol=1e-10, atol=1e-10)
