"""Never lose a user's files; every failure ends in one clear message.

Each test drives the command line (in this process through ``main``, or as a real process
through ``sys.executable -m regional.cli`` where signals are involved) and asserts the exit
code, that no traceback is printed, the message naming the thing at fault, and that no byte of
any input or unrelated file changed (checksums of the whole temporary tree before and after).
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
import signal
import socket
import stat
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from tiny_region import checksums, make_parts, write_region

from regional import io
from regional.cli import main

CLI = [sys.executable, "-m", "regional.cli"]


def run(capsys, *args) -> tuple[int, str, str]:
    code = main([str(arg) for arg in args])
    out, err = capsys.readouterr()
    return code, out, err


def one_error(err: str, *patterns: str) -> None:
    """One ``error:`` line naming every pattern, no traceback."""
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.startswith("error: ")]
    assert len(lines) == 1, err
    for pattern in patterns:
        assert pattern in lines[0], f"{pattern!r} not in {lines[0]!r}"


def leftovers(folder: Path) -> list[str]:
    """Temporary names of this tool left in ``folder`` (dot-names with a pid)."""
    return sorted(p.name for p in folder.iterdir() if re.match(r"\..+\.\d+\.", p.name))


@pytest.fixture(scope="module")
def earlier_run(tmp_path_factory) -> Path:
    """A tiny region and one complete results folder of it (copied by the tests)."""
    base = tmp_path_factory.mktemp("earlier")
    region = write_region(base / "region", make_parts())
    assert main(["run", str(region), "--out", str(base / "results"), "--quiet"]) == 0
    return base


@pytest.fixture
def project(tmp_path, earlier_run) -> Path:
    """A copy of the region and its results in a fresh folder: tmp_path/{region,results}."""
    shutil.copytree(earlier_run, tmp_path, dirs_exist_ok=True)
    return tmp_path


# ----------------------------------------------------------------------------- --out targets


def test_out_at_the_region_folder_is_refused(capsys, project):
    before = checksums(project)
    code, _, err = run(capsys, "run", project / "region", "--out", project / "region")
    assert code == 2
    one_error(err, str(project / "region"), "is the region folder", "Fix:")
    assert checksums(project) == before


def test_out_at_a_folder_of_other_files_is_refused(capsys, project):
    own = project / "my_project"
    own.mkdir()
    (own / "notes.txt").write_text("a hydrologist's own work\n")
    before = checksums(project)
    code, _, err = run(capsys, "run", project / "region", "--out", own)
    assert code == 2
    one_error(err, str(own), "not a results folder", "Fix:")
    assert checksums(project) == before
    assert sorted(p.name for p in project.iterdir()) == ["my_project", "region", "results"]


def test_out_at_a_regular_file_is_refused(capsys, project):
    target = project / "flows.xlsx"
    target.write_bytes(b"not ours")
    before = checksums(project)
    code, _, err = run(capsys, "run", project / "region", "--out", target)
    assert code == 2
    one_error(err, str(target), "is a file, not a folder")
    assert checksums(project) == before
    assert leftovers(project) == []


def test_out_at_an_ancestor_of_the_inputs_is_refused(capsys, project):
    before = checksums(project)
    code, _, err = run(capsys, "run", project / "region", "--out", project)
    assert code == 2
    one_error(err, str(project), "holds the region's input", "region.gpkg")
    assert checksums(project) == before


def test_out_at_an_input_file_is_refused(capsys, project):
    series = project / "region" / "series.csv"
    before = checksums(project)
    code, _, err = run(capsys, "run", project / "region", "--out", series)
    assert code == 2
    one_error(err, str(series), "input")
    assert checksums(project) == before


def test_output_folder_dot_in_the_settings_is_refused(capsys, project):
    parts = make_parts()
    parts.config["output"]["folder"] = "."
    region = write_region(project / "dotted", parts)
    before = checksums(project)
    code, _, err = run(capsys, "run", region)
    assert code == 2
    one_error(err, str(region), "is the region folder")
    assert checksums(project) == before


def test_an_earlier_results_folder_is_replaced(capsys, project):
    results = project / "results"
    stale = json.loads((results / "run.json").read_text())["stages"]["run"]
    (results / "figures" / "extra_from_earlier_run.png").write_bytes(b"old")
    inputs = checksums(project / "region")
    time.sleep(1.1)  # stage times are written to the second
    code, _, err = run(capsys, "run", project / "region", "--out", results, "--quiet")
    assert code == 0, err
    manifest = json.loads((results / "run.json").read_text())
    assert (manifest["tool"], manifest["format"]) == ("regional", 1)
    assert manifest["stages"]["run"] > stale
    assert not (results / "figures" / "extra_from_earlier_run.png").exists()
    assert checksums(project / "region") == inputs
    assert leftovers(project) == []


def test_results_of_the_previous_format_are_recognised_and_replaced(capsys, project):
    results = project / "results"
    manifest = json.loads((results / "run.json").read_text())
    legacy = {k: v for k, v in manifest.items() if k not in ("tool", "format")}
    (results / "run.json").write_text(json.dumps(legacy))
    assert io.is_results_folder(results)
    code, _, err = run(capsys, "run", project / "region", "--out", results, "--quiet")
    assert code == 0, err
    assert json.loads((results / "run.json").read_text())["format"] == 1


def test_predict_and_screen_need_an_earlier_results_folder(capsys, project):
    before = checksums(project)
    for command in ("predict", "screen"):
        code, _, err = run(capsys, command, project / "region", "--out", project / "new")
        assert code == 2
        one_error(err, str(project / "new"), "no earlier results", "regional run")
    assert checksums(project) == before
    assert not (project / "new").exists()


def test_attributes_out_refuses_an_input_and_a_folder(capsys, project):
    before = checksums(project)
    series = project / "region" / "series.csv"
    code, _, err = run(capsys, "attributes", project / "region", "--out", series)
    assert code == 2
    one_error(err, str(series), "one of the region's inputs")
    code, _, err = run(capsys, "attributes", project / "region", "--out", project / "results")
    assert code == 2
    one_error(err, "is a folder")
    assert checksums(project) == before


# ----------------------------------------------------------------------------- environment


def test_read_only_output_parent_is_refused_before_computing(capsys, project, monkeypatch):
    parent = project / "locked"
    parent.mkdir()
    real_access = os.access

    def access(path, mode, **kwargs):  # the tests may run as root, who may write anywhere
        if Path(path) == parent and mode & os.W_OK:
            return False
        return real_access(path, mode, **kwargs)

    monkeypatch.setattr(os, "access", access)
    before = checksums(project)
    started = time.perf_counter()
    code, _, err = run(capsys, "run", project / "region", "--out", parent / "results")
    assert code == 2
    one_error(err, str(parent), "read-only")
    assert time.perf_counter() - started < 5  # refused before the computation
    assert checksums(project) == before


def test_disk_full_while_writing_keeps_earlier_results(capsys, project, monkeypatch):
    results = project / "results"
    before = checksums(project)

    def fill_until_full(staging, tables, *args):
        (staging / "loo_scores.csv").write_text("partial")
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(staging / "results.gpkg"))

    monkeypatch.setattr(io, "_fill_run_folder", fill_until_full)
    code, _, err = run(capsys, "run", project / "region", "--out", results, "--quiet")
    assert code == 3
    one_error(err, str(results), "No space left on device", "intact", "free disk space")
    assert checksums(project) == before
    assert leftovers(project) == []


def test_unreachable_scheduler_is_one_line_naming_address_and_wait(capsys, project):
    parts = make_parts()
    parts.config["compute"] = {"connect_timeout_s": 1.0}
    region = write_region(project / "clustered", parts)
    with socket.socket() as probe:  # a local port nobody listens on once closed
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    address = f"tcp://127.0.0.1:{port}"
    before = checksums(project)
    started = time.perf_counter()
    code, _, err = run(capsys, "run", region, "--out", project / "out", "--scheduler", address)
    assert code == 3
    one_error(err, address, "waiting 1 s", "connect_timeout_s")
    assert time.perf_counter() - started < 30
    assert checksums(project) == before
    assert not (project / "out").exists()


@pytest.mark.parametrize("workers", ["0", "-2", "two"])
def test_workers_below_one_refused_at_parse_time(tmp_path, workers):
    done = subprocess.run(
        [*CLI, "run", str(tmp_path / "nowhere"), f"--workers={workers}"],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert "--workers: must be a whole number >= 1" in done.stderr


def test_default_scheduler_wait_is_well_under_30_seconds():
    from regional.compute import CONNECT_TIMEOUT_S
    from regional.config import SECTIONS

    assert CONNECT_TIMEOUT_S <= 10 and SECTIONS["compute"]["connect_timeout_s"].default <= 10


def test_help_lists_the_exit_codes():
    done = subprocess.run([*CLI, "run", "--help"], capture_output=True, text=True)
    text = " ".join(done.stdout.split())
    for code in ("0 done", "2 bad input", "3 the system failed", "130 interrupted", "143 term"):
        assert code in text


# ----------------------------------------------------------------------------- signals


def _start(args: list[str]) -> subprocess.Popen:
    return subprocess.Popen(
        [*CLI, *map(str, args)], stdout=subprocess.PIPE, stderr=subprocess.PIPE
    )


def _wait_for_staging(child: subprocess.Popen, parent: Path, name: str) -> bool:
    """Poll until the child's temporary results folder exists; False if it ended first."""
    pattern = re.compile(rf"\.{re.escape(name)}\.{child.pid}\.[a-z0-9_]+\.tmp")
    while child.poll() is None:
        if any(pattern.fullmatch(entry) for entry in os.listdir(parent)):
            return True
        time.sleep(0.002)
    return False


