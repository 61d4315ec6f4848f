"""Screening of candidate gauge sites: where would a new gauge teach the region most?

Two parts, both computed for every candidate ungauged basin c:

1. variance reduction: the regression of transformed parameters on standardised attributes
   gives at a target t the prediction variance s^2 (1 + x_t' (X'X)^-1 x_t). Gauging c adds its
   design row x_c to X; by the Sherman-Morrison formula (Sherman and Morrison 1950)
   (A + x x')^-1 = A^-1 - A^-1 x x' A^-1 / (1 + x' A^-1 x), so the variance at t drops by
   s^2 (x_t' A^-1 x_c)^2 / (1 + x_c' A^-1 x_c), A = X'X. The part is the drop averaged over
   the region's ungauged basins, as a share of their average variance (s^2 cancels; it is
   assumed unchanged by the new gauge). This is the I-optimality criterion of optimal design
   (Atkinson, Donev and Tobias 2007, Optimum Experimental Designs, with SAS).
2. donor spread: the standard deviation of the transformed parameters (log k) of the
   candidate's similarity donors, divided by their standard deviation over all gauged basins
   (how much its nearest basins in attributes disagree, relative to the region).

Score = mean of the two parts, each divided by its largest value over the candidates (so each
lies in 0..1 and weighs the same); rank 1 = highest score. See ``docs/screening.md``.

References
----------
Sherman, J., Morrison, W. J. (1950): Adjustment of an inverse matrix corresponding to a change
in one element of a given matrix. Ann. Math. Stat. 21(1), 124-127.
"""

from __future__ import annotations

import difflib
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional.applicability import applicability
from regional.errors import InputError
from regional.fitted import FittedRegion, fit_result
from regional.transfer import RegressionFit
from regional.transfer.folds import row_blocks
from regional.transfer.step import fit_methods

if TYPE_CHECKING:  # pragma: no cover - annotations only; pipeline sits below this module
    from regional.region import Region
    from regional.result import RunResult

TABLE_COLUMNS = (
    "rank",
    "score",
    "variance_reduction",
    "donor_spread",
    "reason",
    "estimation_reduction",
    "leverage",
    "nearest_donor_distance",
    "applicable",
)
"""Leading columns of :attr:`Screening.table`; ``donor_ratio_<p>`` per log parameter follow."""
DROP_BLOCK_CELLS = 1_000_000
"""Targets x candidates held at once by :func:`variance_reduction` (8 MB of float64)."""


@dataclass(frozen=True)
class Screening:
    """Candidate gauge sites ranked by what a gauge there would teach the region.

    Attributes
    ----------
    table : DataFrame
        Indexed by ``basin_id`` (candidates), sorted by ``rank`` (1 = best): ``score`` (0..1),
        ``variance_reduction`` (share 0..1 of the average regression prediction variance over
        the ungauged basins removed by a gauge here), ``estimation_reduction`` (the same drop
        as a share of the coefficients' part of that variance), ``donor_spread`` (standard
        deviation of the similarity donors' transformed parameters over the regional one),
        ``reason``
        (plain words), ``leverage`` (x_c' (X'X)^-1 x_c, mean over parameters),
        ``nearest_donor_distance`` (standardised attributes), ``applicable`` (see
        :func:`regional.applicability.applicability`), and ``donor_ratio_<p>`` (largest over
        smallest donor value of each log-transformed parameter).
    notes : tuple of str
        Assumptions and what was left out.
    """

    table: pd.DataFrame
    notes: tuple[str, ...]


def rank_one_update(xtx_inv: np.ndarray, x_new: np.ndarray) -> np.ndarray:
    """(X'X + x x')^-1 from (X'X)^-1 by the Sherman-Morrison formula (Sherman and Morrison 1950).

    Parameters
    ----------
    xtx_inv : ndarray (p, p)
        Symmetric inverse (X'X)^-1.
    x_new : ndarray (p,)
        The design row added.

    Returns
    -------
    ndarray (p, p)
        A^-1 - A^-1 x x' A^-1 / (1 + x' A^-1 x).
    """
    inverse = np.asarray(xtx_inv, dtype=float)
    x = np.asarray(x_new, dtype=float).ravel()
    if inverse.shape != (len(x), len(x)):
        raise ValueError(
            f"rank_one_update: (X'X)^-1 shaped {inverse.shape} does not match a row of {len(x)}"
        )
    ax = inverse @ x
    return inverse - np.outer(ax, ax) / (1.0 + x @ ax)


