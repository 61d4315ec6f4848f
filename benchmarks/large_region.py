"""Whole-chain time and memory on a synthetic region of N basins x 20 years, side by side.

Each configuration runs in a fresh child process (same machine, same moment); a separate
process first writes the region folder (gauge points with area and attributes, daily series in
Parquet, converted to a series store), so the run's memory is its own. The child runs
``regional.pipeline.run`` and writes the outputs (figures and report included), then reports
its wall time and resident memory before, at the peak of, and after each stage. Printed:

- time per basin at each N, the scaling ratio time(N_2) / time(N_1) (4.4 for 500 -> 2000 means
  close to linear: 4 x the basins) and time per basin at the largest N over the smallest;
- peak memory at each N, and per stage the resident memory before, at the peak and after, at
  every N (one N too); with two or more sizes the marginal peak memory per extra basin
  (N_1 -> N_2, and N_1 -> the last N with three or more);
- the speed-up of a local Dask cluster of 2 worker processes over the in-process run, and the
  peak memory of the client and of each worker.

Run:  python benchmarks/large_region.py [--sizes 500 2000 10000] [--years 20] [--dask-size 500]
(one size, e.g. ``--sizes 500 --dask-size 500``, skips the scaling ratios.)
(``--dask-size 0`` skips the cluster run; ``--cluster-only N`` runs only the cluster at N
basins and prints its client's and workers' memory, for sizes where the in-process run beside
it would take too long.)
Every value of the synthetic region is invented.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow

_SCHEMA = pyarrow.schema(
    [
        ("basin_id", pyarrow.string()),
        ("date", pyarrow.timestamp("ns")),
        ("precip_mm", pyarrow.float64()),
        ("pet_mm", pyarrow.float64()),
        ("temp_c", pyarrow.float64()),
        ("flow_mm", pyarrow.float64()),
    ]
)

UNGAUGED_SHARE = 0.25
BUILD_CHUNK = 250
"""Basins generated and written at a time (one Parquet row group each)."""


def make_region(folder: Path, n_basins: int, years: int, seed: int = 11) -> Path:
    """Write an invented region of gauge points and daily series; return its folder."""
    import geopandas as gpd
    import pandas as pd
    import pyarrow.parquet

    rng = np.random.default_rng(seed)
    ids = [f"S{i:05d}" for i in range(n_basins)]
    lon = rng.uniform(5.0, 15.0, n_basins)
    lat = rng.uniform(45.0, 52.0, n_basins)
    slope = rng.uniform(1.0, 25.0, n_basins)
    sand = rng.uniform(0.1, 0.8, n_basins)
    wetness = np.clip(0.7 + 0.3 * np.sin(lon / 2.0) + rng.normal(0, 0.1, n_basins), 0.2, None)
    basins = gpd.GeoDataFrame(
        {
            "basin_id": ids,
            "area_km2": rng.lognormal(4.5, 0.8, n_basins),
            "slope_deg": slope,
            "sand_frac": sand,
            "wetness": wetness,
        },
        geometry=gpd.points_from_xy(lon, lat),
        crs="EPSG:4326",
    )
    basins.to_file(folder / "basins.gpkg", layer="basins", driver="GPKG")
    dates = pd.date_range("2001-01-01", periods=int(years * 365.25), freq="D")
    season = np.sin(2 * np.pi * (dates.day_of_year.to_numpy() - 100) / 365.25)
    regional_storm = rng.gamma(0.5, 6.0, len(dates))
    with pyarrow.parquet.ParquetWriter(folder / "series.parquet", _SCHEMA) as writer:
        for first in range(0, n_basins, BUILD_CHUNK):
            part = slice(first, min(first + BUILD_CHUNK, n_basins))
            chunk = _chunk_series(
                np.random.default_rng([seed, first]),
                ids[part],
                dates,
                season,
                regional_storm,
                slope=slope[part],
                sand=sand[part],
                wetness=wetness[part],
            )
            writer.write_table(pyarrow.Table.from_pandas(chunk, _SCHEMA, preserve_index=False))
    end = dates[-1].year
    (folder / "region.toml").write_text(
        f"""[region]