def _read_until(child: subprocess.Popen, text: bytes, limit_s: float = 120) -> None:
    seen = b""
    deadline = time.monotonic() + limit_s
    while text not in seen and time.monotonic() < deadline:
        chunk = os.read(child.stderr.fileno(), 256)
        if not chunk:
            break
        seen += chunk
    assert text in seen, seen


def test_sigkill_mid_write_then_a_new_run_leaves_no_temporary_folder(capsys, project):
    results = project / "results"
    before = checksums(results)
    child = _start(["run", project / "region", "--out", results, "--quiet"])
    caught = _wait_for_staging(child, project, "results")
    child.send_signal(signal.SIGKILL)
    child.communicate(timeout=60)
    assert caught, "the run ended before its temporary folder was seen"
    assert child.returncode == -signal.SIGKILL
    assert checksums(results) == before  # the killed run never touched the results
    assert len(leftovers(project)) == 1  # its temporary folder, left by SIGKILL
    code, _, err = run(capsys, "run", project / "region", "--out", results, "--quiet")
    assert code == 0, err
    assert leftovers(project) == []


def test_sigterm_mid_write_exits_143_and_removes_the_temporary_folder(project):
    results = project / "results"
    before = checksums(project)
    child = _start(["run", project / "region", "--out", results, "--quiet"])
    assert _wait_for_staging(child, project, "results")
    child.send_signal(signal.SIGTERM)
    _, err = child.communicate(timeout=60)
    err = err.decode()
    assert child.returncode == 143
    assert "Traceback" not in err
    assert err.strip().splitlines()[-1].startswith("terminated (SIGTERM)")
    assert checksums(project) == before
    assert leftovers(project) == []


