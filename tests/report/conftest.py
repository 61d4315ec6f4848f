"""Fixtures for the report tests: one real run of the tiny region (two models), and small fake
prediction and screening objects with the fields of :mod:`regional.predict` and
:mod:`regional.screen`, so the report is tested whether or not those stages ran."""

from __future__ import annotations

import types
from dataclasses import replace
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
import pytest
from tiny_region import make_parts, write_region

from regional.models import get_model
from regional.predicted import DailyFlows

matplotlib.use("Agg")

MODELS = ["linear", "gr4j"]


@pytest.fixture(scope="session")
def tiny_run(tmp_path_factory: pytest.TempPathFactory):
    """The pipeline's result on the tiny region with two models (about 5-10 s, once)."""
    from regional.pipeline import run

    parts = make_parts()
    parts.config["model"]["name"] = MODELS
    folder = write_region(Path(tmp_path_factory.mktemp("report")) / "region", parts)
    return run(folder)


@pytest.fixture
def bare_run(tiny_run):
    """The run without prediction, flow statistics and screening."""
    return replace(tiny_run, prediction=None, screening=None, statistics=None)


@pytest.fixture
def full_run(tiny_run):
    """The run with a fake prediction and screening."""
    return replace(
        tiny_run, prediction=fake_prediction(tiny_run), screening=fake_screening(tiny_run)
    )


def fake_prediction(result, *, seed: int = 1):
    """A prediction-shaped object for the ungauged basins of ``result`` (invented values)."""
    rng = np.random.default_rng(seed)
    ungauged = list(result.region.ungauged)
    model, method = result.chosen_model, result.chosen_method
    methods = [m for m in result.runs[model].loo.methods if m != "calibrated"]
    names = [p.name for p in get_model(model).parameters]
    table = pd.DataFrame(index=pd.Index(ungauged, name="basin_id"))
    for m in methods:
        for p in names:
            value = rng.uniform(0.05, 0.4, len(ungauged))
            table[f"{p}_{m}"] = value
            table[f"{p}_{m}_low"] = value * 0.6
            table[f"{p}_{m}_high"] = value * 1.5
    table["method"] = method
    for p in names:
        for suffix in ("", "_low", "_high"):
            table[f"{p}{suffix}"] = table[f"{p}_{method}{suffix}"]
    table["mean_flow_mm"] = rng.uniform(0.5, 3.0, len(ungauged))
    table["mean_flow_m3s"] = table["mean_flow_mm"] * 0.3
    for column in ("q5_mm", "q50_mm", "q95_mm", "min7_mean_mm"):
        table[column] = rng.uniform(0.1, 5.0, len(ungauged))
    for month in range(1, 13):
        table[f"flow_m{month:02d}_mm"] = rng.uniform(0.2, 4.0, len(ungauged))
    table["applicable"] = [i % 2 == 0 for i in range(len(ungauged))]
    table["reason"] = [
        "" if ok else "aridity 1.31 above the donors' range" for ok in table["applicable"]
    ]
    dates = result.region.dates
    flows = pd.concat(
        [
            pd.DataFrame(
                {
                    "basin_id": basin,
                    "date": dates,
                    "flow_mm": (flow := np.exp(rng.normal(0.0, 0.6, len(dates)))),
                    "flow_m3s": flow * 0.3,
                    "flow_low_mm": flow * 0.4,
                    "flow_high_mm": flow * 2.2,
                }
            )
            for basin in ungauged
        ],
        ignore_index=True,
    )
    coverage = pd.DataFrame(
        {
            "model": model,
            "method": methods,
            "level": 0.9,
            "coverage": np.linspace(0.861, 0.934, len(methods)),
            "n_days": 700,
        }
    )
    error_model = pd.DataFrame(
        {"class": [0, 1], "lower_q": [-0.8, -0.5], "upper_q": [0.7, 0.4], "n": [300, 300]}
    )
    return types.SimpleNamespace(
        model=model,
        method=method,
        level=0.9,
        table=table,
        flows=flows,
        daily=_daily(flows, result.region.attributes["area_km2"]),
        coverage=coverage,
        error_model=error_model,
        notes=("bounds from log-flow errors in 2 flow classes",),
        held_out=None,
        held_out_draws=(),
        model_statistics=None,
    )


def fake_screening(result, *, seed: int = 2):
    """A screening-shaped object ranking the ungauged basins of ``result`` (invented values)."""
    rng = np.random.default_rng(seed)
    ungauged = list(result.region.ungauged)
    reduction = rng.uniform(0.0, 0.3, len(ungauged))
    spread = rng.uniform(0.0, 0.5, len(ungauged))
    table = pd.DataFrame(
        {"score": reduction + spread, "variance_reduction": reduction, "donor_spread": spread},
        index=pd.Index(ungauged, name="basin_id"),
    ).sort_values("score", ascending=False)
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    table["reason"] = "far from the gauged basins in attribute space"
    return types.SimpleNamespace(table=table, notes=("score = variance reduction + spread",))


def _daily(flows: pd.DataFrame, area: pd.Series) -> DailyFlows:
    """The fake long table as the prediction's grids (days x basins)."""

    def grid(column: str) -> pd.DataFrame:
        return flows.pivot(index="date", columns="basin_id", values=column)

    basins = list(grid("flow_mm").columns)
    return DailyFlows(
        grid("flow_mm"), grid("flow_low_mm"), grid("flow_high_mm"), area.loc[basins].astype(float)
    )
