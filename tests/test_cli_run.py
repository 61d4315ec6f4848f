"""`regional run` end to end on the demo region: every file, layer and column, atomic output,
and the outputs opened by outside tools (GDAL's ogrinfo, a headless browser) where present."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pyogrio
import pytest

from regional import io
from regional.cli import main

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_region"
SCORE_COLUMNS = [
    "basin_id",
    "method",
    "nse",
    "kge",
    "kge_r",
    "kge_alpha",
    "kge_beta",
    "log_nse",
    "pbias",
    "n_days",
]
SUMMARY_COLUMNS = [
    "method",
    "n_basins",
    "median_nse",
    "q25_nse",
    "q75_nse",
    "share_nse_gt_0_5",
    "share_nse_gt_0",
    "median_kge",
    "loss_vs_calibrated",
    "gain_vs_median",
    "coverage",
    "model",
]
FIGURES = [
    "loo_nse_map",
    "parameters",
    "nse_cdf",
    "hydrographs",
    "ungauged_mean_flow_map",
    "ungauged_hydrographs",
    "screening",
]


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory) -> Path:
    """The output folder of one `regional run demo_region --out ...`."""
    out = tmp_path_factory.mktemp("cli") / "results"
    assert main(["run", str(DEMO), "--out", str(out), "--quiet"]) == 0
    return out


def test_run_writes_every_table_with_its_columns(run_folder):
    scores = pd.read_csv(run_folder / "loo_scores.csv", dtype={"basin_id": str})
    assert list(scores.columns[: len(SCORE_COLUMNS)]) == SCORE_COLUMNS
    assert set(scores["method"]) == {
        "calibrated",
        "median",
        "regression",
        "similarity",
        "proximity",
    }
    summary = pd.read_csv(run_folder / "loo_summary.csv")
    assert set(SUMMARY_COLUMNS) <= set(summary.columns)
    assert len(summary) == 5
    coefficients = pd.read_csv(run_folder / "regression_coefficients.csv")
    assert {"term", "estimate", "std_error", "t", "p", "vif"} <= set(coefficients.columns)
    flows = pd.read_csv(run_folder / "flows_ungauged.csv", dtype={"basin_id": str})
    assert list(flows.columns[:8]) == [
        "basin_id",
        "date",
        "flow_mm",
        "flow_m3s",
        "flow_low_mm",
        "flow_high_mm",
        "flow_low_m3s",
        "flow_high_m3s",
    ]
    for name in ("statistics_ungauged.csv", "statistics_loo.csv", "statistics_summary.csv"):
        assert len(pd.read_csv(run_folder / name)) > 0, name


def test_run_writes_every_layer_with_its_columns(run_folder):
    gpkg = run_folder / "results.gpkg"
    layers = dict(pyogrio.list_layers(gpkg))
    assert {"gauged", "ungauged", "screening"} <= set(layers)
    gauged = pyogrio.read_dataframe(gpkg, layer="gauged")
    for column in (
        "basin_id",
        "k_per_day",
        "score_calibration",
        "score_validation",
        "loo_nse_regression",
        "loo_kge_regression",
        "loo_nse_proximity",
        "slope_mean",
        "aridity",
    ):
        assert column in gauged.columns, column
    assert len(gauged) == 34
    ungauged = pyogrio.read_dataframe(gpkg, layer="ungauged")
    for column in (
        "basin_id",
        "method",
        "k_per_day",
        "k_per_day_low",
        "k_per_day_high",
        "mean_flow_mm",
        "q95_mm",
        "min7_mean_mm",
        "applicable",
        "reason",
    ):
        assert column in ungauged.columns, column
    assert len(ungauged) == 14
    screening = pyogrio.read_dataframe(gpkg, layer="screening")
    assert {"basin_id", "rank", "score", "reason"} <= set(screening.columns)


def test_run_writes_figures_report_and_manifest(run_folder):
    for name in FIGURES:
        png = run_folder / "figures" / f"{name}.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name
    report = (run_folder / "report.html").read_text()
    assert report.count("data:image/png;base64,") >= len(FIGURES)
    assert "licensed" in report
    manifest = json.loads((run_folder / "run.json").read_text())
    series = str((DEMO / "series.csv.gz").resolve())
    digest = hashlib.sha256((DEMO / "series.csv.gz").read_bytes()).hexdigest()
    assert manifest["inputs"][series] == digest
    assert {"settings", "software", "timings_s"} <= set(manifest)
    assert manifest["software"]["numpy"]


def test_failed_write_leaves_previous_results_untouched(run_folder, tmp_path, monkeypatch, capsys):
    previous = tmp_path / "results"
    shutil.copytree(run_folder, previous)
    before = _checksums(previous)

    def fail_halfway(staging, tables, *args):
        (staging / "loo_scores.csv").write_text("partial")
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(io, "_fill_run_folder", fail_halfway)
    assert main(["run", str(DEMO), "--out", str(previous), "--quiet"]) == 3
    err = capsys.readouterr().err
    assert "disk full (simulated)" in err and "Traceback" not in err
    assert _checksums(previous) == before
    assert [p.name for p in tmp_path.iterdir()] == ["results"]


def test_run_killed_halfway_leaves_previous_results_untouched(run_folder, tmp_path):
    previous = tmp_path / "results"
    shutil.copytree(run_folder, previous)
    before = _checksums(previous)
    command = [sys.executable, "-m", "regional.cli", "run", str(DEMO), "--out", str(previous)]
    child = subprocess.Popen(command, stderr=subprocess.PIPE, text=True)
    for line in child.stderr:  # wait until the leave-one-out stage has started
        if "leave-one-out" in line:
            break
    child.send_signal(signal.SIGKILL)
    child.wait(timeout=30)
    assert child.returncode == -signal.SIGKILL
    assert _checksums(previous) == before


@pytest.mark.skipif(shutil.which("ogrinfo") is None, reason="GDAL's ogrinfo (gdal-bin) absent")
def test_results_gpkg_opens_with_ogrinfo(run_folder):
    # Reference tool: GDAL's own ogrinfo lists every layer, its CRS and its feature count, and
    # warns on a GeoPackage version it does not fully support (GDAL 3.6 on 1.4).
    gpkg = str(run_folder / "results.gpkg")
    for layer, count in (("gauged", 34), ("ungauged", 14), ("screening", 14)):
        done = subprocess.run(
            ["ogrinfo", "-so", "-ro", gpkg, layer], check=True, capture_output=True, text=True
        )
        assert f"Feature Count: {count}" in done.stdout
        assert "32633" in done.stdout
        assert "warning" not in (done.stdout + done.stderr).lower()


def test_results_gpkg_is_geopackage_1_2(run_folder):
    # GeoPackage standard (OGC 12-128): SQLite application_id "GPKG" and user_version
    # MMmmpp (10200 for 1.2; GDAL reports 10400 as "v1.4.0"), read with Python's sqlite3.
    import sqlite3

    with sqlite3.connect(run_folder / "results.gpkg") as connection:
        application_id = connection.execute("PRAGMA application_id").fetchone()[0]
        user_version = connection.execute("PRAGMA user_version").fetchone()[0]
    assert application_id.to_bytes(4, "big") == b"GPKG"
    assert user_version == 10200


def test_results_gpkg_crs_and_counts_with_pyogrio(run_folder):
    # Reference library: pyogrio (GDAL bindings) reads every layer with its CRS.
    gpkg = run_folder / "results.gpkg"
    for layer, count in (("gauged", 34), ("ungauged", 14), ("screening", 14)):
        info = pyogrio.read_info(gpkg, layer=layer)
        assert info["features"] == count
        assert info["crs"] == "EPSG:32633"


BROWSER = shutil.which("chromium") or shutil.which("chromium-browser")
DRIVER = shutil.which("chromedriver")


@pytest.mark.skipif(
    BROWSER is None or DRIVER is None,
    reason="Debian chromium and chromium-driver are not installed",
)
def test_report_opens_in_headless_chromium(run_folder):
    (sections, images), _ = _browser_view(run_folder / "report.html", SECTIONS_AND_IMAGES)
    for section in (
        "summary",
        "cautions",
        "inputs",
        "calibration",
        "transfer",
        "regression",
        "figures",
        "ungauged",
        "screening",
        "warnings",
        "methods",
    ):
        assert section in sections, section
    assert len(images) >= len(FIGURES)
    assert all(width > 0 for width in images)


SECTIONS_AND_IMAGES = (
    "return [Array.from(document.querySelectorAll('section[id]')).map(s => s.id),"
    " Array.from(document.images).map(i => i.naturalWidth)];"
)
SITE_CELLS = """
const box = document.getElementById('site-estimates');
box.previousElementSibling.scrollIntoView();
const heads = Array.from(box.querySelectorAll('thead th')).map(th => th.title);
const wanted = ['basin_id', 'mean_flow', 'mean_flow_bounds', 'flow_unit', 'reason'];
const view = document.documentElement.clientWidth;
const rows = Array.from(box.querySelectorAll('tbody tr')).map(tr => wanted.map(name => {
  const cell = tr.children[heads.indexOf(name)];
  const r = cell.getBoundingClientRect();
  return [name, cell.textContent, r.left >= 0 && r.right <= view && r.width > 0];
}));
return [view, box.scrollWidth <= box.clientWidth, document.documentElement.scrollWidth <= view,
        rows];