@pytest.mark.parametrize(
    ("sent", "code", "word"), [("SIGINT", 130, "interrupted"), ("SIGTERM", 143, "terminated")]
)
def test_signal_mid_run_exits_with_its_code_and_leaves_nothing(project, sent, code, word):
    results = project / "results"
    before = checksums(project)
    child = _start(["run", project / "region", "--out", results])
    _read_until(child, b"calibration")
    child.send_signal(getattr(signal, sent))
    _, err = child.communicate(timeout=60)
    err = err.decode()
    assert child.returncode == code
    assert "Traceback" not in err
    assert word in err.strip().splitlines()[-1]
    assert checksums(project) == before
    assert leftovers(project) == []


def _wait_for_numeric_libraries(child: subprocess.Popen, timeout_s: float = 30.0) -> None:
    """Return once numpy's compiled core is mapped into the child (Linux /proc), so the signal
    lands while the command imports its libraries, not during the interpreter's own start-up
    (which no program can turn into a clean message). Falls back to a fixed wait elsewhere."""
    maps = Path(f"/proc/{child.pid}/maps")
    if not maps.exists():
        time.sleep(0.4)
        return
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and child.poll() is None:
        try:
            if "_multiarray_umath" in maps.read_text():
                return
        except OSError:  # the child has just ended
            return
        time.sleep(0.005)


