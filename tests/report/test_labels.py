"""Labels and units of report columns, and flows in the report's unit."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from regional.models import get_model
from regional.report.labels import COLUMN_LABELS, column_label, flow_in_unit, parameter_labels


@pytest.mark.parametrize(
    ("column", "label", "unit"),
    [
        ("share_nse_gt_0_5", "Share with NSE > 0.5", "-"),
        ("mahalanobis_d2", "Mahalanobis distance squared", "-"),
        ("area_km2", "Area", "km2"),
        ("awc_mm", "Awc", "mm"),  # a user's overlay field: unit from its name
        ("runoff_m3s", "Runoff", "m3/s"),
        ("forest_pct", "Forest", "%"),
        ("geology", "Geology", ""),
    ],
)
def test_column_label(column, label, unit):
    assert column_label(column) == (label, unit)


def test_table_labels_come_first():
    assert column_label("mean_flow", extra={"mean_flow": ("Mean flow", "m3/s")}) == (
        "Mean flow",
        "m3/s",
    )


def test_every_label_is_text():
    for name, (label, unit) in COLUMN_LABELS.items():
        assert label and isinstance(unit, str), name


def test_parameter_labels_from_the_model_table():
    labels = parameter_labels(get_model("gr4j").parameters)
    assert labels["x4_days"][1] == "day"
    assert labels["x4_days"][0].startswith("GR4J X4")


def test_flow_in_m3s_through_the_area():
    # 1 mm/day over 86.4 km2 is 86,400 m3/day = 1 m3/s (worked here)
    flow = pd.Series([1.0, 2.0], index=["A", "B"])
    area = pd.Series([86.4, 43.2], index=["B", "A"])
    np.testing.assert_allclose(flow_in_unit(flow, area, "m3/s"), [0.5, 2.0])  # by index
    np.testing.assert_allclose(flow_in_unit(np.array([2.0]), 86.4, "m3/s"), [2.0])
    assert flow_in_unit(flow, area, "mm/day") is flow
    frame = pd.DataFrame({"Jan": [1.0, 2.0], "Feb": [3.0, 4.0]}, index=["A", "B"])
    converted = flow_in_unit(frame, area, "m3/s")
    np.testing.assert_allclose(converted.to_numpy(), [[0.5, 1.5], [2.0, 4.0]])
    with pytest.raises(ValueError, match="flow unit must be one of"):
        flow_in_unit(flow, area, "l/s")