"""


@pytest.mark.skipif(
    BROWSER is None or DRIVER is None,
    reason="Debian chromium and chromium-driver are not installed",
)
def test_estimates_fit_a_1280_px_window_without_sideways_scrolling(run_folder, tmp_path):
    # Reference tool: Chromium lays the page out at 1280 px; every ungauged basin's row must
    # show its estimate, bounds, unit and reason inside the window.
    (view, no_table_scroll, no_page_scroll, rows), screenshot = _browser_view(
        run_folder / "report.html", SITE_CELLS, width=1280, height=1400, screenshot=True
    )
    assert view <= 1280
    assert no_table_scroll and no_page_scroll
    assert len(rows) == 14  # the demo's ungauged basins
    for row in rows:
        assert all(visible for _, _, visible in row), row
        name_to_text = {name: text for name, text, _ in row}
        assert name_to_text["flow_unit"] == "m3/s"
        assert "\u2013" in name_to_text["mean_flow_bounds"]
    assert any(text for row in rows for name, text, _ in row if name == "reason")
    assert screenshot[:8] == b"\x89PNG\r\n\x1a\n"
    (tmp_path / "estimates_1280.png").write_bytes(screenshot)


def _browser_view(
    report: Path, script: str, *, width: int = 1280, height: int = 900, screenshot: bool = False
) -> tuple[list, bytes | None]:
    """Open the report through chromedriver (W3C WebDriver over HTTP) at a window size, run a
    script on the page and return its value (and a PNG screenshot of the window when asked)."""
    import base64
    import socket
    import urllib.request

    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    driver = subprocess.Popen(
        [DRIVER, f"--port={port}"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    base = f"http://127.0.0.1:{port}"

    def call(method: str, path: str, body: dict | None = None) -> dict:
        data = None if body is None else json.dumps(body).encode()
        request = urllib.request.Request(
            base + path, data=data, method=method, headers={"Content-Type": "application/json"}
        )
        with urllib.request.urlopen(request, timeout=60) as response:
            return json.loads(response.read())

    try:
        for _ in range(50):
            try:
                call("GET", "/status")
                break
            except OSError:
                time.sleep(0.2)
        flags = [
            "--headless",
            f"--window-size={width},{height}",
            "--hide-scrollbars",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
        ]
        session = call(
            "POST",
            "/session",
            {
                "capabilities": {
                    "alwaysMatch": {"goog:chromeOptions": {"binary": BROWSER, "args": flags}}
                }
            },
        )["value"]["sessionId"]
        try:
            call("POST", f"/session/{session}/url", {"url": report.resolve().as_uri()})
            value = call(
                "POST", f"/session/{session}/execute/sync", {"script": script, "args": []}
            )["value"]
            image = None
            if screenshot:
                encoded = call("GET", f"/session/{session}/screenshot")["value"]
                image = base64.b64decode(encoded)
        finally:
            call("DELETE", f"/session/{session}")
    finally:
        driver.terminate()
        driver.wait(timeout=10)
    return value, image


def _checksums(folder: Path) -> dict[str, str]:
    return {
        str(path.relative_to(folder)): hashlib.sha256(path.read_bytes()).hexdigest()
        for path in sorted(folder.rglob("*"))
        if path.is_file()
    }


def test_bad_region_exits_2_without_traceback(tmp_path, capsys):
    assert main(["run", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert "nowhere" in err


def test_run_help_carries_the_caution(capsys):
    with pytest.raises(SystemExit, match="0"):
        main(["run", "--help"])
    assert "licensed professional practice" in capsys.readouterr().out.replace("\n", " ")


def test_predict_and_screen_update_their_files_and_keep_the_rest(run_folder, tmp_path, capsys):
    folder = tmp_path / "results"
    shutil.copytree(run_folder, folder)
    kept = _checksums(folder)["loo_scores.csv"]
    (folder / "flows_ungauged.csv").unlink()
    assert main(["predict", str(DEMO), "--out", str(folder), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "leave-one-out coverage" in out and "licensed" in out
    flows = pd.read_csv(folder / "flows_ungauged.csv", dtype={"basin_id": str})
    assert flows["basin_id"].nunique() == 14
    assert main(["screen", str(DEMO), "--out", str(folder), "--quiet"]) == 0
    assert "a gauge here would cut" in capsys.readouterr().out
    assert _checksums(folder)["loo_scores.csv"] == kept
    assert {"gauged", "ungauged", "screening"} <= {
        n for n, _ in pyogrio.list_layers(folder / "results.gpkg")
    }


def test_two_models_are_compared_side_by_side(tmp_path, region_parts, capsys):
    from tiny_region import write_region

    region_parts.config["model"]["name"] = ["linear", "gr4j"]
    folder = write_region(tmp_path / "region", region_parts)
    out = tmp_path / "results"
    assert main(["run", str(folder), "--out", str(out), "--quiet"]) == 0
    summary = pd.read_csv(out / "loo_summary.csv")
    assert set(summary["model"]) == {"linear", "gr4j"}
    assert (summary.groupby("model")["method"].count() == 5).all()
    assert (out / "figures" / "model_comparison.png").is_file()
    printed = capsys.readouterr().out
    assert "gr4j" in printed and "chosen for prediction: model" in printed
    gauged = pyogrio.read_dataframe(out / "results.gpkg", layer="gauged")
    assert {"k_per_day_linear", "x1_mm_gr4j", "loo_nse_similarity_gr4j"} <= set(gauged.columns)


# ----------------------------------------------------------------------------- reuse (issue 15)


def _fail_if_called(name):
    def refuse(*args, **kwargs):
        raise AssertionError(f"{name} was called: the fitted region was not reused")

    return refuse


def test_predict_and_screen_after_run_reuse_the_fitted_region(
    run_folder, tmp_path, capsys, monkeypatch
):
    # Unchanged inputs and settings: no calibration and no leave-one-out run (both would
    # raise here), and the estimates are the run's, byte for byte.
    from regional import pipeline

    folder = tmp_path / "results"
    shutil.copytree(run_folder, folder)
    names = ["flows_ungauged.csv", "parameters_ungauged.csv", "coverage.csv", "screening.csv"]
    before = {name: (folder / name).read_bytes() for name in names}
    monkeypatch.setattr(pipeline, "calibrate", _fail_if_called("calibrate"))
    monkeypatch.setattr(pipeline, "leave_one_out", _fail_if_called("leave_one_out"))
    assert main(["predict", str(DEMO), "--out", str(folder), "--quiet"]) == 0
    assert "reusing the fitted region" in capsys.readouterr().out
    assert main(["screen", str(DEMO), "--out", str(folder), "--quiet"]) == 0
    assert "reusing the fitted region" in capsys.readouterr().out
    for name in names:
        assert (folder / name).read_bytes() == before[name], name
    manifest = json.loads((folder / "run.json").read_text())
    assert manifest["reused_fitted_region"]["stages"] == ["prediction", "screening"]


def test_predict_refits_and_says_why_when_an_input_changed(tmp_path, region_parts, capsys):
    from tiny_region import write_region

    folder = write_region(tmp_path / "region", region_parts)
    out = tmp_path / "results"
    assert main(["run", str(folder), "--out", str(out), "--quiet"]) == 0
    with open(folder / "series.csv", "a") as stream:
        stream.write("\n")  # same records, other bytes: a changed input all the same
    capsys.readouterr()
    assert main(["predict", str(folder), "--out", str(out), "--quiet"]) == 0
    said = capsys.readouterr().out
    assert "fitting the region again: input changed since the region was fitted" in said
    assert str(folder / "series.csv") in said
    assert main(["predict", str(folder), "--out", str(out), "--quiet"]) == 0
    assert "reusing the fitted region" in capsys.readouterr().out


def _cut_sites(folder: Path, sites: list[str]) -> Path:
    """Demo basins cut out as new sites: ``intakes.gpkg`` and their forcing beside it."""
    import geopandas as gpd

    basins = gpd.read_file(DEMO / "region.gpkg", layer="basins")
    basins[basins["basin_id"].isin(sites)].to_file(folder / "intakes.gpkg", driver="GPKG")
    series = pd.read_csv(DEMO / "series.csv.gz", dtype={"basin_id": str})
    forcing = series[series["basin_id"].isin(sites)].drop(columns="flow_mm")
    forcing.to_csv(folder / "intakes.csv", index=False)
    return folder / "intakes.gpkg"


NOT_FOR_SITES = ("sklearn", "scipy.stats", "scipy.optimize", "matplotlib", "distributed")
"""Libraries estimates at new sites do without (each costs a fresh process its import)."""


def test_new_sites_import_no_scikit_learn_nor_scipy_stats(run_folder, tmp_path):
    # A fresh interpreter, as a user runs 'regional predict REGION --sites SITES': the stored
    # fitted region is applied with numpy and scipy.special alone.
    sites = _cut_sites(tmp_path, ["DR09", "DR24"])
    args = ["predict", str(DEMO), "--out", str(run_folder), "--quiet", "--sites", str(sites)]
    args += ["--sites-out", str(tmp_path / "estimates")]
    code = (
        "import sys\n"
        "from regional.cli import main\n"
        f"assert main({args!r}) == 0\n"
        f"print(sorted(m for m in sys.modules if m.startswith({NOT_FOR_SITES!r})))\n"
    )
    env = {**os.environ, "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg"}
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, check=False
    )
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "estimates" / "flows_sites.csv").is_file()
    assert done.stdout.strip().splitlines()[-1] == "[]"


def test_new_sites_get_the_estimates_they_had_inside_the_region(run_folder, tmp_path, capsys):
    # Two ungauged demo basins cut out as new sites (their polygons and forcing): the estimates
    # equal those the run gave them as basins of the region (attributes bit for bit; the
    # numbers to rounding, as linear algebra on 2 rows may round otherwise than on 14).
    sites = ["DR09", "DR24"]
    _cut_sites(tmp_path, sites)
    out = tmp_path / "estimates"
    args = ["predict", str(DEMO), "--out", str(run_folder), "--quiet"]
    assert main([*args, "--sites", str(tmp_path / "intakes.gpkg"), "--sites-out", str(out)]) == 0
    assert "sites: 2" in capsys.readouterr().out
    flows = pd.read_csv(out / "flows_sites.csv", dtype={"basin_id": str})
    inside = pd.read_csv(run_folder / "flows_ungauged.csv", dtype={"basin_id": str})
    inside = inside[inside["basin_id"].isin(sites)].reset_index(drop=True)
    pd.testing.assert_frame_equal(flows, inside, check_exact=False, rtol=1e-12, atol=1e-12)
    table = pd.read_csv(out / "parameters_sites.csv", dtype={"basin_id": str})
    region = pd.read_csv(run_folder / "parameters_ungauged.csv", dtype={"basin_id": str})
    region = region.set_index("basin_id").loc[sites].reset_index()
    assert list(table.columns) == list(region.columns)
    pd.testing.assert_frame_equal(
        table, region, check_exact=False, check_dtype=False, rtol=1e-12, atol=1e-12
    )
    attributes = ["area_km2", "aridity", "sand_frac", "slope_mean", "elevation_mean"]
    pd.testing.assert_frame_equal(table[attributes], region[attributes], check_exact=True)
    manifest = json.loads((out / "run.json").read_text())
    assert manifest["fitted_region"] == str(run_folder / "fitted")
    assert pyogrio.list_layers(out / "results.gpkg")[0][0] == "sites"
