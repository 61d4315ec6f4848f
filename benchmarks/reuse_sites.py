"""New sites from a stored fitted region against a whole run, measured side by side in one run.

On a copy of the invented demo region (48 basins, 34 gauged, 20 years), prints the wall time of
  (a) ``regional run REGION`` (calibration, leave-one-out, held-out check, outputs),
  (b) ``regional predict REGION`` right after it (inputs unchanged: the fitted region reused),
  (c) ``regional predict REGION --sites SITES`` at 5 new sites (5 ungauged demo basins cut out
      as a sites file with their forcing beside it),
each as its own process (as a user runs them, interpreter start and library imports included),
and the ratios (b) / (a) and (c) / (a); then the same work inside one warm process (libraries
already imported, as in a notebook or a service):
  (d) the chain and its outputs (``pipeline.run`` + ``outputs.write_outputs``),
  (e) the 5 sites: the stored fitted region read and checked, the sites loaded and given
      attributes, the estimates made and written,
and (e) / (d). The target of issue 15 is a ratio below 0.1. Beside them, (f): a process that
only imports the libraries ``predict --sites`` needs (numpy, pandas, scipy.special, numba,
geopandas, pyarrow, rasterio; no scikit-learn, scipy.stats or scipy.optimize: the stored fitted
region is applied without them), the floor of (c) that no change inside ``regional`` can
lower; (c) - (f) is what ``regional`` itself spends (numba's first-call start, reading the fitted
region, attributes of the sites, simulation, writing the files).

Run:  python benchmarks/reuse_sites.py [--repeats 1]
Ratios, not absolute times, are the result: the machine may be shared and noisy.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import geopandas as gpd
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_region"
N_SITES = 5


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as place:
        region = Path(place) / "region"
        shutil.copytree(DEMO, region, ignore=shutil.ignore_patterns("results"))
        sites = _cut_sites(region, Path(place) / "sites")
        runs, reused, new, floor = [], [], [], []
        for _ in range(args.repeats):
            floor.append(_timed_imports())
            runs.append(_timed("run", str(region)))
            reused.append(_timed("predict", str(region)))
            shutil.rmtree(sites.with_name("intakes_estimates"), ignore_errors=True)
            new.append(_timed("predict", str(region), "--sites", str(sites)))
        d, e = _in_process(region, sites, args.repeats)
    a, b, c, f = min(runs), min(reused), min(new), min(floor)
    print(f"demo region, {N_SITES} new sites (best of {args.repeats}, wall time per process)")
    print(f"  (a) regional run:                        {a:6.2f} s")
    print(f"  (b) regional predict, fitted region reused: {b:6.2f} s  (b)/(a) = {b / a:.3f}")
    print(f"  (c) regional predict --sites, {N_SITES} sites:    {c:6.2f} s  (c)/(a) = {c / a:.3f}")
    print(f"  (f) importing the libraries alone:      {f:6.2f} s  (f)/(a) = {f / a:.3f}")
    print(f"      regional's own part of (c), (c)-(f): {c - f:6.2f} s  ratio {(c - f) / a:.3f}")
    print("one warm process:")
    print(f"  (d) run and write outputs:                  {d:6.2f} s")
    print(f"  (e) {N_SITES} sites, stored fitted region: {e:6.2f} s  (e)/(d) = {e / d:.3f}")


def _in_process(region: Path, sites: Path, repeats: int) -> tuple[float, float]:
    from regional.config import load_settings
    from regional.outputs import write_outputs
    from regional.pipeline import run
    from regional.reuse import predict_new_sites, stored_fit, write_site_outputs
    from regional.sites import load_sites

    settings = load_settings(region)
    results = settings.output.folder
    chain, new = [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(repeats):
            clock = time.perf_counter()
            write_outputs(run(settings), results)
            chain.append(time.perf_counter() - clock)
            out = sites.with_name("warm_estimates")
            shutil.rmtree(out, ignore_errors=True)
            clock = time.perf_counter()
            fitted, _ = stored_fit(settings, results)
            loaded = load_sites(sites, settings, area_crs=fitted.area_crs)
            write_site_outputs(out, predict_new_sites(fitted, loaded), loaded, fitted_from=results)
            new.append(time.perf_counter() - clock)
    return min(chain), min(new)


def _cut_sites(region: Path, folder: Path) -> Path:
    """A sites file of the first ungauged demo basins and their forcing beside it."""
    folder.mkdir()
    truth = json.loads((region / "truth.json").read_text())
    chosen = [b for b, v in truth["basins"].items() if not v["gauged"]][:N_SITES]
    basins = gpd.read_file(region / "region.gpkg", layer="basins")
    basins[basins["basin_id"].isin(chosen)].to_file(folder / "intakes.gpkg", driver="GPKG")
    series = pd.read_csv(region / "series.csv.gz", dtype={"basin_id": str})
    forcing = series[series["basin_id"].isin(chosen)].drop(columns="flow_mm")
    forcing.to_csv(folder / "intakes.csv", index=False)
    return folder / "intakes.gpkg"


LIBRARIES = "numpy, pandas, scipy.special, numba, geopandas, pyarrow.parquet, rasterio"
"""What ``regional predict --sites`` imports (scipy.special for the Student-t, chi-squared and
Pearson III quantiles, numba for the storage kernels, geopandas/rasterio for the sites'
attributes; tests/test_cli_run.py checks that scikit-learn and scipy.stats are not imported)."""


def _timed_imports() -> float:
    """A process importing the libraries as the command does: the garbage collector held off
    while they load and their objects set aside (``regional.cli._loading_libraries``)."""
    clock = time.perf_counter()
    imports = f"import gc; gc.disable(); import {LIBRARIES}; gc.freeze()"
    subprocess.run([sys.executable, "-c", imports], check=True)
    return time.perf_counter() - clock


def _timed(*command: str) -> float:
    env = os.environ | {"PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg"}
    clock = time.perf_counter()
    subprocess.run(
        [sys.executable, "-m", "regional.cli", *command, "--quiet"],
        check=True,
        env=env,
        capture_output=True,
    )
    return time.perf_counter() - clock


if __name__ == "__main__":
    main()
