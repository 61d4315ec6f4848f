"""Leave-one-out skill on every basin of the real open dataset (CAMELS-US in Caravan).

Builds the region (gauge points, 289 basins; warm-up 1989, calibration 1990-1999, validation
2000-2009; linear store and GR4J, each with the degree-day snow store calibrated), runs the
whole chain and prints the per-method summary (median NSE and KGE), the time taken, the
whole-chain time of GR4J with snow over the linear store with snow, and the model runs per
calibration. The figures are recorded in
docs/validation.md. The dataset is read from ../shared/data/real (or REGIONAL_REAL_DATA) and
never copied into the repository.

Run:  python benchmarks/real_data.py [--workers 2] [--parts 01 03] [--objective kge]
      [--methods regression similarity proximity blended] [--donors auto]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from real_region import available, build_region  # noqa: E402

from regional.outputs import donor_counts  # noqa: E402
from regional.pipeline import run  # noqa: E402


def main() -> None:
    from regional.compute import keep_freed_memory

    keep_freed_memory()  # as the command line does
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=None, help="local Dask workers")
    parser.add_argument("--parts", nargs="*", default=None, help="USGS parts (default: all)")
    parser.add_argument("--objective", default="nse")
    parser.add_argument("--models", nargs="*", default=["linear", "gr4j"])
    parser.add_argument(
        "--methods", nargs="*", default=["regression", "similarity", "proximity", "blended"]
    )
    parser.add_argument("--donors", default="auto", help='a number, or "auto" (1 to 10)')
    args = parser.parse_args()
    if not available():
        sys.exit(
            "real dataset not found: set REGIONAL_REAL_DATA or place it in ../shared/data/real"
        )
    warnings.simplefilter("ignore")
    with tempfile.TemporaryDirectory() as tmp:
        donors = args.donors if args.donors == "auto" else int(args.donors)
        folder = build_region(
            Path(tmp),
            parts=args.parts,
            models=args.models,
            objective=args.objective,
            methods=args.methods,
            donors=donors,
        )
        start = time.perf_counter()
        result = run(folder, workers=args.workers)
        seconds = time.perf_counter() - start
    summary = result.summary.copy()
    print(
        f"{len(result.region.gauged)} gauged basins, objective {args.objective}, "
        f"{seconds:.0f} s ({args.workers or 'in-process'} workers; load average at the end "
        + ", ".join(f"{v:.2f}" for v in os.getloadavg())
        + ")"
    )
    print(summary.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    counts = donor_counts(result)
    if counts is not None:
        print("median leave-one-out skill per number of donors:")
        print(counts.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    if result.prediction is not None:
        print(result.prediction.coverage.to_string(index=False))
    else:  # every basin gauged: the held-out check of the bounds through the fitted region
        from regional.fitted import fit_result

        fitted = fit_result(result)
        if fitted.held_out is not None:
            print(
                f"held-out coverage of the {fitted.level:.0%} bounds ({fitted.model}, "
                f"{fitted.method}; {fitted.held_out.attrs.get('repeats')} repeats):"
            )
            print(fitted.held_out.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    if result.statistics is not None:
        print("flow statistics in leave-one-out (chosen route per statistic):")
        summary = result.statistics.summary
        columns = [
            "statistic",
            "route",
            "n_basins",
            "median_abs_rel_error",
            "r2_log",
            "median_log_bias",
            "coverage",
            "held_out_coverage",
        ]
        print(
            summary.loc[summary["chosen"], columns].to_string(
                index=False, float_format=lambda v: f"{v:.3f}"
            )
        )
        print("median over statistics of each route's median absolute log10 error:")
        print(summary.groupby("route")["median_abs_log_error"].median().round(3).to_string())
    print("timings:", {k: round(v, 1) for k, v in result.timings.items()})
    print_chain_ratio(result.timings)
    for model, run_ in result.runs.items():
        table = run_.calibration
        print(
            f"{model}: model runs per basin in calibration, mean {table['n_runs'].mean():.0f}"
            f" (max {table['n_runs'].max()})"
        )
    calibration = result.runs[result.chosen_model].calibration
    print(
        "calibration-period score, median:",
        calibration["score_calibration"].median().round(3),
        "validation:",
        calibration["score_validation"].median().round(3),
    )


def print_chain_ratio(timings: dict[str, float]) -> None:
    """Whole-chain time (calibration + leave-one-out) of GR4J over the linear store."""
    chain = {
        model: timings.get(f"calibration_{model}", 0.0)
        + timings.get(f"leave_one_out_{model}", 0.0)
        for model in ("linear", "gr4j")
    }
    if chain["linear"] > 0 and chain["gr4j"] > 0:
        print(
            f"whole chain (calibration + leave-one-out): gr4j {chain['gr4j']:.0f} s, linear "
            f"{chain['linear']:.0f} s: gr4j / linear = {chain['gr4j'] / chain['linear']:.1f} x"
        )


if __name__ == "__main__":
    main()
