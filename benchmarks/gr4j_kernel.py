"""Speed of the GR4J kernel against the linear-reservoir kernel, measured side by side in one run.

Prints, for N basins x Y years of daily forcing:
  (a) GR4J kernel time per basin-day, and its ratio to the linear kernel on the same forcing,
  (b) the same through the public regional.simulate (input checks included),
  (c) GR4J calibrations per second (differential evolution + compass polish, default budget)
      for --cal-basins basins x Y years, and the same rate for the linear store.

Run:  python benchmarks/gr4j_kernel.py [--basins 1000] [--years 20] [--cal-basins 100]
Ratios, not absolute times, are the result: the machine may be shared and noisy.
"""

from __future__ import annotations

import argparse
import time

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


def time_calibration(model, precip, pet, params, n_basins: int) -> float:
    """Seconds to calibrate ``n_basins`` basins on flow simulated with ``params``."""
    days = precip.shape[0]
    dates = pd.date_range("2000-01-01", periods=days)
    ids = [f"b{j}" for j in range(n_basins)]
    part = {name: values[:n_basins] for name, values in params.items()}
    flow = regional.simulate(model, precip[:, :n_basins], pet[:, :n_basins], part).flow
    frames = [pd.DataFrame(a[:, :n_basins], dates, ids) for a in (precip, pet, flow)]
    start = time.perf_counter()
    regional.calibrate(*frames, model=model, warmup_days=365)
    return time.perf_counter() - start


def main() -> None:
    from regional.compute import keep_freed_memory

    keep_freed_memory()  # as the command line does
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--basins", type=int, default=1000)
    parser.add_argument("--years", type=int, default=20)
    parser.add_argument("--cal-basins", type=int, default=100)
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
    gr4j_cal = time_calibration("gr4j", precip, pet, sets, m)
    linear_cal = time_calibration("linear", precip, pet, {"k_per_day": k}, m)

    basin_days = days * n
    print(f"kernels: {n} basins x {args.years} years = {basin_days:,} basin-days")
    print(f"  linear kernel      {linear:8.3f} s  ({linear / basin_days * 1e9:6.1f} ns/basin-day)")
    print(f"  GR4J kernel        {gr4j:8.3f} s  ({gr4j / basin_days * 1e9:6.1f} ns/basin-day)")
    print(f"(a) GR4J / linear kernel time:             {gr4j / linear:6.1f} x")
    print(f"(b) GR4J / linear through regional.simulate: {gr4j_public / linear_public:6.1f} x")
    print(f"calibration: {m} basins x {args.years} years, KGE, default settings")
    print(
        f"(c) GR4J   {m / gr4j_cal:8.2f} calibrations/s  ({gr4j_cal:7.1f} s in all, "
        f"{gr4j_cal / m:.2f} s per basin)"
    )
    print(
        f"    linear {m / linear_cal:8.2f} calibrations/s  ({linear_cal:7.1f} s in all); "
        f"GR4J takes {gr4j_cal / linear_cal:.0f} x longer"
    )


if __name__ == "__main__":
    main()