def test_ctrl_c_while_the_libraries_import_is_one_line(tmp_path):
    region = write_region(tmp_path / "region", make_parts())
    child = _start(["check", region])
    _wait_for_numeric_libraries(child)  # the command is importing pandas, geopandas ... now
    child.send_signal(signal.SIGINT)
    _, err = child.communicate(timeout=60)
    err = err.decode()
    assert "Traceback" not in err
    if child.returncode == 0:
        pytest.skip("the check finished before the interrupt arrived on this machine")
    assert child.returncode == 130
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("interrupted (Ctrl-C)"), err


def test_keyboard_interrupt_raised_inside_an_import_is_one_line(capsys, tmp_path, monkeypatch):
    class Interrupting:
        """A meta-path finder that stands for Ctrl-C arriving while a module loads."""

        def find_spec(self, name, path=None, target=None):
            if name == "regional.region":
                raise KeyboardInterrupt
            return None

    monkeypatch.delitem(sys.modules, "regional.region")
    monkeypatch.setattr(sys, "meta_path", [Interrupting(), *sys.meta_path])
    code, _, err = run(capsys, "check", tmp_path)
    assert code == 130
    assert err.splitlines() == [err.strip()] and err.startswith("interrupted (Ctrl-C)")


def test_interrupt_turned_into_an_import_error_by_a_library_is_one_line(
    capsys, tmp_path, monkeypatch
):
    # numpy's compiled core, interrupted while it loads, raises ImportError ("could not import
    # module datetime") instead of KeyboardInterrupt; the command still ends as interrupted.
    from regional import cli

    class Swallowing:
        """A finder standing for a compiled library that turns Ctrl-C into an ImportError."""

        def find_spec(self, name, path=None, target=None):
            if name == "regional.region":
                try:
                    cli._on_interrupt(signal.SIGINT, None)
                except KeyboardInterrupt:
                    raise ImportError("could not import module 'datetime'") from None
            return None

    monkeypatch.delitem(sys.modules, "regional.region")
    monkeypatch.setattr(sys, "meta_path", [Swallowing(), *sys.meta_path])
    code, _, err = run(capsys, "check", tmp_path)
    assert code == 130
    assert err.splitlines() == [err.strip()] and err.startswith("interrupted (Ctrl-C)")


def test_package_import_does_not_load_the_numeric_libraries():
    done = subprocess.run(
        [sys.executable, "-c", "import sys, regional.cli; print('pandas' in sys.modules)"],
        capture_output=True,
        text=True,
    )
    assert done.stdout.strip() == "False", done.stderr


# ----------------------------------------------------------------------------- file modes


@pytest.mark.parametrize(
    ("umask", "file_mode", "dir_mode"), [(0o022, 0o644, 0o755), (0o027, 0o640, 0o750)]
)
def test_file_modes_follow_the_umask(capsys, project, umask, file_mode, dir_mode):
    previous = os.umask(umask)
    try:
        results = project / "fresh"
        assert run(capsys, "run", project / "region", "--out", results, "--quiet")[0] == 0
        assert run(capsys, "predict", project / "region", "--out", results, "--quiet")[0] == 0
        assert run(capsys, "screen", project / "region", "--out", results, "--quiet")[0] == 0
        table = project / "attributes.csv"
        assert run(capsys, "attributes", project / "region", "--out", table)[0] == 0
    finally:
        os.umask(previous)
    written = [table, results, *results.rglob("*")]
    modes = {str(p): stat.S_IMODE(p.stat().st_mode) for p in written}
    wanted = {str(p): dir_mode if p.is_dir() else file_mode for p in written}
    assert modes == wanted


# ----------------------------------------------------------------------------- stage updates


