"""Speed of the GR4J kernel against the linear-reservoir kernel, measured side by side in one run.

Prints, for N basins x Y years of daily forcing:
  (a) GR4J kernel time per basin-day, and its ratio to the linear kernel on the same forcing,
  (b) the same through the public regional.simulate (input checks included),
  (c) GR4J calibrations per second for --cal-basins basins x Y years, for the fast search
      (default) and the thorough search (differential evolution, the previous default), with
      the model runs per calibration, and the same rate for the linear store;
  (d) the calibration objective of both searches against a long reference search
      (differential evolution, popsize 20, 300 generations): median gap and the share of basins
      within 0.005, on invented basins (flow from known parameters with 10 % noise) and, with
      --real N, on N basins of the open real dataset (GR4J with the snow store held at its
      defaults, then calibrated with it: 4 and 6 free parameters, NSE).
Every block prints the machine's load average (os.getloadavg) beside its numbers.

Run:  python benchmarks/gr4j_kernel.py [--basins 1000] [--years 20] [--cal-basins 100]
      [--real 40]
Ratios, not absolute times, are the result: the machine may be shared and noisy.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

import regional
from regional.models.gr4j import GR4J, _gr4j_kernel
from regional.models.linear import EVAPORATION_REFERENCE_MM, _linear_kernel


def best_of(function, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return min(times)


def gr4j_sets(rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
    """Parameter sets spread over the usual ranges (X4 up to 4 days)."""
    return {
        "x1_mm": np.exp(rng.uniform(np.log(100.0), np.log(1200.0), n)),
        "x2_mm_per_day": rng.uniform(-3.0, 1.0, n),
        "x3_mm": np.exp(rng.uniform(np.log(20.0), np.log(300.0), n)),
        "x4_days": rng.uniform(1.0, 4.0, n),
    }


def time_calibration(model, precip, pet, params, n_basins: int, **search) -> float:
    """Process seconds to calibrate ``n_basins`` basins on flow simulated with ``params`` (process
    time: the machine may be shared)."""
    frames = invented_frames(model, precip, pet, params, n_basins, noise=0.0)
    start = time.process_time()
    regional.calibrate(*frames, model=model, warmup_days=365, **search)
    return time.process_time() - start


def invented_frames(model, precip, pet, params, n_basins: int, *, noise: float):
    """Forcing and flow simulated with ``params`` (times lognormal noise), as frames."""
    days = precip.shape[0]
    dates = pd.date_range("2000-01-01", periods=days)
    ids = [f"b{j}" for j in range(n_basins)]
    part = {name: values[:n_basins] for name, values in params.items()}
    flow = regional.simulate(model, precip[:, :n_basins], pet[:, :n_basins], part).flow
    if noise:
        rng = np.random.default_rng(11)
        flow = flow * rng.lognormal(-0.5 * noise**2, noise, flow.shape)
    return [pd.DataFrame(a[:, :n_basins], dates, ids) for a in (precip, pet, flow)]


SEARCHES = {
    "fast": {"search": "fast"},
    "thorough": {"search": "thorough"},
    "reference": {"search": "thorough", "popsize": 20, "budget": 300, "seed": 1},
}


def compare_searches(frames, temp=None, **settings) -> dict[str, pd.DataFrame]:
    """Calibrate with each search in turn (process time: the machine may be shared)."""
    tables = {}
    for name, search in SEARCHES.items():
        start = time.process_time()
        table = regional.calibrate(*frames, temp_c=temp, model="gr4j", **settings, **search)
        tables[name] = table.assign(seconds=(time.process_time() - start) / len(table))
    return tables


def load() -> str:
    """The 1, 5 and 15 minute load averages (the machine may be shared)."""
    return "load average " + ", ".join(f"{v:.2f}" for v in os.getloadavg())


def print_comparison(title: str, tables: dict[str, pd.DataFrame]) -> None:
    reference = tables["reference"]["score_calibration"]
    old = tables["thorough"]["seconds"].iloc[0]
    print(f"{title} ({load()})")
    for name, table in tables.items():
        gap = reference - table["score_calibration"]
        print(
            f"  {name:9s} runs/basin {table['n_runs'].mean():6.0f}  "
            f"calibrations/s {1 / table['seconds'].iloc[0]:6.2f} "
            f"({old / table['seconds'].iloc[0]:4.1f} x thorough)  gap to reference: median "
            f"{gap.median():.4f}, within 0.005 on {100 * (gap <= 0.005).mean():.0f} % of "
            f"{len(table)} basins, worst {gap.max():.3f}"
        )


def real_frames(n: int):
    """The first ``n`` basins (by id) of the open real dataset, 1989-1999, as frames."""
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
    from real_region import REAL_DATA, available

    if not available():
        sys.exit("real dataset not found: set REGIONAL_REAL_DATA or place it in ../shared")
    series = pd.read_csv(REAL_DATA / "timeseries.csv.gz", dtype={"basin_id": str})
    series = series[series["date"].between("1989-01-01", "1999-12-31")]
    keep = sorted(series["basin_id"].unique())[:: max(1, series["basin_id"].nunique() // n)][:n]
    series = series[series["basin_id"].isin(keep)].assign(date=lambda f: pd.to_datetime(f.date))
    columns = ("precip_mm", "pet_mm", "flow_mm", "temp_c")
    return [series.pivot(index="date", columns="basin_id", values=c) for c in columns]


def main() -> None:
    from regional.compute import keep_freed_memory

    keep_freed_memory()  # as the command line does
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--basins", type=int, default=1000)
    parser.add_argument("--years", type=int, default=20)
    parser.add_argument("--cal-basins", type=int, default=100)
    parser.add_argument("--real", type=int, default=0, help="real basins for (d); 0: none")
    args = parser.parse_args()
    rng = np.random.default_rng(42)
    days = int(args.years * 365.25)
    n = max(args.basins, args.cal_basins)
    season = 2.0 + 1.5 * np.sin(2 * np.pi * np.arange(days) / 365.25)
    precip = rng.gamma(0.6, 5.0, (days, n))
    pet = np.ascontiguousarray(np.tile(season[:, None], n))
    k = rng.uniform(0.01, 1.0, n)
    sets = gr4j_sets(rng, n)
    model = GR4J()
    s0, r0 = model.split_storage(0.5 * (sets["x1_mm"] + sets["x3_mm"]), sets)
    out = [np.empty((days, n)) for _ in range(4)]
    skip = np.empty((0, 0))

    def run_gr4j(p=precip, e=pet):
        _gr4j_kernel(p, e, *sets.values(), s0, r0, *out, skip, skip)

    def run_linear(p=precip, e=pet):
        _linear_kernel(p, e, k, np.zeros(n), EVAPORATION_REFERENCE_MM, *out[:3])

    run_gr4j(precip[:10], pet[:10])  # compile (or load the cache) before timing
    run_linear(precip[:10], pet[:10])
    gr4j = best_of(run_gr4j)
    linear = best_of(run_linear)
    gr4j_public = best_of(lambda: regional.simulate("gr4j", precip, pet, sets))
    linear_public = best_of(lambda: regional.simulate("linear", precip, pet, {"k_per_day": k}))

    m = args.cal_basins
    # compile (or load the cache of) the compiled search before timing, with and without snow
    time_calibration("gr4j", precip[:800], pet[:800], sets, 1, max_runs=60)
    warm = invented_frames("gr4j", precip[:800], pet[:800], sets, 1, noise=0.0)
    regional.calibrate(*warm, temp_c=warm[0] * 0.0, model="gr4j", max_runs=60)
    gr4j_cal = time_calibration("gr4j", precip, pet, sets, m)
    gr4j_thorough = time_calibration("gr4j", precip, pet, sets, m, search="thorough")
    linear_cal = time_calibration("linear", precip, pet, {"k_per_day": k}, m)

    basin_days = days * n
    print(f"kernels: {n} basins x {args.years} years = {basin_days:,} basin-days ({load()})")
    print(f"  linear kernel      {linear:8.3f} s  ({linear / basin_days * 1e9:6.1f} ns/basin-day)")
    print(f"  GR4J kernel        {gr4j:8.3f} s  ({gr4j / basin_days * 1e9:6.1f} ns/basin-day)")
    print(f"(a) GR4J / linear kernel time:             {gr4j / linear:6.1f} x")
    print(f"(b) GR4J / linear through regional.simulate: {gr4j_public / linear_public:6.1f} x")
    print(
        f"calibration: {m} basins x {args.years} years, KGE, noise-free invented flow ({load()})"
    )
    print(
        f"(c) GR4J fast     {m / gr4j_cal:8.2f} calibrations/s  ({gr4j_cal:7.1f} s in all, "
        f"{gr4j_cal / m:.2f} s per basin)"
    )
    print(
        f"    GR4J thorough {m / gr4j_thorough:8.2f} calibrations/s  ({gr4j_thorough:7.1f} s); "
        f"fast / thorough: {gr4j_thorough / gr4j_cal:.1f} x"
    )
    print(
        f"    linear        {m / linear_cal:8.2f} calibrations/s  ({linear_cal:7.1f} s in all); "
        f"GR4J fast takes {gr4j_cal / linear_cal:.0f} x longer"
    )
    years = min(args.years, 11)
    short = int(years * 365.25)
    invented = invented_frames("gr4j", precip[:short], pet[:short], sets, m, noise=0.1)
    settings = {"objective": "nse", "warmup_days": 365}
    print_comparison(
        f"(d) invented basins ({m} x {years} years, 10 % noise), NSE:",
        compare_searches(invented, **settings),
    )
    if args.real:
        precip_r, pet_r, flow_r, temp_r = real_frames(args.real)
        settings["calibration"] = ("1990-01-01", "1999-12-31")
        held = {"snow_threshold_c": 0.0, "melt_factor_mm_per_degc_day": 2.5}
        print_comparison(
            "    real basins, GR4J with the snow store held at its defaults (4 parameters), NSE, "
            "1990-1999:",
            compare_searches([precip_r, pet_r, flow_r], temp_r, fixed_params=held, **settings),
        )
        print_comparison(
            "    real basins, GR4J with the snow store calibrated (6 parameters), NSE, 1990-1999:",
            compare_searches([precip_r, pet_r, flow_r], temp_r, **settings),
        )


if __name__ == "__main__":
    main()
