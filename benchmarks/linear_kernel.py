"""Speed of the linear-reservoir kernel, measured side by side in one run.

Prints, for N basins x Y years of daily forcing:
  (a) kernel vs a plain Python per-step loop over the same data (Python lists), for the store
      with evapotranspiration at the potential rate (``linear_potential_et``),
  (b) kernel vs one numpy pass reading two input arrays and writing one output
      (np.add(precip, pet, out=flow)): how close the kernel runs to memory bandwidth,
  (c) calibrations per second (grid bracket + Brent, one basin at a time),
  (d) the default ``linear`` store (evapotranspiration declining below S_ref) against it.

Run:  python benchmarks/linear_kernel.py [--basins 1000] [--years 20]
Ratios, not absolute times, are the result: the machine may be shared and noisy.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
import pandas as pd

import regional
from regional.models.linear import EVAPORATION_REFERENCE_MM, _linear_kernel


def plain_python_linear(precip, pet, k_values, s0_values):
    """Reference: the same closed-form step as the kernel, in plain Python lists."""
    n_steps, n = len(precip), len(k_values)
    flow = [[0.0] * n for _ in range(n_steps)]
    for j in range(n):
        k = k_values[j]
        decay, gain = math.exp(-k), -math.expm1(-k) / k
        s = s0_values[j]
        for t in range(n_steps):
            p, e = precip[t][j], pet[t][j]
            r = p - e
            s_end = s * decay + r * gain
            e_actual = e
            if s_end < 0.0:
                e_actual = p - r * math.log1p(k * s / -r) / k
                s_end = 0.0
            flow[t][j] = s + p - e_actual - s_end
            s = s_end
    return flow


def best_of(function, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    from regional.compute import keep_freed_memory

    keep_freed_memory()  # as the command line does
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--basins", type=int, default=1000)
    parser.add_argument("--years", type=int, default=20)
    parser.add_argument(
        "--python-basins",
        type=int,
        default=1000,
        help="basins timed with the plain loop (scaled to --basins)",
    )
    args = parser.parse_args()
    rng = np.random.default_rng(42)
    days = int(args.years * 365.25)
    season = 2.0 + 1.5 * np.sin(2 * np.pi * np.arange(days) / 365.25)
    precip = rng.gamma(0.6, 5.0, (days, args.basins))
    pet = np.ascontiguousarray(np.tile(season[:, None], args.basins))
    k = rng.uniform(0.01, 1.0, args.basins)
    s0 = np.zeros(args.basins)
    flow, aet, storage = (np.empty_like(precip) for _ in range(3))

    simple, declining = 0.0, EVAPORATION_REFERENCE_MM  # S_ref: linear_potential_et, linear
    for s_ref in (simple, declining):  # compile
        _linear_kernel(precip[:10], pet[:10], k, s0, s_ref, flow[:10], aet[:10], storage[:10])
    kernel = best_of(lambda: _linear_kernel(precip, pet, k, s0, simple, flow, aet, storage))
    kernel_declining = best_of(
        lambda: _linear_kernel(precip, pet, k, s0, declining, flow, aet, storage)
    )
    public = best_of(
        lambda: regional.simulate(
            "linear_potential_et", precip, pet, {"k_per_day": k}, initial_storage=0.0
        )
    )
    numpy_pass = best_of(lambda: np.add(precip, pet, out=flow))
    wet = precip + pet  # never below PET: the store never empties, no logarithm is needed
    kernel_wet = best_of(lambda: _linear_kernel(wet, pet, k, s0, simple, flow, aet, storage))
    _linear_kernel(precip, pet, k, s0, simple, flow, aet, storage)
    emptying_share = float((storage == 0.0).mean())

    m = min(args.python_basins, args.basins)
    p_list, e_list = precip[:, :m].tolist(), pet[:, :m].tolist()
    start = time.perf_counter()
    plain_python_linear(p_list, e_list, k[:m].tolist(), s0[:m].tolist())
    python_loop = (time.perf_counter() - start) * args.basins / m

    n_cal = min(50, args.basins)
    dates = pd.date_range("2000-01-01", periods=days)
    ids = [f"b{j}" for j in range(n_cal)]
    sim = regional.simulate(
        "linear_potential_et", precip[:, :n_cal], pet[:, :n_cal], {"k_per_day": k[:n_cal]}
    ).flow
    frames = [pd.DataFrame(a, dates, ids) for a in (precip[:, :n_cal], pet[:, :n_cal], sim)]
    start = time.perf_counter()
    regional.calibrate(*frames, warmup_days=365, model="linear_potential_et")
    calibrations_per_s = n_cal / (time.perf_counter() - start)

    basin_days = days * args.basins
    print(f"linear kernel: {args.basins} basins x {args.years} years = {basin_days:,} basin-days")
    print(
        f"  kernel                  {kernel:8.3f} s  "
        f"({kernel / basin_days * 1e9:.1f} ns/basin-day)"
    )
    print(f"  regional.simulate       {public:8.3f} s  (with input checks)")
    print(
        f"  kernel, declining ET    {kernel_declining:8.3f} s  "
        f"(model linear, S_ref = {declining:g} mm)"
    )
    print(f"  numpy np.add pass       {numpy_pass:8.3f} s")
    print(f"  plain Python loop       {python_loop:8.3f} s  (timed on {m} basins, scaled)")
    print(f"(a) speed-up over plain Python loop: {python_loop / kernel:8.1f} x   (target >= 20)")
    print(f"(b) time ratio to numpy pass:        {kernel / numpy_pass:8.1f} x   (target <= 3)")
    print(
        f"(b') same ratio on wet forcing, no emptying steps: {kernel_wet / numpy_pass:5.1f} x   "
        f"(the exact emptying time costs a logarithm on {emptying_share:.0%} of basin-days)"
    )
    print(
        f"(d) declining ET (linear) vs potential-rate ET (linear_potential_et): "
        f"{kernel_declining / kernel:5.1f} x the time; to numpy pass: "
        f"{kernel_declining / numpy_pass:5.1f} x"
    )
    print(f"(c) calibrations per second ({args.years} years, KGE): {calibrations_per_s:.1f}")


if __name__ == "__main__":
    main()