name = "Synthetic benchmark region ({n_basins} basins, invented)"
[basins]
path = "basins.gpkg"
layer = "basins"
id = "basin_id"
[series]
path = "series.parquet"
id = "basin_id"
date = "date"
precip = "precip_mm"
pet = "pet_mm"
temp = "temp_c"
flow = "flow_mm"
[model]
name = "linear"
warmup_days = 365
calibration = ["2002-01-01", "{2002 + (end - 2002) // 2}-12-31"]
validation = ["{2003 + (end - 2002) // 2}-01-01", "{end}-12-31"]
[transfer]
attributes = ["area_km2", "slope_deg", "sand_frac", "wetness"]
methods = ["regression", "similarity", "proximity"]
[output]
folder = "results"
"""
    )
    return folder


STAGES = (
    "load_region",
    "_calibrate",
    "choose_donor_counts",
    "leave_one_out",
    "fit_region",
    "predict_region",
    "_statistics",
    "screen_region",
)
"""Functions of ``regional.pipeline`` whose peak resident memory is recorded one by one."""


def _memory_kb(field: str) -> int:
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith(field):
                return int(line.split()[1])
    return 0


def _reset_peak() -> None:
    """Reset the process's peak resident size (Linux: ``5`` to /proc/self/clear_refs)."""
    with open("/proc/self/clear_refs", "w") as handle:
        handle.write("5")


def _watched(function, name: str, record: dict):
    """``function`` wrapped to record resident memory before, at peak and after, in MB."""

    def wrapper(*args, **kwargs):
        before = _memory_kb("VmRSS")
        _reset_peak()
        try:
            return function(*args, **kwargs)
        finally:
            peak = _memory_kb("VmHWM")
            entry = record.setdefault(name, {"before": before / 1024, "peak": 0.0})
            entry["peak"] = max(entry["peak"], peak / 1024)
            entry["after"] = _memory_kb("VmRSS") / 1024

    return wrapper


def _watch_stages(record: dict) -> None:
    from regional import pipeline

    for name in STAGES:
        setattr(pipeline, name, _watched(getattr(pipeline, name), name, record))


def _chunk_series(rng, ids, dates, season, storm, *, slope, sand, wetness):
    """Long daily table of some basins (invented values), rows by basin then date."""
    import pandas as pd

    import regional

    days, n_basins = len(dates), len(ids)
    precip = storm[:, None] * rng.lognormal(0, 0.35, (days, n_basins)) * wetness
    pet = np.clip(2.0 + 1.6 * season, 0.1, None)[:, None] * np.ones(n_basins)
    temp = (9.0 + 10.0 * season)[:, None] - 0.004 * slope * 50 + rng.normal(0, 2, (days, n_basins))
    k = np.exp(-3.2 + 0.08 * slope - 1.5 * sand + rng.normal(0, 0.2, n_basins))
    flow = regional.simulate(
        "linear", precip, pet, {"k_per_day": k}, temp=temp, warmup_days=365
    ).flow * rng.lognormal(0, 0.1, (days, n_basins))
    flow[:, rng.random(n_basins) < UNGAUGED_SHARE] = np.nan
    return pd.DataFrame(
        {
            "basin_id": np.repeat(np.array(ids, dtype=object), days),
            "date": np.tile(dates.to_numpy(), n_basins),
            "precip_mm": precip.T.ravel().round(2),
            "pet_mm": pet.T.ravel().round(2),
            "temp_c": temp.T.ravel().round(2),
            "flow_mm": flow.T.ravel(),
        }
    )


def build(folder: str, n_basins: int, years: int) -> None:
    """Write the region in this (separate) process, so the run's memory is its own; its series
    are then read from a series store (``regional convert``), as a cluster would read them."""
    from regional.region import convert_series

    make_region(Path(folder), n_basins, years)
    convert_series(Path(folder), Path(folder) / "store.parquet")
    toml = Path(folder) / "region.toml"
    text = toml.read_text().replace('path = "series.parquet"', 'path = "store.parquet"')
    toml.write_text(text)
    (Path(folder) / "series.parquet").unlink()


