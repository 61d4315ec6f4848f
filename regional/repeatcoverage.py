"""How often the daily flow bounds hold at basins held out of the whole fit, and the widening.

Each repeat of the held-out check (:mod:`regional.repeats`) gives the flows of its training
and held-out basins; :func:`summarise_repeat` keeps what the coverage needs (the tails of the
repeat's error model, the held-out basins' flows, their flow statistics) so the training
basins' flows can be dropped. :func:`held_out_coverage` builds each repeat's error model from
its training basins only and counts the share of each held-out basin's observed days inside
its bounds, as :func:`regional.coverage.loo_coverage` does in leave-one-out; and
:func:`widened_levels` says which flow classes fall short and at what level to rebuild them.
See ``docs/prediction.md``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regional.bounds import (
    ConformalErrorModel,
    ResidualTails,
    check_level,
    conformal_bounds,
    default_n_classes,
)
from regional.coverage import coverage_shares

WIDEN_TOLERANCE = 0.03
"""A flow class whose held-out coverage falls short of the level by more is widened."""
MAX_CLASS_LEVEL = 0.995
"""Highest level a widened flow class is rebuilt at."""


@dataclass(frozen=True)
class HeldOutRepeat:
    """One repeat of the held-out check (:func:`regional.repeats.held_out_flows`).

    Attributes
    ----------
    held_out : tuple of str
        The gauged basins treated as ungauged in this repeat.
    training_flow : DataFrame
        Evaluation days x the other gauged basins (the training basins): each one's flow
        transferred from the other training basins only (leave-one-out within the training
        basins), mm/day. The error model of the repeat is built from these.
    held_out_flow : DataFrame
        Evaluation days x held-out basins: flow transferred from the training basins, mm/day.
    n_simulated, n_reused : int
        Basins of the repeat whose flow was simulated afresh, and whose donation equalled their
        leave-one-out donation so that the leave-one-out flow was reused.
    """

    held_out: tuple[str, ...]
    training_flow: pd.DataFrame
    held_out_flow: pd.DataFrame
    n_simulated: int
    n_reused: int


@dataclass(frozen=True)
class HeldOutSummary:
    """What the held-out check keeps of one repeat: no training basin's daily flow.

    Attributes
    ----------
    held_out : tuple of str
        The gauged basins treated as ungauged in this repeat.
    training : tuple of str
        The other gauged basins.
    tails : ResidualTails or None
        The tails of the repeat's error model (built from the training basins' flows), enough
        to rebuild it exactly at the nominal or any widened level.
    held_out_flow : DataFrame or None
        Evaluation days x held-out basins: flow transferred from the training basins, mm/day.
        Both None in the client of a cluster run whose leave-one-out flows stayed on the
        workers (:mod:`regional.kept`): the whole summary stays there too.
    training_statistics, held_out_statistics : DataFrame or None
        Flow statistics (:func:`regional.flowstats.statistics_frame`) of the training and
        held-out basins' flows, for the statistics' own held-out check; None when not kept.
    n_simulated, n_reused : int
        As in :class:`HeldOutRepeat`.
    """

    held_out: tuple[str, ...]
    training: tuple[str, ...]
    tails: ResidualTails | None
    held_out_flow: pd.DataFrame | None
    training_statistics: pd.DataFrame | None
    held_out_statistics: pd.DataFrame | None
    n_simulated: int
    n_reused: int


def summarise_repeat(
    observed: pd.DataFrame,
    repeat: HeldOutRepeat,
    *,
    level: float,
    n_classes: int | None = None,
    statistics=None,
) -> HeldOutSummary:
    """The summary of a repeat that :func:`held_out_coverage` needs (its flows can be dropped).

    Parameters
    ----------
    observed : DataFrame
        Evaluation days x gauged basins, observed flow, mm/day.
    repeat : HeldOutRepeat
        From :func:`regional.repeats.held_out_flows`.
    level : float
        Nominal level: the tails serve this level and any wider one.
    n_classes : int, optional
        Flow classes (default: chosen from the training basins' records).
    statistics : callable(flow DataFrame) -> DataFrame, optional
        Flow statistics of a days x basins table, kept for the training and held-out basins.
    """
    training = list(repeat.training_flow.columns)
    classes = n_classes or default_n_classes(observed[training].to_numpy(dtype=float))
    # the observed flow of every gauged basin, read a block of training basins at a time
    tails = ResidualTails.of(observed, repeat.training_flow, level=level, n_classes=classes)
    return HeldOutSummary(
        held_out=tuple(repeat.held_out),
        training=tuple(str(b) for b in training),
        tails=tails,
        held_out_flow=repeat.held_out_flow,
        training_statistics=None if statistics is None else statistics(repeat.training_flow),
        held_out_statistics=None if statistics is None else statistics(repeat.held_out_flow),
        n_simulated=repeat.n_simulated,
        n_reused=repeat.n_reused,
    )


def held_out_coverage(
    observed: pd.DataFrame,
    repeats: Sequence[HeldOutRepeat | HeldOutSummary],
    *,
    level: float,
    n_classes: int | None = None,
    class_levels: Sequence[float] | None = None,
) -> pd.DataFrame:
    """Coverage of daily flow bounds at basins held out of the whole fit.

    In every repeat the conformal error model (:func:`conformal_bounds`) is built from the
    training basins' flows only and applied to the held-out basins; the share of each held-out
    basin's observed days inside its bounds is counted, on all days, per flow class of the error
    model and on the lowest and highest deciles of its simulated flow. Each (repeat, basin)
    pair weighs the same in the mean.

    Parameters
    ----------
    observed : DataFrame
        Evaluation days x gauged basins, observed flow, mm/day (NaN = missing).
    repeats : sequence of HeldOutRepeat or HeldOutSummary
        From :func:`regional.repeats.held_out_flows`, or their summaries
        (:func:`summarise_repeat`, taken at ``level`` or below it).
    level : float
        Nominal level of the bounds.
    n_classes : int, optional
        Flow classes of the error model (default: chosen from the training basins' records).
    class_levels : sequence of float, optional
        Level per flow class (a widened error model); default ``level`` everywhere.

    Returns
    -------
    DataFrame
        Indexed by ``flow_class`` (``all``, ``class 1`` .., ``decile 1``, ``decile 10``):
        ``coverage``, ``n_pairs`` ((repeat, basin) pairs with observed days in the class).
    """
    level = check_level(level)
    return coverage_table(
        [repeat_shares(observed, draw, level, n_classes, class_levels) for draw in repeats]
    )


def repeat_shares(observed, draw, level: float, n_classes, class_levels) -> dict[str, list]:
    """One repeat's part of :func:`held_out_coverage` (arguments as there; for a summary
    ``observed`` needs only the repeat's held-out basins): flow class or decile -> each
    held-out basin's share of observed days inside its bounds (basins without a day in the
    group left out)."""
    model = _repeat_model(observed, draw, level, n_classes, class_levels)
    low, high = model.bounds(draw.held_out_flow)
    held = list(draw.held_out_flow.columns)
    obs = observed[held].to_numpy(dtype=float)
    sim = draw.held_out_flow.to_numpy(dtype=float)
    per_group = coverage_shares(obs, sim, low.to_numpy(), high.to_numpy(), model.n_classes)
    return {name: values[np.isfinite(values)].tolist() for name, values in per_group.items()}


def coverage_table(repeats: Sequence[Mapping[str, list]]) -> pd.DataFrame:
    """:func:`held_out_coverage`'s table from the repeats' :func:`repeat_shares`."""
    shares: dict[str, list[float]] = {}
    for per_group in repeats:
        for name, values in per_group.items():
            shares.setdefault(name, []).extend(values)
    rows = [
        {
            "flow_class": name,
            "coverage": float(np.mean(values)) if values else np.nan,
            "n_pairs": len(values),
        }
        for name, values in shares.items()
    ]
    return pd.DataFrame(rows, columns=["flow_class", "coverage", "n_pairs"]).set_index(
        "flow_class"
    )


def _repeat_model(observed, draw, level, n_classes, class_levels) -> ConformalErrorModel:
    """The repeat's error model: from its training flows, or rebuilt from its tails."""
    if isinstance(draw, HeldOutSummary):
        if class_levels is None:
            class_levels = np.full(len(draw.tails.days), level)
        return draw.tails.error_model(class_levels)
    training = list(draw.training_flow.columns)
    classes = n_classes or default_n_classes(observed[training].to_numpy(dtype=float))
    return conformal_bounds(
        observed[training],
        draw.training_flow,
        level=level,
        n_classes=classes,
        class_levels=class_levels,
    )


def widened_levels(coverage: Sequence[float], *, level: float) -> np.ndarray:
    """Level per flow class after the held-out check: nominal, or raised by the shortfall.

    A class whose held-out coverage falls short of ``level`` by more than
    :data:`WIDEN_TOLERANCE` gets its quantiles at ``level + shortfall`` (at most
    :data:`MAX_CLASS_LEVEL`); the others, and classes without a measurement (NaN), keep
    ``level``.

    Parameters
    ----------
    coverage : sequence of float
        Held-out coverage of each flow class (0 .. 1).
    level : float
        Nominal level.

    Returns
    -------
    ndarray
        One level per class.
    """
    level = check_level(level)
    shortfall = np.nan_to_num(level - np.asarray(coverage, dtype=float), nan=0.0)
    widen = shortfall > WIDEN_TOLERANCE
    return np.where(widen, np.minimum(level + shortfall, MAX_CLASS_LEVEL), level)
