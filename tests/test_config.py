"""Tests of regional.config: region.toml -> Settings."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from tiny_region import to_toml

from regional.config import SECTIONS, Settings, load_settings
from regional.errors import InputError

MINIMAL = {
    "basins": {"path": "b.gpkg", "id": "basin_id"},
    "series": {
        "path": "s.csv",
        "id": "basin_id",
        "date": "date",
        "precip": "precip_mm",
        "pet": "pet_mm",
        "flow": "flow_mm",
    },
}


def write(tmp_path: Path, config: dict | str) -> Path:
    text = config if isinstance(config, str) else to_toml(config)
    path = tmp_path / "region.toml"
    path.write_text(text, encoding="utf-8")
    return path


def with_(section: str, **keys) -> dict:
    config = {name: dict(table) for name, table in MINIMAL.items()}
    config.setdefault(section, {}).update(keys)
    return config


def test_full_example_from_docs_parses(tmp_path):
    text = (Path(__file__).parents[1] / "docs" / "config.md").read_text(encoding="utf-8")
    example = text.split("```toml", 1)[1].split("```", 1)[0]
    settings = load_settings(write(tmp_path, example))
    assert isinstance(settings, Settings)
    assert settings.model.names == ("linear",)
    assert settings.overlays[0].fields == ("sand_frac", "awc_mm")
    assert settings.transfer.methods == ("regression", "similarity", "proximity")


def test_folder_or_file_and_paths_resolved_relative_to_toml(tmp_path):
    write(tmp_path, with_("output", folder="out/here"))
    from_folder = load_settings(tmp_path)
    from_file = load_settings(tmp_path / "region.toml")
    assert from_folder == from_file
    assert from_folder.basins.path == (tmp_path / "b.gpkg").resolve()
    assert from_folder.series.path.is_absolute()
    assert from_folder.output.folder == (tmp_path / "out" / "here").resolve()
    assert from_folder.folder == tmp_path.resolve()


def test_defaults(tmp_path):
    settings = load_settings(write(tmp_path, MINIMAL))
    assert settings.region.name == tmp_path.name
    assert settings.basins.layer is None and settings.basins.area is None
    assert settings.overlays == () and settings.raster is None
    model = settings.model
    assert (model.names, model.snow, model.objective, model.warmup_days) == (
        ("linear",),
        "auto",
        "nse",
        365,
    )
    assert model.calibration is None and model.validation is None
    transfer = settings.transfer
    assert transfer.attributes is None
    assert transfer.methods == ("regression", "similarity", "proximity")
    assert (transfer.donors, transfer.power, transfer.combine, transfer.exclude_overlap) == (
        tuple(range(1, 11)),
        1.0,
        "output",
        0.5,
    )
    assert settings.prediction.level == 0.9
    assert settings.screening.candidates is None
    assert settings.compute.scheduler is None and settings.compute.workers is None
    assert settings.output.folder == (tmp_path / "results").resolve()
    assert settings.series.flow_column == "flow_mm" and settings.series.flow_unit == "mm/day"


@pytest.mark.parametrize(
    ("value", "expected"),
    [(7, 7), ("auto", tuple(range(1, 11))), ([10, 1, 3], (1, 3, 10))],
)
def test_donors_fixed_auto_or_candidate_list(tmp_path, value, expected):
    settings = load_settings(write(tmp_path, with_("transfer", donors=value)))
    assert settings.transfer.donors == expected


def test_model_name_string_or_list_and_dates(tmp_path):
    config = with_(
        "model",
        name=["linear", "gr4j"],
        calibration=["2001-01-01", "2005-12-31"],
        validation=["2006-01-01", "2008-12-31"],
        initial_storage_mm=20,
    )
    model = load_settings(write(tmp_path, config)).model
    assert model.names == ("linear", "gr4j") and model.name == "linear"
    assert model.calibration == (pd.Timestamp("2001-01-01"), pd.Timestamp("2005-12-31"))
    assert model.initial_storage_mm == 20.0


def test_toml_native_dates_and_boolean_snow(tmp_path):
    config = with_("series", temp="temp_c")
    text = to_toml(config) + "[model]\nsnow = false\ncalibration = [2001-01-01, 2001-12-31]\n"
    model = load_settings(write(tmp_path, text)).model
    assert model.snow == "false"
    assert model.use_snow(has_temperature=True) is False
    assert model.calibration == (pd.Timestamp("2001-01-01"), pd.Timestamp("2001-12-31"))


def test_use_snow_auto_follows_temperature(tmp_path):
    model = load_settings(write(tmp_path, MINIMAL)).model
    assert model.use_snow(has_temperature=True) and not model.use_snow(has_temperature=False)


def test_flow_in_m3s(tmp_path):
    config = with_("series")
    config["series"] = {**config["series"], "flow_m3s": "q_m3s"}
    del config["series"]["flow"]
    series = load_settings(write(tmp_path, config)).series
    assert (series.flow_column, series.flow_unit) == ("q_m3s", "m3/s")


def test_unknown_key_suggests_nearest(tmp_path):
    with pytest.raises(
        InputError, match=r"unknown key 'dnors' in \[transfer\].*did you mean 'donors'"
    ):
        load_settings(write(tmp_path, with_("transfer", dnors=3)))


def test_unknown_section_suggests_nearest(tmp_path):
    config = {**MINIMAL, "modle": {"name": "linear"}}
    with pytest.raises(InputError, match=r"unknown section \[modle\].*did you mean 'model'"):
        load_settings(write(tmp_path, config))


def test_missing_required_key_names_section_and_key(tmp_path):
    config = with_("series")
    del config["series"]["precip"]
    with pytest.raises(InputError, match=r"missing required key 'precip' in \[series\]"):
        load_settings(write(tmp_path, config))


def test_missing_required_section(tmp_path):
    with pytest.raises(InputError, match=r"missing section \[basins\].*'path', 'id'"):
        load_settings(write(tmp_path, {"series": MINIMAL["series"]}))


@pytest.mark.parametrize(
    ("section", "key", "value", "pattern"),
    [
        ("transfer", "donors", "five", r"'donors'.*whole number >= 1; found 'five'"),
        ("transfer", "donors", 0, r"'donors'.*whole number >= 1; found 0.*\"auto\""),
        ("transfer", "donors", [3, 0], r"'donors'.*whole numbers >= 1; found \[3, 0\]"),
        ("transfer", "donors", [3, 3], r"'donors'.*not repeat a donor count"),
        ("transfer", "donors", [], r"'donors'.*whole numbers >= 1; found \[\]"),
        ("model", "objective", "kgee", r"'objective'.*one of 'kge', 'nse', 'log_nse'.*'kge'\?"),
        ("model", "name", "gr5j", r"'name'.*'linear', 'gr4j'.*found 'gr5j'"),
        ("model", "snow", "maybe", r"'snow'.*'auto', 'true', 'false'"),
        ("transfer", "combine", "mean", r"'combine'.*'output', 'parameter'"),
        ("transfer", "methods", ["regression", "nearest"], r"'methods'.*found 'nearest'"),
        ("transfer", "exclude_overlap", 1.5, r"'exclude_overlap'.*\[0, 1\]; found 1.5"),
        ("prediction", "level", 1.0, r"'level'.*\(0, 1\); found 1.0"),
        ("model", "calibration", ["2001-01-01"], r"'calibration'.*\[start, end\] pair"),
        ("model", "calibration", ["2001-13-01", "2002-01-01"], r"ISO calendar dates.*2001-13-01"),
        ("model", "calibration", ["2002-01-01", "2001-01-01"], r"end must not come before"),
        (
            "screening",
            "candidates",
            [101, 102],
            r"'candidates'.*list of texts; found \[101, 102\]",
        ),
        ("compute", "workers", 2.5, r"'workers'.*whole number"),
        ("compute", "scheduler", "tcp://a b", r"'scheduler'.*without spaces"),
        ("basins", "layer", "", r"'layer'.*non-empty text"),
    ],
)
def test_wrong_values_name_key_value_and_allowed(tmp_path, section, key, value, pattern):
    with pytest.raises(InputError, match=pattern):
        load_settings(write(tmp_path, with_(section, **{key: value})))


def test_overlapping_periods_rejected(tmp_path):
    config = with_(
        "model", calibration=["2001-01-01", "2005-12-31"], validation=["2005-01-01", "2006-12-31"]
    )
    with pytest.raises(InputError, match=r"validation period 2005-01-01..2006-12-31 overlaps"):
        load_settings(write(tmp_path, config))


def test_both_or_neither_flow_column_rejected(tmp_path):
    config = with_("series", flow_m3s="q")
    with pytest.raises(InputError, match=r"exactly one observed-flow column.*found both"):
        load_settings(write(tmp_path, config))
    del config["series"]["flow"], config["series"]["flow_m3s"]
    with pytest.raises(InputError, match=r"found neither"):
        load_settings(write(tmp_path, config))


def test_overlays_need_double_brackets(tmp_path):
    config = {**MINIMAL, "overlays": {"path": "s.gpkg", "fields": ["a"]}}
    with pytest.raises(InputError, match=r"must be written \[\[overlays\]\]"):
        load_settings(write(tmp_path, config))


def test_overlay_unknown_key(tmp_path):
    config = {**MINIMAL, "overlays": [{"path": "s.gpkg", "fields": ["a"], "feilds": ["b"]}]}
    with pytest.raises(InputError, match=r"unknown key 'feilds' in \[overlays\].*'fields'"):
        load_settings(write(tmp_path, config))


def test_prediction_method_and_model_must_be_in_use(tmp_path):
    config = with_("prediction", method="similarity")
    config["transfer"] = {"methods": ["regression"]}
    with pytest.raises(InputError, match=r"'method' in \[prediction\].*'similarity'"):
        load_settings(write(tmp_path, config))
    config = with_("prediction", model="gr4j")
    with pytest.raises(InputError, match=r"'model' in \[prediction\].*'gr4j'"):
        load_settings(write(tmp_path, config))


def test_snow_true_needs_temperature(tmp_path):
    with pytest.raises(InputError, match=r"'snow' in \[model\].*no 'temp' column"):
        load_settings(write(tmp_path, with_("model", snow=True)))


def test_toml_syntax_error_names_file(tmp_path):
    path = write(tmp_path, "[basins]\npath = b.gpkg\n")
    with pytest.raises(InputError, match=r"region.toml is not valid TOML.*line 2"):
        load_settings(path)


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"region settings not found: .*region.toml"):
        load_settings(tmp_path)


def test_every_section_has_a_documented_key(tmp_path):
    # docs/config.md must describe every key of the key table (one place of truth).
    text = (Path(__file__).parents[1] / "docs" / "config.md").read_text(encoding="utf-8")
    for section, keys in SECTIONS.items():
        for key in keys:
            assert f"`{key}`" in text, f"[{section}] {key} undocumented"


def test_report_section_defaults_and_choices(tmp_path):
    settings = load_settings(write(tmp_path, MINIMAL))
    assert settings.report.flow_unit == "m3/s"
    assert settings.report.window is None
    assert settings.report.sites_per_figure == 6
    chosen = load_settings(
        write(
            tmp_path,
            with_(
                "report",
                flow_unit="mm/day",
                window=["2014-01-01", "2014-12-31"],
                sites_per_figure=4,
            ),
        )
    ).report
    assert chosen.flow_unit == "mm/day"
    assert chosen.window == (pd.Timestamp("2014-01-01"), pd.Timestamp("2014-12-31"))
    assert chosen.sites_per_figure == 4
    with pytest.raises(InputError, match=r"'flow_unit' in \[report\].*m3/s"):
        load_settings(write(tmp_path, with_("report", flow_unit="l/s")))
