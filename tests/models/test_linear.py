"""Linear reservoir: analytic solutions, a reference integrator and properties of the balance."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.integrate import solve_ivp

import regional
from regional.models import LinearReservoir, get_model


def test_recession_follows_exponential_decay():
    # Analytic solution of dS/dt = -kS (linear reservoir recession): S(t) = S0 exp(-k t), so the
    # flow over day i is S0 (exp(-k i) - exp(-k (i + 1))).
    k, s0, days = 0.08, 50.0, 60
    zeros = np.zeros(days)
    result = regional.simulate("linear", zeros, zeros, {"k_per_day": k}, initial_storage=s0)
    t = np.arange(days)
    expected_flow = s0 * (np.exp(-k * t) - np.exp(-k * (t + 1)))
    np.testing.assert_allclose(result.flow[:, 0], expected_flow, rtol=1e-12)
    np.testing.assert_allclose(result.storage[:, 0], s0 * np.exp(-k * (t + 1)), rtol=1e-12)


def test_constant_input_drives_storage_to_input_over_k():
    # Steady state of dS/dt = I - kS: S = I / k and Q = I (analytic).
    k, inflow, days = 0.3, 4.0, 200
    result = regional.simulate(
        "linear", np.full(days, inflow), np.zeros(days), {"k_per_day": k}, initial_storage=0.0
    )
    assert result.storage[-1, 0] == pytest.approx(inflow / k, rel=1e-12)
    assert result.flow[-1, 0] == pytest.approx(inflow, rel=1e-12)


def test_simple_store_agrees_with_solve_ivp_while_store_never_empties():
    # Reference: scipy.integrate.solve_ivp (DOP853, tight tolerances) on dS/dt = P - E - kS with
    # the same piecewise-constant daily forcing; the store stays full so ET is never limited.
    rng = np.random.default_rng(3)
    days, k, s0 = 120, 0.12, 80.0
    precip = rng.uniform(1.0, 6.0, days)
    pet = rng.uniform(0.5, 2.0, days)
    result = regional.simulate(
        "linear_potential_et", precip, pet, {"k_per_day": k}, initial_storage=s0
    )
    state = s0
    for day in range(days):
        solution = solve_ivp(
            lambda _t, s, d=day: precip[d] - pet[d] - k * s,
            (0.0, 1.0),
            [state],
            method="DOP853",
            rtol=1e-12,
            atol=1e-12,
        )
        state = solution.y[0, -1]
        assert result.storage[day, 0] == pytest.approx(state, rel=1e-9)
    assert (result.aet[:, 0] == pet).all()


def test_simple_store_empties_within_a_step_exactly():
    # Hand solution: S0 = 1 mm, P = 0, E = 5 mm/day, k = 0.5: S(t) = (S0 + E/k) e^{-kt} - E/k hits
    # zero at t* = ln(1 + k S0 / E) / k; ET over the day is E t*, flow is S0 - E t*.
    k, s0, e = 0.5, 1.0, 5.0
    result = regional.simulate(
        "linear_potential_et", [0.0], [e], {"k_per_day": k}, initial_storage=s0
    )
    t_empty = np.log1p(k * s0 / e) / k
    assert result.storage[0, 0] == 0.0
    assert result.aet[0, 0] == pytest.approx(e * t_empty, rel=1e-12)
    assert result.flow[0, 0] == pytest.approx(s0 - e * t_empty, rel=1e-12)


def _simple_store_reference(precip, pet, k, s0):
    """The simple store's daily step written out in plain Python (E at the potential rate)."""
    flow, aet, storage = [], [], []
    s = s0
    for p, e in zip(precip, pet, strict=True):
        r = p - e
        s_end = s * math.exp(-k) + r * -math.expm1(-k) / k
        e_actual = e
        if s_end < 0.0:
            e_actual = p - r * math.log1p(k * s / -r) / k
            s_end = 0.0
        flow.append(s + p - e_actual - s_end)
        aet.append(e_actual)
        storage.append(s_end)
        s = s_end
    return np.array(flow), np.array(aet), np.array(storage)


