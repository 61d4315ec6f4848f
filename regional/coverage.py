"""How often the daily flow bounds hold in leave-one-out.

:func:`loo_coverage` measures, for every (model, method) of a run, the share of each gauged
basin's observed days inside bounds built WITHOUT that basin (all basins at once, see
:func:`_held_out_quantiles`), on all days, per flow class and on the lowest and highest
deciles (:func:`coverage_shares`). The same shares at basins held out of the whole fit are
:mod:`regional.repeatcoverage`. See ``docs/prediction.md``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional.bounds import (
    check_level,
    default_n_classes,
)
from regional.compute import InProcessExecutor
from regional.kept import is_kept, start_near
from regional.residuals import (
    BLOCK_BASINS,
    aligned,
    basin_offsets,
    class_residuals,
    flow_classes,
    pooled_bounds,
)

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import ModelRun

REPORTED_DECILES = (1, 10)
"""Deciles of each basin's simulated flow whose coverage is reported (lowest and highest)."""


def _held_out_coverage(
    observed: pd.DataFrame, simulated: pd.DataFrame, level: float, *, block: int = BLOCK_BASINS
) -> dict:
    """Coverage of each basin's observed days by bounds built from the OTHER basins only.

    Classes and offsets are within-basin functions of the simulated flow, so each residual is
    computed once; the quantiles without each basin come from :func:`_held_out_quantiles`, all
    basins at once. The number of classes depends on record lengths only and is set once.
    Everything within a basin is computed ``block`` basins at a time (the same numbers: each
    basin's arithmetic does not depend on the others; the pooled residuals are put back in
    day-then-basin order before they are sorted).
    """
    obs, sim = aligned(observed, simulated)
    k = default_n_classes(obs)
    n_columns = obs.shape[1]
    blocks = [slice(a, min(a + block, n_columns)) for a in range(0, n_columns, block)]
    data = class_residuals(obs, sim, k, block=block)
    lower = np.empty((k, n_columns))
    upper = np.empty((k, n_columns))
    for c, (values, basins) in enumerate(zip(data.values, data.basins, strict=True)):
        lower[c], upper[c] = _held_out_quantiles(values, basins, level, n_columns)
    shares: dict[str, list[np.ndarray]] = {}
    offsets = basin_offsets(sim)
    for part in blocks:
        bounds = (lower, upper, offsets[part])
        for name, values in _block_shares(obs[:, part], sim[:, part], bounds, k, part):
            shares.setdefault(name, []).append(values)
    shares = {name: np.concatenate(values) for name, values in shares.items()}
    valid = np.isfinite(obs)
    return {
        "coverage": _mean_share(shares["all"]),
        **{f"coverage_decile_{d}": _mean_share(shares[f"decile {d}"]) for d in REPORTED_DECILES},
        "n_days": int(valid.sum()),
        "n_basins": int(valid.any(axis=0).sum()),
    }


def _block_shares(obs, sim, bounds, k: int, part: slice):
    """Per group, each basin's share of observed days inside its bounds (one block)."""
    lower, upper, offsets = bounds
    classes = flow_classes(sim, k)
    columns = np.broadcast_to(np.arange(part.start, part.stop), obs.shape)
    with np.errstate(over="ignore"):
        low = (sim + offsets) * np.exp(np.minimum(lower, 0.0)[classes, columns]) - offsets
        high = (sim + offsets) * np.exp(np.maximum(upper, 0.0)[classes, columns]) - offsets
    low, high = np.clip(np.minimum(low, sim), 0.0, None), np.maximum(high, sim)
    return coverage_shares(obs, sim, low, high, k).items()