def variance_reduction(
    regression: RegressionFit, candidates: pd.DataFrame, targets: pd.DataFrame
) -> pd.DataFrame:
    """Share of the average prediction variance over ``targets`` removed by gauging each candidate.

    Closed form of the rank-one update: the variance at target t falls by
    s^2 (x_t' A^-1 x_c)^2 / (1 + x_c' A^-1 x_c) (A = X'X); the share is the mean drop over the
    targets divided by their mean variance s^2 (1 + x_t' A^-1 x_t).

    Parameters
    ----------
    regression : RegressionFit
        Fitted on the gauged basins.
    candidates, targets : DataFrame
        Attributes of the candidate sites and of the basins predicted, indexed by basin id.

    Returns
    -------
    DataFrame
        Indexed by candidate ``basin_id``: ``variance_reduction`` (mean over parameters),
        ``estimation_reduction`` (the same drop as a share of the estimation part
        s^2 x_t' A^-1 x_t alone, the part a gauge can reduce) and ``leverage``, then
        ``variance_reduction_<p>`` per parameter.
    """
    x_c, x_t = regression.design_rows(candidates), regression.design_rows(targets)
    shares, leverages, estimation = {}, {}, {}
    for name in regression.parameters_:
        inverse = regression.design_inverse_[name]
        rows_c, rows_t = x_c[name].to_numpy(), x_t[name].to_numpy()
        leverage = np.einsum("ij,jk,ik->i", rows_c, inverse, rows_c)
        before = 1.0 + np.einsum("ij,jk,ik->i", rows_t, inverse, rows_t)
        drop = _mean_drop(rows_t @ inverse, rows_c, leverage)
        shares[name], leverages[name] = drop / before.mean(), leverage
        estimation[name] = drop / (before.mean() - 1.0)
    index = pd.Index(candidates.index.astype(str), name="basin_id")
    table = pd.DataFrame(
        {
            "variance_reduction": np.mean(list(shares.values()), axis=0),
            "estimation_reduction": np.mean(list(estimation.values()), axis=0),
            "leverage": np.mean(list(leverages.values()), axis=0),
        },
        index=index,
    )
    for name, share in shares.items():
        table[f"variance_reduction_{name}"] = share
    return table


def _mean_drop(
    left: np.ndarray, rows_c: np.ndarray, leverage: np.ndarray, *, cells: int = DROP_BLOCK_CELLS
) -> np.ndarray:
    """Mean over the targets of (x_t' A^-1 x_c)^2 / (1 + x_c' A^-1 x_c) for each candidate c,
    ``left`` holding the rows x_t' A^-1 (targets x p): a block of candidates at a time, never
    all targets x all candidates (2,500 x 2,500 in float64 are 50 MB, and the formula holds
    three such at once). Every block holds two candidates or more: a single column would
    be multiplied and averaged by other routines (matrix times vector, pairwise sums), whose
    last digits differ; from two on each candidate's mean is the same whatever the block."""
    drop = np.empty(len(rows_c))
    for part in _pairs_or_more(row_blocks(len(rows_c), len(left), max(cells, 2 * len(left)))):
        cross = left @ rows_c[part].T  # (targets, candidates of the block)
        drop[part] = (cross**2 / (1.0 + leverage[part])).mean(axis=0)
    return drop


def _pairs_or_more(blocks: list[slice]) -> list[slice]:
    """The blocks with a lone last row joined to the block before it."""
    if len(blocks) > 1 and blocks[-1].stop - blocks[-1].start == 1:
        return [*blocks[:-2], slice(blocks[-2].start, blocks[-1].stop)]
    return blocks


