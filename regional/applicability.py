"""Where the gauged basins support a target: attribute applicability and transfer skill.

:func:`applicability` flags targets outside the donors' attributes (range, Mahalanobis 1936
distance, nearest donor); :func:`transfer_skill` flags targets where the region's own
leave-one-out shows transfer failing, and :func:`local_bounds` widens their bounds to the
errors of their nearest gauged basins. See ``docs/prediction.md``.

References
----------
Mahalanobis, P. C. (1936): On the generalized distance in statistics. Proc. Natl. Inst. Sci.
India 2(1), 49-55.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import special

from regional.bounds import ConformalErrorModel, conformal_bounds
from regional.errors import InputError
from regional.transfer.folds import k_nearest, row_blocks

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.crossval import LeaveOneOut

APPLICABILITY_LEVEL = 0.95
"""Chi-square quantile the Mahalanobis distance squared is compared with."""
EIGEN_FLOOR = 1e-6
"""Eigenvalues of the donors' correlation matrix are floored at this share of the largest."""
FAILED_NSE = 0.0
"""Leave-one-out NSE at or below which transfer counts as failed at a gauged basin (no better
than the mean observed flow)."""
CLIMATE_ATTRIBUTE = "aridity"
"""Attribute whose range of well-scored gauged basins bounds the climate transfer works in."""
DISTANCE_BLOCK_CELLS = 4_000_000
"""Attribute differences (rows x donors x attributes) held at once by the distance searches
(32 MB of float64): the rows are taken a block at a time, never all targets x all donors."""


def applicability(
    attributes_gauged: pd.DataFrame,
    attributes_targets: pd.DataFrame,
    columns: Sequence[str],
) -> pd.DataFrame:
    """Flag targets whose attributes the gauged donors do not support.

    Three tests, any one flags the target:

    1. range: an attribute below the donors' minimum or above their maximum;
    2. Mahalanobis (1936) distance squared to the donors' mean, with the donors' covariance
       (correlation of the standardised attributes; eigenvalues floored at
       :data:`EIGEN_FLOOR` x the largest when singular), above the chi-square
       :data:`APPLICABILITY_LEVEL` quantile with p (attributes) degrees of freedom;
    3. nearest donor: the Euclidean distance to the nearest donor in attributes standardised
       with the donors' mean and standard deviation, above the largest nearest-neighbour
       distance among the donors themselves.

    Parameters
    ----------
    attributes_gauged : DataFrame
        Donor (gauged) basins x attributes, indexed by basin id.
    attributes_targets : DataFrame
        Target basins x attributes, indexed by basin id.
    columns : sequence of str
        Attributes compared (numeric, complete).

    Returns
    -------
    DataFrame
        Indexed by target ``basin_id``: ``applicable`` (bool), ``reason`` (str, "" when
        applicable: names the attribute with its value and the range, or the test with its value
        and limit), ``outside_range`` (attribute names, comma separated), ``mahalanobis_d2``,
        ``mahalanobis_limit``, ``nearest_donor_distance``, ``nearest_donor_limit``.
    """
    columns = list(columns)
    donors, targets = _attribute_arrays(attributes_gauged, attributes_targets, columns)
    reasons, outside = _range_reasons(donors, targets, columns)
    z_donors, z_targets = _standardised(donors, targets)
    d2, d2_limit = _mahalanobis(z_donors, z_targets)
    nearest, nearest_limit = _nearest_donor(z_donors, z_targets)
    for i in range(len(targets)):
        if d2[i] > d2_limit:
            reasons[i].append(
                f"Mahalanobis distance squared {d2[i]:.1f} to the donors exceeds the chi-square "
                f"{APPLICABILITY_LEVEL:.0%} quantile {d2_limit:.1f} ({len(columns)} attributes)"
            )
        if nearest[i] > nearest_limit:
            reasons[i].append(
                f"nearest donor in standardised attributes at {nearest[i]:.2f}, farther than the "
                f"largest nearest-donor distance among the donors ({nearest_limit:.2f})"
            )
    return pd.DataFrame(
        {
            "applicable": [not r for r in reasons],
            "reason": ["; ".join(r) for r in reasons],
            "outside_range": [", ".join(o) for o in outside],
            "mahalanobis_d2": d2,
            "mahalanobis_limit": d2_limit,
            "nearest_donor_distance": nearest,
            "nearest_donor_limit": nearest_limit,
        },
        index=pd.Index(attributes_targets.index.astype(str), name="basin_id"),
    )