def test_simple_store_is_the_potential_rate_store_step_for_step():
    # linear_potential_et keeps the store as it was before evapotranspiration declined with
    # storage: compared with the plain-Python step above on forcing that empties it often.
    rng = np.random.default_rng(11)
    precip, pet = rng.gamma(0.4, 5.0, 730), rng.uniform(0.0, 5.0, 730)
    result = regional.simulate(
        "linear_potential_et", precip, pet, {"k_per_day": 0.2}, initial_storage=5.0
    )
    flow, aet, storage = _simple_store_reference(precip, pet, 0.2, 5.0)
    assert (storage == 0.0).mean() > 0.2  # the simple store runs dry on many days
    np.testing.assert_allclose(result.flow[:, 0], flow, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(result.aet[:, 0], aet, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(result.storage[:, 0], storage, rtol=1e-12, atol=1e-12)


def test_below_reference_storage_decays_with_k_plus_pet_over_s_ref():
    # Analytic solution of dS/dt = -(k + E / S_ref) S below S_ref (no rain): S = S0 e^{-a t},
    # a = k + E / S_ref; the water leaving splits between flow and AET as k : E / S_ref.
    model = get_model("linear")
    s_ref = model.evaporation_reference_mm
    k, e, s0, days = 0.05, 3.0, 0.8 * s_ref, 10
    result = regional.simulate(
        "linear", np.zeros(days), np.full(days, e), {"k_per_day": k}, initial_storage=s0
    )
    a = k + e / s_ref
    t = np.arange(days)
    lost = s0 * (np.exp(-a * t) - np.exp(-a * (t + 1)))
    np.testing.assert_allclose(result.storage[:, 0], s0 * np.exp(-a * (t + 1)), rtol=1e-12)
    np.testing.assert_allclose(result.flow[:, 0], lost * k / a, rtol=1e-12)
    np.testing.assert_allclose(result.aet[:, 0], lost * (e / s_ref) / a, rtol=1e-12)
    assert (result.storage > 0).all()  # the store never empties: flow never stops


def test_agrees_with_solve_ivp_across_the_reference_storage():
    # Reference: scipy.integrate.solve_ivp (DOP853, tight tolerances) on
    # dS/dt = P - PET min(1, S / S_ref) - k S, with cumulative AET and flow as extra states,
    # on forcing that takes the store above and below S_ref many times.
    s_ref = get_model("linear").evaporation_reference_mm
    rng = np.random.default_rng(7)
    days, k = 90, 0.15
    precip = np.where(rng.uniform(size=days) < 0.35, rng.gamma(0.8, 12.0, days), 0.0)
    pet = rng.uniform(1.0, 5.0, days)
    result = regional.simulate("linear", precip, pet, {"k_per_day": k}, initial_storage=2 * s_ref)
    crossed = np.diff(result.storage[:, 0] > s_ref)
    assert crossed.sum() >= 4  # the test really crosses S_ref both ways

    def rhs(_t, y, p, e):
        evaporation = e * min(1.0, y[0] / s_ref)
        return [p - evaporation - k * y[0], evaporation, k * y[0]]

    state = 2 * s_ref
    for day in range(days):
        solution = solve_ivp(
            rhs, (0.0, 1.0), [state, 0.0, 0.0], method="DOP853", rtol=1e-12, atol=1e-12,
            args=(precip[day], pet[day]),
        )  # fmt: skip
        state, aet, flow = solution.y[:, -1]
        assert result.storage[day, 0] == pytest.approx(state, rel=1e-8)
        assert result.aet[day, 0] == pytest.approx(aet, rel=1e-7, abs=1e-10)
        assert result.flow[day, 0] == pytest.approx(flow, rel=1e-7, abs=1e-10)


forcing = arrays(np.float64, 200, elements=st.floats(0.0, 60.0))
pets = arrays(np.float64, 200, elements=st.floats(0.0, 8.0))
temps = arrays(np.float64, 200, elements=st.floats(-15.0, 15.0))
ks = st.floats(0.001, 1.5)


def _balance_error(result, precip):
    stored = result.storage[-1] - result.initial_storage
    if result.snowpack is not None:
        stored = stored + result.snowpack[-1]
    closing = precip.sum() - result.aet.sum(axis=0) - result.flow.sum(axis=0) - stored
    return np.abs(closing) / max(precip.sum(), 1.0)


@pytest.mark.parametrize("model", ["linear", "linear_potential_et"])
@settings(max_examples=60, deadline=None)
@given(precip=forcing, pet=pets, k=ks, s0=st.floats(0.0, 500.0))
def test_water_balance_closes_and_stays_physical(model, precip, pet, k, s0):
    result = regional.simulate(model, precip, pet, {"k_per_day": k}, initial_storage=s0)
    assert _balance_error(result, precip).max() < 1e-9
    assert (result.storage >= 0).all()
    assert (result.aet <= pet[:, None] * (1 + 1e-12) + 1e-12).all()
    assert (result.flow >= -1e-9).all()


@pytest.mark.parametrize("model", ["linear", "linear_potential_et"])
@settings(max_examples=40, deadline=None)
@given(precip=forcing, pet=pets, temp=temps, k=ks)
def test_water_balance_closes_with_snow_pack(model, precip, pet, temp, k):
    result = regional.simulate(model, precip, pet, {"k_per_day": k}, temp=temp)
    assert _balance_error(result, precip).max() < 1e-9
    assert (result.snowpack >= 0).all()


@settings(max_examples=40, deadline=None)
@given(k_low=st.floats(0.001, 1.0), factor=st.floats(1.01, 1.5), s0=st.floats(1.0, 500.0))
def test_larger_k_never_gives_slower_recession(k_low, factor, s0):
    zeros = np.zeros(30)
    k_pair = np.array([k_low, min(k_low * factor, 1.5)])
    result = regional.simulate("linear", zeros, zeros, {"k_per_day": k_pair}, initial_storage=s0)
    assert (result.storage[:, 1] <= result.storage[:, 0] + 1e-12).all()


def test_many_sets_in_one_call_equal_one_at_a_time():
    rng = np.random.default_rng(5)
    precip, pet = rng.gamma(0.5, 6.0, (300, 4)), rng.uniform(0, 4, (300, 4))
    k = np.array([0.01, 0.1, 0.5, 1.2])
    together = regional.simulate("linear", precip, pet, {"k_per_day": k}, warmup_days=30)
    for j in range(4):
        alone = regional.simulate("linear", precip[:, j], pet[:, j], {"k_per_day": k[j]})
        np.testing.assert_allclose(together.flow[:, j], alone.flow[:, 0], rtol=1e-13)
    assert together.scored_flow.shape == (270, 4)


def test_default_initial_storage_is_equilibrium_of_net_input():
    # Steady states (analytic): above S_ref, S = (P - E) / k; below it, S = P / (k + E / S_ref).
    precip, pet = np.full(400, 3.0), np.full(400, 1.0)
    for model in ("linear", "linear_potential_et"):
        result = regional.simulate(model, precip, pet, {"k_per_day": 0.05})
        assert result.initial_storage[0] == pytest.approx(2.0 / 0.05)  # above S_ref
        np.testing.assert_allclose(result.flow[:, 0], 2.0, rtol=1e-12)
    s_ref = get_model("linear").evaporation_reference_mm
    k = 1.0 / s_ref  # P < E: the steady state lies below S_ref, at P / (k + E / S_ref) = S_ref / 4
    dry = regional.simulate("linear", np.full(400, 0.5), np.full(400, 1.0), {"k_per_day": k})
    assert dry.initial_storage[0] == pytest.approx(s_ref / 4)
    np.testing.assert_allclose(dry.flow[:, 0], k * dry.initial_storage[0], rtol=1e-12)


def test_reference_storage_must_be_finite_and_not_negative():
    with pytest.raises(ValueError, match="evaporation_reference_mm must be finite and >= 0"):
        LinearReservoir("bad", evaporation_reference_mm=-1.0)


def test_parameter_table_declares_units_bounds_and_log_transform():
    (k,) = get_model("linear").parameters
    assert (k.name, k.unit, k.transform) == ("k_per_day", "1/day", "log")
    assert k.lower < k.initial < k.upper
    assert k.inverse(k.forward(0.2)) == pytest.approx(0.2)


@pytest.mark.parametrize(
    ("precip", "pet", "params", "match"),
    [
        ([1.0, np.nan], [1.0, 1.0], {"k_per_day": 0.1}, "precip must be finite and >= 0"),
        ([1.0, -2.0], [1.0, 1.0], {"k_per_day": 0.1}, r"precip .* found -2.0 at step 1"),
        ([1.0, 2.0], [1.0], {"k_per_day": 0.1}, "differ in length"),
        ([1.0, 2.0], [1.0, 1.0], {"k_per_day": 3.0}, r"k_per_day = 3.0 1/day is outside"),
        ([1.0, 2.0], [1.0, 1.0], {}, "missing parameter 'k_per_day'"),
        ([1.0, 2.0], [1.0, 1.0], {"k_per_day": 0.1, "x": 1}, "unknown parameter"),
    ],
)
def test_bad_input_raises_clear_value_error(precip, pet, params, match):
    with pytest.raises(ValueError, match=match):
        regional.simulate("linear", precip, pet, params)


def test_unknown_model_lists_available_ones():
    with pytest.raises(ValueError, match="available models are linear"):
        regional.simulate("nope", [1.0], [1.0], {"k_per_day": 0.1})