def _peak_mb() -> float:
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _local_cluster(workers: int):
    """A local cluster of ``workers`` processes started here (so their memory can be read)."""
    import logging

    import dask
    from distributed import Client, LocalCluster

    from regional.compute import WORKER_ENVIRONMENT

    with dask.config.set({"distributed.nanny.pre-spawn-environ": WORKER_ENVIRONMENT}):
        cluster = LocalCluster(
            n_workers=workers,
            threads_per_worker=1,
            processes=True,
            dashboard_address=None,
            silence_logs=logging.ERROR,
        )
    return cluster, Client(cluster)


def child(n_basins: int, years: int, workers: int) -> None:
    """Build, run and write one configuration; print a JSON line with time and memory."""
    import gc
    import warnings

    from regional.compute import keep_freed_memory
    from regional.config import load_settings
    from regional.outputs import write_outputs
    from regional.pipeline import open_executor, run

    warnings.simplefilter("ignore")
    keep_freed_memory()  # as the command line does
    stages: dict = {}
    _watch_stages(stages)
    worker_mb: list[float] = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        command = [sys.executable, __file__, "--build", tmp, str(n_basins), str(years)]
        subprocess.run(command, check=True)
        cluster, client = _local_cluster(workers) if workers else (None, None)
        gc.collect()
        _reset_peak()
        start = time.perf_counter()
        address = cluster.scheduler_address if cluster else None
        # as the command line: one executor for the chain and the outputs, left open
        # between them (on a cluster the leave-one-out flows stay on its workers)
        executor = open_executor(load_settings(folder), scheduler=address)
        try:
            result = run(folder, executor=executor)
            write = _watched(write_outputs, "write_outputs", stages)
            write(result, folder / "results", executor=executor)
        finally:
            executor.close()
        seconds = time.perf_counter() - start
        if cluster is not None:
            worker_mb = list(client.run(_peak_mb).values())
            client.close()
            cluster.close()
    peak_mb = max([_memory_kb("VmHWM") / 1024] + [stage["peak"] for stage in stages.values()])
    print(
        json.dumps(
            {
                "n": n_basins,
                "workers": workers,
                "seconds": seconds,
                "peak_mb": peak_mb,
                "worker_peak_mb": worker_mb,
                "timings": result.timings,
                "stages": stages,
            }
        )
    )


def measure(n_basins: int, years: int, workers: int = 0) -> dict:
    command = [sys.executable, __file__, "--child", str(n_basins), str(years), str(workers)]
    output = subprocess.run(command, check=True, capture_output=True, text=True).stdout
    return json.loads(output.strip().splitlines()[-1])


def _print_cluster(size: int, local: dict, clustered: dict) -> None:
    print(
        f"2-worker local Dask cluster vs in-process at N = {size}: "
        f"{local['seconds'] / clustered['seconds']:.2f} x   (target >= 1.6 on 2 cores)"
    )
    stages = ("calibration_linear", "leave_one_out_linear")
    spread = [sum(run["timings"][s] for s in stages) for run in (local, clustered)]
    print(
        f"  of which the distributed stages (calibration + leave-one-out): {spread[0]:.1f} s -> "
        f"{spread[1]:.1f} s, {spread[0] / spread[1]:.2f} x; the rest (reading, prediction, "
        "figures, report) runs in the client"
    )
    workers = ", ".join(f"{mb:.0f} MB" for mb in clustered["worker_peak_mb"])
    print(
        f"  peak memory on the cluster: client {clustered['peak_mb']:.0f} MB (the scheduler "
        f"runs in it too; target <= 1024 MB at 10,000 basins), workers {workers}"
    )
    print("  the cluster client's:", end=" ")
    _print_stages([clustered])


def _cluster_alone(size: int, years: int) -> None:
    """The 2-worker cluster run alone at ``size`` basins: its memory, not a speed-up."""
    run = measure(size, years, workers=2)
    workers = ", ".join(f"{mb:.0f} MB" for mb in run["worker_peak_mb"])
    print(
        f"2-worker local Dask cluster alone, N = {size}, {years} years: {run['seconds']:.1f} s; "
        f"peak memory: client {run['peak_mb']:.0f} MB (the scheduler runs in it too; target "
        f"<= 1024 MB at 10,000 basins), workers {workers}"
    )
    _print_stages([run])  # the client's