def _attribute_arrays(gauged, targets, columns):
    for role, table in (("gauged", gauged), ("target", targets)):
        missing = [c for c in columns if c not in table.columns]
        if missing:
            raise InputError(
                f"applicability: the {role} attribute table lacks column(s) {missing}; every "
                "transfer attribute is needed at every basin"
            )
        values = table[columns].to_numpy(dtype=float)
        if not np.isfinite(values).all():
            row, col = np.argwhere(~np.isfinite(values))[0]
            raise InputError(
                f"applicability: attribute {columns[col]!r} is missing or not finite at {role} "
                f"basin {table.index[row]!r}; fill it in the basins layer"
            )
    if len(gauged) < 2:
        raise InputError(
            f"applicability needs at least 2 gauged basins to compare with; found {len(gauged)}"
        )
    return gauged[columns].to_numpy(dtype=float), targets[columns].to_numpy(dtype=float)


def _range_reasons(donors, targets, columns):
    low, high = donors.min(axis=0), donors.max(axis=0)
    reasons: list[list[str]] = [[] for _ in range(len(targets))]
    outside: list[list[str]] = [[] for _ in range(len(targets))]
    for i, j in np.argwhere((targets < low) | (targets > high)):
        side = "below" if targets[i, j] < low[j] else "above"
        reasons[i].append(
            f"{columns[j]} {targets[i, j]:.4g} {side} the donors' range "
            f"{low[j]:.4g} to {high[j]:.4g}"
        )
        outside[i].append(columns[j])
    return reasons, outside


def _standardised(donors, targets):
    mean = donors.mean(axis=0)
    scale = donors.std(axis=0, ddof=1)
    scale = np.where(scale > 0, scale, 1.0)  # a constant attribute: only the range test sees it
    return (donors - mean) / scale, (targets - mean) / scale


def _mahalanobis(z_donors, z_targets) -> tuple[np.ndarray, float]:
    p = z_donors.shape[1]
    covariance = np.atleast_2d(np.cov(z_donors, rowvar=False))
    eigenvalues, vectors = np.linalg.eigh(covariance)
    floor = EIGEN_FLOOR * max(float(eigenvalues.max()), 1e-12)
    eigenvalues = np.maximum(eigenvalues, floor)
    projected = (z_targets - z_donors.mean(axis=0)) @ vectors
    d2 = np.sum(projected**2 / eigenvalues, axis=1)
    return d2, chi2_quantile(APPLICABILITY_LEVEL, p)


def chi2_quantile(probability: float, dof: int) -> float:
    """Quantile of the chi-squared distribution with ``dof`` degrees of freedom.

    2 P^-1(dof / 2, probability), P the regularised lower incomplete gamma function (the
    formula ``scipy.stats.chi2.ppf`` evaluates; computed here with ``scipy.special`` so that
    estimates at new sites need not import ``scipy.stats``).
    """
    return float(2.0 * special.gammaincinv(dof / 2.0, probability))