def coverage_shares(obs, sim, low, high, n_classes: int) -> dict[str, np.ndarray]:
    """Share of each basin's observed days inside its bounds: all days, per class, per decile.

    Classes and deciles are within-basin quantiles of the simulated flow (as in the error
    model), so they exist at an ungauged basin. A basin without an observed day in a group gets
    NaN there.
    """
    valid = np.isfinite(obs)
    inside = (obs >= low) & (obs <= high) & valid
    groups = {"all": np.ones_like(valid)}
    classes = flow_classes(sim, n_classes)
    for c in range(n_classes):
        groups[f"class {c + 1}"] = classes == c
    deciles = flow_classes(sim, 10)
    for d in REPORTED_DECILES:
        groups[f"decile {d}"] = deciles == d - 1
    shares = {}
    for name, member in groups.items():
        days = (valid & member).sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            shares[name] = np.where(days > 0, (inside & member).sum(axis=0) / days, np.nan)
    return shares


def _mean_share(shares: np.ndarray) -> float:
    shares = shares[np.isfinite(shares)]
    return float(np.mean(shares)) if len(shares) else np.nan


def _held_out_quantiles(
    values: np.ndarray, basins: np.ndarray, level: float, n_columns: int
) -> tuple[np.ndarray, np.ndarray]:
    """Basin-weighted conformal quantiles of one class with each basin left out in turn.

    Equal to :func:`regional.residuals.pooled_bounds` on the class's residuals without basin j,
    for every j at once: with B basins in the class and n_b days of basin b, the cumulative
    weight without j at sorted position i is B / (B - 1) x (C(i) - m_j(i) / (B n_j)), C the
    full cumulative weight and m_j(i) the days of basin j at or before i; a vectorised
    bisection over i finds each quantile in O(B log D) instead of refitting B times.

    Returns
    -------
    lower, upper : ndarray (n_columns,)
        Quantiles without each basin (column); basins absent from the class get the full ones.
    """
    full_low, full_high = pooled_bounds(values, basins, level)
    lower, upper = np.full(n_columns, full_low), np.full(n_columns, full_high)
    days = len(values)
    if days == 0:
        return lower, upper
    codes, inverse, counts = np.unique(basins, return_inverse=True, return_counts=True)
    n_basins = len(codes)
    if n_basins == 1:
        lower[codes], upper[codes] = -np.inf, np.inf
        return lower, upper
    cumulative = np.cumsum(1.0 / (n_basins * counts[inverse]))
    order = np.argsort(inverse, kind="stable")
    keys = inverse[order] * (days + 1) + order
    base = np.arange(n_basins) * (days + 1)
    starts = np.searchsorted(keys, base)
    scale = n_basins / (n_basins - 1)

    def without(position: np.ndarray) -> np.ndarray:
        own = np.searchsorted(keys, base + position, side="right") - starts
        return scale * (cumulative[position] - own / (n_basins * counts))

    remaining = days - counts
    probabilities = (
        np.floor((remaining + 1) * (1.0 - level) / 2.0) / remaining,
        np.ceil((remaining + 1) * (1.0 + level) / 2.0) / remaining,
    )
    for out, probability, outside in zip(
        (lower, upper), probabilities, (-np.inf, np.inf), strict=True
    ):
        out[codes] = _bisect_quantiles(values, without, probability, outside, days)
        unreached = np.flatnonzero(np.isnan(out[codes]))
        for j in unreached:  # rounding left the last weight short of 1: refit that basin
            keep = basins != codes[j]
            bounds = pooled_bounds(values[keep], basins[keep], level)
            out[codes[j]] = bounds[0] if outside < 0 else bounds[1]
    return lower, upper


def _bisect_quantiles(values, without, probability, outside, days) -> np.ndarray:
    """Smallest sorted position whose held-out cumulative weight reaches ``probability``."""
    tolerance = 1e-12
    target = probability - tolerance
    lo = np.zeros(len(probability), dtype=np.int64)
    hi = np.full(len(probability), days, dtype=np.int64)
    while (lo < hi).any():
        mid = (lo + hi) // 2
        reached = without(np.minimum(mid, days - 1)) >= target
        active = lo < hi
        hi = np.where(active & reached, mid, hi)
        lo = np.where(active & ~reached, mid + 1, lo)
    result = np.where(lo < days, values[np.minimum(lo, days - 1)], np.nan)
    invalid = (probability <= tolerance) | (probability > 1.0 + tolerance)
    return np.where(invalid, outside, result)