def _print_stages(rows: list[dict]) -> None:
    """Resident memory before, at the peak of and after each stage at every size; with two or
    more sizes, the marginal peak per extra basin between the first two (the target's sizes)
    and, with three or more, between the first and the last."""
    print("resident memory per stage, MB (before -> peak during -> after):")
    pairs = [(rows[0], rows[1])] if len(rows) > 1 else []
    if len(rows) > 2:
        pairs.append((rows[0], rows[-1]))
    for name in rows[0]["stages"]:
        cells = [
            f"N = {row['n']}: {row['stages'][name]['before']:6.0f} -> "
            f"{row['stages'][name]['peak']:6.0f} -> {row['stages'][name]['after']:6.0f}"
            for row in rows
            if name in row["stages"]
        ]
        marginal = [
            f"{_stage_marginal(name, small, large)} {small['n']} -> {large['n']}"
            for small, large in pairs
            if name in large["stages"]
        ]
        extra = f"   (MB per extra basin at peak: {'; '.join(marginal)})" if marginal else ""
        print(f"  {name:20s} {'   '.join(cells)}{extra}")
    for number, (small, large) in enumerate(pairs):
        print(
            f"marginal peak memory {small['n']} -> {large['n']}: "
            f"{_marginal(small['peak_mb'], large['peak_mb'], small, large)} MB per extra basin"
            + ("   (target <= 0.3 for 500 -> 2000)" if number == 0 else "")
        )


def _stage_marginal(name: str, small: dict, large: dict) -> str:
    return _marginal(small["stages"][name]["peak"], large["stages"][name]["peak"], small, large)


def _marginal(small_mb: float, large_mb: float, small: dict, large: dict) -> str:
    return f"{(large_mb - small_mb) / (large['n'] - small['n']):.3f}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[500, 2000])
    parser.add_argument("--years", type=int, default=20)
    parser.add_argument("--dask-size", type=int, default=500)
    parser.add_argument("--cluster-only", type=int, default=0, metavar="N")
    parser.add_argument("--child", type=int, nargs=3, help=argparse.SUPPRESS)
    parser.add_argument("--build", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.build:
        build(args.build[0], int(args.build[1]), int(args.build[2]))
        return
    if args.child:
        child(*args.child)
        return
    if args.cluster_only:
        _cluster_alone(args.cluster_only, args.years)
        return
    rows = [measure(n, args.years) for n in args.sizes]
    clustered = measure(args.dask_size, args.years, workers=2) if args.dask_size else None
    by_size = {row["n"]: row for row in rows}
    local = by_size.get(args.dask_size) or (
        measure(args.dask_size, args.years) if clustered else None
    )
    print(f"whole chain, {args.years} years of daily data (region built outside the timing)")
    for row in rows:
        stages = ", ".join(f"{k} {v:.1f} s" for k, v in row["timings"].items())
        print(
            f"  N = {row['n']:5d}: {row['seconds']:7.1f} s  "
            f"({row['seconds'] / row['n'] * 1000:.0f} ms/basin; peak {row['peak_mb']:.0f} MB)"
            f"  [{stages}]"
        )
    if len(rows) > 1:
        _print_scaling(rows)
    if clustered is not None:
        _print_cluster(args.dask_size, local, clustered)
    print(
        f"peak memory at N = {rows[-1]['n']}: {rows[-1]['peak_mb']:.0f} MB   (target <= 4096 MB "
        "at 10,000 basins)"
    )
    _print_stages(rows)


def _print_scaling(rows: list[dict]) -> None:
    """Time ratios of the two first sizes and time per basin at the last over the first."""
    small, large = rows[0], rows[1]
    ratio = large["seconds"] / small["seconds"]
    print(
        f"scaling time({large['n']}) / time({small['n']}): {ratio:.2f}"
        f"   (target <= 4.4 for 500 -> 2000)"
    )
    per_basin = (rows[-1]["seconds"] / rows[-1]["n"]) / (small["seconds"] / small["n"])
    print(
        f"time per basin at N = {rows[-1]['n']} / at N = {small['n']}: {per_basin:.2f}"
        "   (target <= 1.2 for 10,000 against 500)"
    )


if __name__ == "__main__":
    main()