def screen_candidates(result: RunResult, *, candidates: Sequence[str] | None = None) -> Screening:
    """Rank the candidate gauge sites of a finished run (see :func:`screen_region`).

    Parameters
    ----------
    result : RunResult
        From :func:`regional.pipeline.run`; its fitted region is used.
    candidates : sequence of str, optional
        Ungauged basin ids; default ``[screening] candidates``, else every ungauged basin.
    """
    return screen_region(fit_result(result), result.region, candidates=candidates)


def screen_region(
    fitted: FittedRegion, region: Region, *, candidates: Sequence[str] | None = None
) -> Screening:
    """Rank candidate gauge sites by variance reduction and donor disagreement.

    Parameters
    ----------
    fitted : FittedRegion
        The fitted region (its regression fit on every gauged basin is used).
    region : Region
        The region: its ungauged basins and their attributes.
    candidates : sequence of str, optional
        Ungauged basin ids; default ``[screening] candidates``, else every ungauged basin.

    Returns
    -------
    Screening

    Raises
    ------
    InputError
        For a candidate that is not a basin of the region or is already gauged, or a region
        without ungauged basins.
    """
    if candidates is None:
        candidates = region.settings.screening.candidates
    chosen = candidate_ids(region, candidates)
    attributes = region.attributes
    return screen_sites(fitted, attributes.loc[chosen], attributes.loc[list(region.ungauged)])


def screen_sites(fitted: FittedRegion, sites: pd.DataFrame, targets: pd.DataFrame) -> Screening:
    """Rank candidate sites from a fitted region alone (see :func:`screen_candidates`).

    Parameters
    ----------
    fitted : FittedRegion
        The fitted region (its regression is refit on the stored training table).
    sites : DataFrame
        Candidate sites x attributes, indexed by id.
    targets : DataFrame
        The ungauged basins whose prediction variance a new gauge should reduce.

    Returns
    -------
    Screening
    """
    regression = fitted.regression()
    gauged = fitted.training[fitted.training_columns]
    reduction = variance_reduction(regression, sites, targets)
    spread = _donor_spread(fitted, sites)
    usable = applicability(gauged, sites, fitted.attributes)
    table = _score(reduction, spread, usable)
    table["reason"] = _reasons(table, spread, usable, len(targets))
    ordered = [*TABLE_COLUMNS, *[c for c in table.columns if c not in TABLE_COLUMNS]]
    return Screening(table=table[ordered], notes=_notes(regression, spread, len(targets)))


