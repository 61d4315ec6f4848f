"""Cost of drawing every ungauged basin's hydrograph figures, measured side by side in one run.

On the invented demo region (14 ungauged basins, 20 years), prints:
  (a) the whole chain ``regional.pipeline.run`` (no outputs written),
  (b) every figure except the site hydrograph pages, drawn and turned into PNG bytes,
  (c) the site hydrograph pages (window plus whole-period flow duration per basin), PNG too,
and the cost of (c) per ungauged basin and as a share of (a), so the cost in a region with many
ungauged basins can be judged: it grows with the number of ungauged basins.

Run:  python benchmarks/site_figures.py [--repeats 3]
Ratios, not absolute times, are the result: the machine may be shared and noisy.
"""

from __future__ import annotations

import argparse
import warnings
from pathlib import Path

from linear_kernel import best_of  # this folder's timing helper (scripts run from here)

from regional import io
from regional.pipeline import run
from regional.report import figures

DEMO = Path(__file__).resolve().parents[1] / "demo_region"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = run(DEMO)
        chain = best_of(lambda: run(DEMO), 1)
    sites = len(result.prediction.table)

    def other_figures():
        drawn = figures.make_figures(result)
        return [io.figure_png(f) for n, f in drawn.items() if not n.startswith("ungauged_hydro")]

    def site_pages():
        return [io.figure_png(f) for f in figures.ungauged_hydrograph_pages(result).values()]

    rest = best_of(other_figures, args.repeats)
    pages = best_of(site_pages, args.repeats)
    print(f"demo region, {sites} ungauged basins (best of {args.repeats})")
    print(f"  (a) whole chain, no outputs:              {chain:6.2f} s")
    print(f"  (b) other figures, drawn and as PNG:      {rest:6.2f} s  (pages drawn, no PNG)")
    print(f"  (c) site hydrograph pages, drawn and PNG: {pages:6.2f} s")
    print(f"  (c) per ungauged basin: {pages / sites:.3f} s; (c) / (a): {pages / chain:.2f}")


if __name__ == "__main__":
    main()