def test_predict_at_another_level_updates_every_place_that_states_it(capsys, project):
    results = project / "results"
    region = project / "region"
    earlier = json.loads((results / "run.json").read_text())
    assert earlier["prediction"]["level"] == 0.9
    toml = region / "region.toml"
    toml.write_text(toml.read_text() + "\n[prediction]\nlevel = 0.8\n")
    time.sleep(1.1)
    code, out, err = run(capsys, "predict", region, "--out", results, "--quiet")
    assert code == 0, err
    manifest = json.loads((results / "run.json").read_text())
    assert manifest["prediction"]["level"] == 0.8
    assert manifest["settings"]["prediction"]["level"] == 0.8
    assert manifest["stages"]["run"] == earlier["stages"]["run"]
    assert manifest["stages"]["prediction"] > earlier["stages"]["prediction"]
    for name in ("flows_ungauged.csv", "parameters_ungauged.csv", "coverage.csv"):
        assert set(pd.read_csv(results / name)["level"]) == {0.8}, name
    summary = pd.read_csv(results / "loo_summary.csv")
    assert set(summary["level"].dropna()) == {0.8}
    report = (results / "report.html").read_text()
    assert "prediction level in force" in report and "80%" in report
    assert manifest["stages"]["prediction"] in report


def test_run_json_and_report_carry_the_date_and_time_of_each_stage(earlier_run):
    results = earlier_run / "results"
    manifest = json.loads((results / "run.json").read_text())
    assert set(manifest["stages"]) == {"run", "prediction", "screening"}
    stamp = pd.Timestamp(manifest["stages"]["run"])
    assert stamp.tzinfo is not None and abs(pd.Timestamp.now(tz="UTC") - stamp).days < 1
    assert "run written (UTC)" in (results / "report.html").read_text()


# ----------------------------------------------------------------------------- implausible data


def _region(project: Path, name: str, change) -> Path:
    parts = make_parts()
    change(parts)
    return write_region(project / name, parts)


def _gauge_b05(series: pd.DataFrame) -> None:
    """Give B05 B01's record, so four basins stay gauged when one turns ungauged (regression
    needs four)."""
    b01 = series.loc[series["basin_id"] == "B01", "flow_mm"].to_numpy()
    series.loc[series["basin_id"] == "B05", "flow_mm"] = b01


def test_constant_observed_flow_makes_a_basin_ungauged_and_no_donor(capsys, project):
    def constant(parts):
        series = parts.series
        series.loc[series["basin_id"] == "B04", "flow_mm"] = 0.0
        _gauge_b05(series)

    region = _region(project, "constant", constant)
    before = checksums(region)
    code, out, err = run(capsys, "check", region)
    assert code == 0, err
    assert "warning:" in err and "'B04'" in err and "constant" in err and "ungauged" in err
    assert re.search(r"B04\s+ungauged \(constant flow\)", out)
    assert "4 gauged, 2 ungauged" in out
    results = project / "constant_results"
    code, out, err = run(capsys, "run", region, "--out", results, "--quiet")
    assert code == 0, err
    assert "treated as ungauged (constant observed flow): B04" in out
    manifest = json.loads((results / "run.json").read_text())
    assert manifest["constant_flow_ungauged"] == ["B04"]
    assert any("'B04'" in w and "constant" in w for w in manifest["warnings"])
    assert "B04" not in set(pd.read_csv(results / "calibration.csv")["basin_id"])
    assert "B04" in set(pd.read_csv(results / "parameters_ungauged.csv")["basin_id"])
    assert "B04" not in set(pd.read_csv(results / "loo_scores.csv")["basin_id"])
    report = (results / "report.html").read_text()
    assert "B04" in report and "constant" in report
    assert checksums(region) == before


def test_one_repeated_value_over_the_validation_period_is_constant_too(capsys, project):
    def flat(parts):
        series = parts.series
        late = (series["basin_id"] == "B02") & (series["date"] >= "2003-01-01")
        series.loc[late, "flow_mm"] = 1.25
        _gauge_b05(series)

    region = _region(project, "flat", flat)
    code, out, err = run(capsys, "check", region)
    assert code == 0, err
    assert "'B02' (validation 2003-01-01..2003-12-31: 365 observed days, all 1.25 mm/day)" in err


def test_implausible_precipitation_names_file_column_basin_date_and_value(capsys, project):
    def storm(parts):
        parts.series.loc[
            (parts.series["basin_id"] == "B03") & (parts.series["date"] == "2002-07-14"),
            "precip_mm",
        ] = 1e9

    region = _region(project, "storm", storm)
    before = checksums(project)
    for command in ("check", "run"):
        code, _, err = (
            run(capsys, command, region, "--out", project / "storm_out")[:3]
            if (command == "run")
            else run(capsys, command, region)
        )
        assert code == 2
        one_error(
            err, "series.csv", "column 'precip_mm'", "basin 'B03'", "2002-07-14", "1e+09", "1,825"
        )
    assert checksums(project) == before