def candidate_ids(region: Region, candidates: Sequence[str] | None) -> list[str]:
    """The candidate sites, checked: ungauged basins of the region (default: every one)."""
    if candidates is None:
        candidates = region.ungauged
    chosen = [str(c) for c in candidates]
    if not chosen or not region.ungauged:
        raise InputError(
            "screening needs at least one ungauged candidate basin; the region has "
            f"{len(region.ungauged)} ungauged basins and {len(chosen)} candidates were given: "
            "list ungauged basin ids in [screening] candidates"
        )
    known = set(map(str, region.attributes.index))
    unknown = [c for c in chosen if c not in known]
    if unknown:
        close = difflib.get_close_matches(unknown[0], sorted(known), n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise InputError(
            f"[screening] candidates: basin {unknown[0]!r} is not in the basins layer{hint}; "
            f"{len(unknown)} unknown id(s) in all; list ids of ungauged basins"
        )
    gauged = [c for c in chosen if c in set(region.gauged)]
    if gauged:
        raise InputError(
            f"[screening] candidates: basin {gauged[0]!r} is already gauged ({len(gauged)} gauged "
            "candidate(s)); a candidate site must be an ungauged basin: remove it from the list"
        )
    return list(dict.fromkeys(chosen))


def _donor_spread(fitted: FittedRegion, sites: pd.DataFrame) -> pd.DataFrame:
    """Spread of the similarity donors' transformed parameters at each site, over the region's."""
    transforms = fitted.transforms
    names = list(transforms)
    calibrated = fitted.training[names]
    n_donors = min(fitted.options.donors_for("similarity"), len(calibrated))
    estimators, _ = fit_methods(  # its warnings were reported by leave-one-out
        fitted.training[fitted.training_columns],
        calibrated,
        transforms=transforms,
        options=replace(fitted.options, attributes=tuple(fitted.attributes)),
        level=fitted.level,
        methods=["similarity"],
    )
    sets = estimators["similarity"].donate(sites).sets
    index = pd.Index(sites.index.astype(str), name="basin_id")
    table = pd.DataFrame(index=index)
    parts = []
    for name in names:
        log = transforms[name] == "log"
        values = sets[name].to_numpy(dtype=float)
        values = np.log(values) if log else values
        regional = calibrated[name].to_numpy(dtype=float)
        regional_sd = np.std(np.log(regional) if log else regional, ddof=1)
        grouped = pd.Series(values, index=sets["target_id"].astype(str)).groupby(level=0)
        spread = grouped.std(ddof=0).reindex(index).to_numpy(dtype=float)
        parts.append(spread / regional_sd if regional_sd > 0 else np.zeros(len(index)))
        if log:
            table[f"donor_ratio_{name}"] = np.exp(grouped.max() - grouped.min()).reindex(index)
    table.insert(0, "donor_spread", np.mean(parts, axis=0))
    table.attrs["n_donors"] = n_donors
    return table


def _score(reduction: pd.DataFrame, spread: pd.DataFrame, usable: pd.DataFrame) -> pd.DataFrame:
    table = reduction.join(spread).join(usable[["nearest_donor_distance", "applicable"]])
    table["score"] = 0.5 * (_scaled(table["variance_reduction"]) + _scaled(table["donor_spread"]))
    order = table.reset_index().sort_values(["score", "basin_id"], ascending=[False, True])
    table = table.loc[order["basin_id"]]
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    return table


def _scaled(values: pd.Series) -> pd.Series:
    largest = float(values.max())
    return values / largest if largest > 0 else values * 0.0


def _reasons(table: pd.DataFrame, spread: pd.DataFrame, usable, n_targets: int) -> list[str]:
    n_donors = spread.attrs.get("n_donors", 0)
    ratios = [c for c in spread.columns if c.startswith("donor_ratio_")]
    reasons = []
    for basin, row in table.iterrows():
        parts = [_where(usable.loc[basin])]
        parts.append(
            f"a gauge here would cut the average regression prediction variance over the "
            f"{n_targets} ungauged basins by {row['variance_reduction']:.1%} "
            f"({row['estimation_reduction']:.0%} of its part due to the estimated coefficients)"
        )
        for column in ratios:
            parameter = column.removeprefix("donor_ratio_")
            parts.append(
                f"its {n_donors} nearest donors disagree on {parameter} by a factor of "
                f"{row[column]:.1f}"
            )
        if not ratios:
            parts.append(f"its {n_donors} nearest donors' spread is {row['donor_spread']:.2f}")
        reasons.append("; ".join(parts))
    return reasons


def _where(check: pd.Series) -> str:
    if check["nearest_donor_distance"] > check["nearest_donor_limit"]:
        return "far from every gauged basin in attributes"
    if check["outside_range"]:
        return f"outside the gauged range of {check['outside_range']}"
    if not check["applicable"]:
        return "unusual among the gauged basins' attribute combinations"
    return "inside the gauged basins' attribute cloud"


def _notes(regression: RegressionFit, spread: pd.DataFrame, n_targets: int) -> tuple:
    selected = {name: terms for name, terms in regression.selected_.items()}
    listed = "; ".join(f"{p}: {', '.join(t) or 'intercept only'}" for p, t in selected.items())
    return (
        f"variance reduction: averaged over the {n_targets} ungauged basins, with the "
        f"regression's selected attributes ({listed}) and its residual variance assumed "
        "unchanged by the new gauge",
        "score: mean of the variance reduction and the donor spread, each divided by its "
        "largest value over the candidates",
    )