def loo_coverage(runs: Mapping[str, ModelRun], *, level: float) -> pd.DataFrame:
    """Honest coverage of the conformal bounds of every (model, method) in leave-one-out.

    For each gauged basin the error model is built from the other basins' leave-one-out
    residuals and the share of the basin's observed evaluation days inside its bounds is
    counted; ``coverage`` is the mean of those shares over basins (each basin weighs the same).

    Parameters
    ----------
    runs : mapping
        Model name -> :class:`~regional.result.ModelRun` (leave-one-out done).
    level : float
        Nominal level of the bounds, in (0, 1).

    Returns
    -------
    DataFrame
        ``model``, ``method``, ``level``, ``coverage``, ``coverage_decile_1`` and
        ``coverage_decile_10`` (the same on the days in the lowest and highest tenth of each
        basin's simulated flow), ``n_days``, ``n_basins``.
    """
    return start_loo_coverage(runs, level=level)()


def start_loo_coverage(
    runs: Mapping[str, ModelRun], *, level: float, executor=None
) -> Callable[[], pd.DataFrame]:
    """:func:`loo_coverage` started now, its table given by the returned call.

    With a Dask executor (:mod:`regional.compute`) every (model, method) is a task, submitted
    by this call, which receives that method's leave-one-out flows (the observed flows are
    scattered once), so the workers measure while the caller goes on (at a lower priority
    than the tasks submitted before and after them: they fill the workers' gaps and the end
    of the stage); in process (default)
    the coverage is measured when the returned call is made. The same table either way.
    ``runs`` and ``level`` as in :func:`loo_coverage`; ``executor`` where the coverage is
    measured (default in this process).
    """
    level = check_level(level)
    executor = executor if executor is not None else InProcessExecutor()
    pairs = [(model, method) for model, run in runs.items() for method in run.loo.methods]
    deciles = [f"coverage_decile_{d}" for d in REPORTED_DECILES]
    columns = ["model", "method", "level", "coverage", *deciles, "n_days", "n_basins"]
    if any(is_kept(run.loo.observed) for run in runs.values()):
        waits = _coverage_near(runs, pairs, level)
        return lambda: pd.DataFrame([wait() for wait in waits], columns=columns)
    chunks = [[(model, method, runs[model].loo.simulated[method])] for model, method in pairs]
    job = _CoverageJob({model: run.loo.observed for model, run in runs.items()}, level)
    # behind the other work of the stage: they fill the gaps and the end of the held-out check
    wait = executor.start_map(_coverage_rows, chunks, job, priority=-1)
    return lambda: pd.DataFrame([row for rows in wait() for row in rows], columns=columns)


def _coverage_near(runs: Mapping[str, ModelRun], pairs, level: float) -> list[Callable]:
    """Each (model, method)'s row as a task next to its leave-one-out flows, where they were
    left on the workers (:mod:`regional.kept`), behind the other work of the stage."""
    return [
        start_near(
            _coverage_row,
            (runs[model].loo.observed, runs[model].loo.simulated[method]),
            model,
            method,
            level,
            priority=-1,
        )
        for model, method in pairs
    ]


@dataclass(frozen=True)
class _CoverageJob:
    """What every coverage task shares: each model's observed flows and the level."""

    observed: dict[str, pd.DataFrame]
    level: float


def _coverage_rows(chunk, job: _CoverageJob) -> list[dict]:
    """Rows of :func:`loo_coverage` for ``(model, method, simulated flow)`` items (a task)."""
    return [
        _coverage_row(job.observed[model], simulated, model, method, job.level)
        for model, method, simulated in chunk
    ]


def _coverage_row(observed, simulated, model: str, method: str, level: float) -> dict:
    """One (model, method)'s row of :func:`loo_coverage`."""
    return {
        "model": model,
        "method": method,
        "level": level,
        **_held_out_coverage(observed, simulated, level),
    }