def test_precipitation_ceiling_is_configurable(capsys, project):
    def wet(parts):
        parts.series.loc[parts.series.index[5], "precip_mm"] = 2500.0
        parts.config["series"]["max_precip_mm_per_day"] = 3000.0

    region = _region(project, "wet", wet)
    code, _, err = run(capsys, "check", region)
    assert code == 0, err


@pytest.mark.parametrize(
    ("column", "value", "shown"),
    [("pet_mm", 45.0, "45"), ("temp_c", 75.0, "75"), ("temp_c", -120.0, "-120")],
)
def test_implausible_pet_and_temperature(capsys, project, column, value, shown):
    def odd(parts):
        parts.series.loc[parts.series.index[400], column] = value

    region = _region(project, "odd", odd)
    code, _, err = run(capsys, "check", region)
    assert code == 2
    one_error(err, f"column '{column}'", "basin 'B01'", "2002-02-05", shown)


# ----------------------------------------------------------------------------- check as run


def test_warmup_longer_than_the_data_before_calibration_fails_check_and_run(capsys, project):
    def long_warmup(parts):
        parts.config["model"]["warmup_days"] = 800

    region = _region(project, "warm", long_warmup)
    for args in (["check", region], ["run", region, "--out", project / "warm_out"]):
        code, _, err = run(capsys, *args)
        assert code == 2
        one_error(err, "warmup_days = 800", "only 365 days", "2001-01-01", "2002-01-01")
    assert not (project / "warm_out").exists()


def test_infinite_attribute_names_the_attribute_basin_and_layer_column(capsys, project):
    def infinite(parts):
        parts.basins.loc[1, "forest_pct"] = float("inf")
        parts.config["transfer"]["attributes"] = ["area_km2", "forest_pct"]

    region = _region(project, "inf", infinite)
    for args in (["check", region], ["run", region, "--out", project / "inf_out"]):
        code, _, err = run(capsys, *args)
        assert code == 2
        one_error(err, "'forest_pct'", "'B02' (inf)", "column 'forest_pct' of the basins layer")


def test_zero_precipitation_at_an_ungauged_basin_names_the_aridity_computation(capsys, project):
    def dry(parts):
        parts.series.loc[parts.series["basin_id"] == "B06", "precip_mm"] = 0.0

    region = _region(project, "dry", dry)
    for args in (["check", region], ["run", region, "--out", project / "dry_out"]):
        code, _, err = run(capsys, *args)
        assert code == 2
        one_error(err, "'aridity'", "'B06' (inf)", "precipitation is zero", "'B06'")


def test_overlay_that_misses_basins_names_the_overlay_file(capsys, project):
    from shapely.geometry import box

    def short(parts):
        west, south, east, north = parts.basins.total_bounds
        middle = (west + east) / 2
        parts.soils = parts.soils.iloc[:1].set_geometry(
            [box(west - 1000, south - 1000, middle, north + 1000)], crs=parts.soils.crs
        )

    region = _region(project, "short", short)
    code, _, err = run(capsys, "check", region)
    assert code == 2
    one_error(err, "'sand_frac'", "B06", "region.gpkg (layer 'soils')", "do not cover")


def test_too_few_gauged_basins_for_regression_fails_check_and_run(capsys, project):
    def three_gauged(parts):
        parts.series.loc[parts.series["basin_id"] == "B04", "flow_mm"] = float("nan")

    region = _region(project, "three", three_gauged)
    for args in (["check", region], ["run", region, "--out", project / "three_out"]):
        code, _, err = run(capsys, *args)
        assert code == 2
        one_error(err, "[transfer] methods", "at least 4 gauged basins", "found 3 gauged")
    assert not (project / "three_out").exists()


def test_python_api_refuses_the_same_targets(demo_result):
    from regional.errors import InputError
    from regional.outputs import update_stage_outputs, write_outputs

    region = demo_result.settings.folder
    before = checksums(region)
    with pytest.raises(InputError, match="is the region folder"):
        write_outputs(demo_result, region, figures=False)
    with pytest.raises(InputError, match="holds the region's input"):
        update_stage_outputs(demo_result, region.parent, stage="prediction")
    assert checksums(region) == before