def _distances(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.sqrt(np.maximum(((a[:, None, :] - b[None, :, :]) ** 2).sum(axis=2), 0.0))


def _nearest_donor(
    z_donors, z_targets, *, cells: int = DISTANCE_BLOCK_CELLS
) -> tuple[np.ndarray, float]:
    """Each target's distance to its nearest donor, and the largest nearest-neighbour distance
    among the donors themselves; a block of rows at a time."""
    n, p = z_donors.shape
    nearest = np.empty(len(z_targets))
    for part in row_blocks(len(z_targets), n * p, cells):
        nearest[part] = _distances(z_targets[part], z_donors).min(axis=1)
    among = np.empty(n)
    for part in row_blocks(n, n * p, cells):
        block = _distances(z_donors[part], z_donors)
        rows = np.arange(part.stop - part.start)
        block[rows, rows + part.start] = np.inf  # not its own neighbour
        among[part] = block.min(axis=1)
    return nearest, float(among.max())


def _nearest_order(z_targets, z_donors, k: int, *, cells: int = DISTANCE_BLOCK_CELLS):
    """(targets, k) positions of each target's k nearest donors, nearest first (ties in donor
    order); a block of targets at a time."""
    order = np.empty((len(z_targets), k), dtype=np.intp)
    for part in row_blocks(len(z_targets), z_donors.size, cells):
        order[part] = k_nearest(_distances(z_targets[part], z_donors), k)
    return order


def transfer_skill(
    attributes_gauged: pd.DataFrame,
    attributes_targets: pd.DataFrame,
    loo_nse: pd.Series,
    *,
    columns: Sequence[str],
    n_nearest: int,
) -> pd.DataFrame:
    """Flag targets where the region's own leave-one-out shows transfer failing.

    Two tests, either flags the target (``skill_applicable`` False, with the reason):

    1. climate: where some gauged basins' leave-one-out NSE is at or below :data:`FAILED_NSE`,
       the target's :data:`CLIMATE_ATTRIBUTE` (aridity, mean PET / mean P) lies outside the
       range of the gauged basins where transfer scored above it (the climate in which the
       region's donors transfer well);
    2. nearest gauged basins: the median leave-one-out NSE of the ``n_nearest`` gauged basins
       nearest to the target (Euclidean distance in attributes standardised with the gauged
       basins' mean and standard deviation) is at or below :data:`FAILED_NSE`.

    Parameters
    ----------
    attributes_gauged, attributes_targets : DataFrame
        Gauged and target basins x attributes, indexed by basin id.
    loo_nse : Series
        Leave-one-out NSE of the chosen (model, method) per gauged basin (NaN = not scored).
    columns : sequence of str
        Attributes of the distance (numeric, complete).
    n_nearest : int
        Gauged basins taken as the target's nearest (>= 1; at most all gauged).

    Returns
    -------
    DataFrame
        Indexed by target ``basin_id``: ``skill_applicable`` (bool), ``skill_reason`` (str),
        ``nearest_gauged`` (ids, comma separated, nearest first), ``nearest_loo_nse`` (their
        median leave-one-out NSE), ``well_scored_low``, ``well_scored_high`` (the climate
        attribute's range among well-scored gauged basins; NaN when no basin failed or the
        attribute is absent).
    """
    columns = list(columns)
    donors, targets = _attribute_arrays(attributes_gauged, attributes_targets, columns)
    nse = loo_nse.reindex(attributes_gauged.index.astype(str)).to_numpy(dtype=float)
    z_donors, z_targets = _standardised(donors, targets)
    k = int(np.clip(n_nearest, 1, len(donors)))
    order = _nearest_order(z_targets, z_donors, k)
    ids = attributes_gauged.index.astype(str).to_numpy()
    nearest_nse = np.array(
        [np.nanmedian(nse[row]) if np.isfinite(nse[row]).any() else np.nan for row in order]
    )
    low, high = _well_scored_range(attributes_gauged, nse)
    reasons: list[list[str]] = [[] for _ in range(len(targets))]
    if np.isfinite(low):
        climate = attributes_targets[CLIMATE_ATTRIBUTE].to_numpy(dtype=float)
        for i in np.flatnonzero((climate < low) | (climate > high)):
            side = "below" if climate[i] < low else "above"
            reasons[i].append(
                f"{CLIMATE_ATTRIBUTE} {climate[i]:.3g} {side} the range {low:.3g} to {high:.3g} "
                f"of the gauged basins where transfer scored leave-one-out NSE > {FAILED_NSE:g} "
                "(outside the climate in which this region's transfer works)"
            )
    for i in np.flatnonzero(nearest_nse <= FAILED_NSE):
        reasons[i].append(
            f"transfer failed at the {k} nearest gauged basins ({', '.join(ids[order[i]])}): "
            f"median leave-one-out NSE {nearest_nse[i]:.2f}"
        )
    return pd.DataFrame(
        {
            "skill_applicable": [not r for r in reasons],
            "skill_reason": ["; ".join(r) for r in reasons],
            "nearest_gauged": [", ".join(ids[row]) for row in order],
            "nearest_loo_nse": nearest_nse,
            "well_scored_low": low,
            "well_scored_high": high,
        },
        index=pd.Index(attributes_targets.index.astype(str), name="basin_id"),
    )


def _well_scored_range(attributes_gauged: pd.DataFrame, nse: np.ndarray) -> tuple[float, float]:
    """Climate attribute's range over well-scored gauged basins; NaN when none failed."""
    scored = np.isfinite(nse)
    failed = scored & (nse <= FAILED_NSE)
    if CLIMATE_ATTRIBUTE not in attributes_gauged.columns or not failed.any():
        return np.nan, np.nan
    climate = attributes_gauged[CLIMATE_ATTRIBUTE].to_numpy(dtype=float)
    good = scored & ~failed & np.isfinite(climate)
    if not good.any():  # failed everywhere: the nearest-basins test flags every target
        return np.nan, np.nan
    return float(climate[good].min()), float(climate[good].max())


def method_nse(loo: LeaveOneOut, method: str) -> pd.Series:
    """Leave-one-out NSE of one transfer method per gauged basin (indexed by basin id)."""
    scores = loo.scores[loo.scores["method"] == method]
    return scores.set_index(scores["basin_id"].astype(str))["nse"].astype(float)


def join_skill(usable: pd.DataFrame, skill: pd.DataFrame) -> pd.DataFrame:
    """Applicability with the transfer-skill tests: reasons joined, bounds source named."""
    usable = usable.join(skill)
    failing = ~usable["skill_applicable"]
    joined = [
        "; ".join(part for part in (reason, extra) if part)
        for reason, extra in zip(usable["reason"], usable["skill_reason"], strict=True)
    ]
    usable["reason"] = joined
    usable["applicable"] = usable["applicable"] & ~failing
    usable["bounds_from"] = np.where(
        failing, "nearest gauged basins: " + usable["nearest_gauged"], "all gauged basins"
    )
    return usable


def local_bounds(
    flow_mm: pd.DataFrame,
    low: pd.DataFrame,
    high: pd.DataFrame,
    *,
    skill: pd.DataFrame,
    observed: pd.DataFrame,
    simulated: pd.DataFrame,
    error_model: ConformalErrorModel,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Where transfer is known to fail, widen the bounds to the nearest gauged basins' errors.

    The error model is rebuilt from the leave-one-out residuals of the target's nearest gauged
    basins only (same classes and class levels as the regional one) and the target's bounds
    become the wider of the two on every day, so a target in a climate where transfer failed
    carries the errors transfer made there. The two steps, :func:`local_error_models` and
    :func:`widened_bounds`, may run apart (on a cluster the second runs in the prediction's
    tasks).

    Parameters
    ----------
    flow_mm, low, high : DataFrame
        Days x targets: simulated flow and its regional bounds, mm/day.
    skill : DataFrame
        From :func:`transfer_skill` (targets where ``skill_applicable`` is False are widened).
    observed, simulated : DataFrame
        Evaluation days x gauged basins: observed flow and the chosen method's leave-one-out
        flow, mm/day (only the nearest gauged basins' columns are read).
    error_model : ConformalErrorModel
        The regional error model (its classes and class levels are kept).

    Returns
    -------
    (low, high) : tuple of DataFrame
        The bounds, mm/day, never narrower than those given.
    """
    local = local_error_models(
        skill, observed=observed, simulated=simulated, error_model=error_model
    )
    return widened_bounds(flow_mm, low, high, local)


def local_error_models(
    skill: pd.DataFrame,
    *,
    observed: pd.DataFrame,
    simulated: pd.DataFrame,
    error_model: ConformalErrorModel,
) -> dict[str, ConformalErrorModel]:
    """The error model of each target where transfer is known to fail (``skill_applicable``
    False), from its nearest gauged basins' leave-one-out residuals only (see
    :func:`local_bounds`); arguments as there."""
    local = {}
    for target in skill.index[~skill["skill_applicable"]]:
        nearest = skill.loc[target, "nearest_gauged"].split(", ")
        local[str(target)] = conformal_bounds(
            observed[nearest],
            simulated[nearest],
            level=error_model.level,
            n_classes=error_model.n_classes,
            class_levels=error_model.levels,
        )
    return local


def widened_bounds(
    flow_mm: pd.DataFrame,
    low: pd.DataFrame,
    high: pd.DataFrame,
    local: Mapping[str, ConformalErrorModel],
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The bounds of the targets of ``flow_mm`` with a ``local`` error model
    (:func:`local_error_models`) made the wider of the regional and the local ones on every
    day (mm/day); the others as given."""
    targets = [t for t in flow_mm.columns if t in local]
    if not targets:
        return low, high
    low, high = low.copy(), high.copy()
    for target in targets:
        local_low, local_high = local[target].bounds(flow_mm[[target]])
        low[target] = np.minimum(low[target], local_low[target])
        high[target] = np.maximum(high[target], local_high[target])
    return low, high
