"""The held-out check of the bounds: gauged basins held out of the WHOLE fit.

:func:`held_out_flows` draws repeated groups of gauged basins, refits the transfer without them
and gives them (and the remaining training basins) their flows; :func:`held_out_check` measures the
coverage of the chosen bounds there (:func:`regional.coverage.held_out_coverage`) and widens the
flow classes that fall short. See ``docs/prediction.md``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional.bounds import ConformalErrorModel, conformal_bounds
from regional.coverage import (
    REPORTED_DECILES,
    WIDEN_TOLERANCE,
    HeldOutRepeat,
    held_out_coverage,
    widened_levels,
)
from regional.crossval import FoldContext
from regional.donation import fit_transfers, method_flows
from regional.errors import InputError
from regional.transfer import Donation

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import ModelRun

HELD_OUT_FRACTION = 0.1
"""Share of the gauged basins held out of the whole fit in each repeat of the held-out check."""
HELD_OUT_SEED = 20_241_202
"""Seed of the random draws of held-out basins (the check is reproducible)."""
MIN_HELD_OUT_BASINS = 10
"""Fewer gauged basins than this: no held-out check (a tenth would be no basin at all)."""
REUSABLE_METHODS = ("similarity", "proximity")
"""Donor methods whose fold may give the same donation without the held-out basins (then the
leave-one-out flow is reused); regression and median refit on other basins always differ."""


def held_out_flows(
    run: ModelRun,
    *,
    method: str,
    repeats: int,
    level: float,
    fraction: float = HELD_OUT_FRACTION,
    seed: int = HELD_OUT_SEED,
) -> list[HeldOutRepeat]:
    """Flows of gauged basins held out of the WHOLE fit, in repeated random draws.

    In each repeat a random ``fraction`` of the gauged basins (at least one) is treated as
    ungauged: the transfer ``method`` is fit on the other (training) basins only, and gives the
    held-out basins their flow; the training basins get their flow from the other training
    basins (leave-one-out within them), so that the error model of the repeat never sees a
    held-out basin, not even as a donor. Donors nested in or overlapping a target are left out
    as in leave-one-out. Transfers are refit in every fold (cheap); a basin's flow is simulated
    again only when its donation (donors, weights and parameter sets) differs from its
    leave-one-out donation, else its leave-one-out flow is reused. Statistics of these flows
    give held-out checks of statistic bounds too.

    Parameters
    ----------
    run : ModelRun
        Calibration and leave-one-out of the storage model checked (usually the chosen one).
    method : str
        The transfer method checked (usually the chosen one).
    repeats : int
        Number of random draws (>= 1).
    level : float
        Interval level the transfers are fit with (regression and median intervals).
    fraction : float, default :data:`HELD_OUT_FRACTION`
        Share of the gauged basins held out per draw, in (0, 1).
    seed : int, default :data:`HELD_OUT_SEED`
        Seed of the draws.

    Returns
    -------
    list of HeldOutRepeat
    """
    if int(repeats) != repeats or repeats < 1:
        raise ValueError(f"repeats must be a whole number >= 1: got {repeats!r}")
    if not 0.0 < fraction < 1.0:
        raise ValueError(f"fraction must lie strictly between 0 and 1: got {fraction!r}")
    gauged = [str(b) for b in run.loo.observed.columns]
    size = max(1, round(fraction * len(gauged)))
    if size > len(gauged) - 3:
        raise InputError(
            f"the held-out check needs at least {size + 3} gauged basins to hold out {size}; "
            f"found {len(gauged)}"
        )
    folds = _HeldOutFolds(run.context, run.loo, method, level=level)
    draws = []
    for held in _held_out_draws(gauged, size, int(repeats), seed):
        training = [b for b in gauged if b not in held]
        draws.append(folds.repeat(held, training))
    return draws


def _held_out_draws(gauged: list[str], size: int, repeats: int, seed: int) -> list[tuple]:
    """Random groups of ``size`` basins, every basin held out as evenly as the count allows.

    The basins are shuffled and cut into consecutive groups; when too few remain for a group,
    a new shuffle of the others tops it up (no basin twice in one group).
    """
    rng = np.random.default_rng(seed)
    queue: list[str] = []
    draws = []
    for _ in range(repeats):
        if len(queue) < size:
            rest = [b for b in gauged if b not in queue]
            queue += [rest[i] for i in rng.permutation(len(rest))]
        draws.append(tuple(sorted(queue[:size])))
        queue = queue[size:]
    return draws


class _HeldOutFolds:
    """Folds of the held-out check for one (model, method); caches leave-one-out donations."""

    def __init__(self, context: FoldContext, loo, method: str, *, level: float) -> None:
        self.context, self.loo, self.method, self.level = context, loo, method, level
        self._loo_donations: dict[str, Donation] = {}
        self.simulated = self.reused = 0

    def repeat(self, held: tuple[str, ...], training: list[str]) -> HeldOutRepeat:
        start_simulated, start_reused = self.simulated, self.reused
        pool = sorted([*training, *self.context.donor_only])  # donor-only basins always donate
        training_flow = self._flows(training, pool=pool)
        held_flow = self._flows(list(held), pool=pool)
        return HeldOutRepeat(
            held_out=held,
            training_flow=training_flow,
            held_out_flow=held_flow,
            n_simulated=self.simulated - start_simulated,
            n_reused=self.reused - start_reused,
        )

    def _flows(self, targets: list[str], *, pool: list[str]) -> pd.DataFrame:
        columns = [self._flow(target, pool) for target in targets]
        index = self.loo.observed.index
        return pd.DataFrame(
            np.column_stack(columns), index=index, columns=pd.Index(targets, name="basin_id")
        )

    def _flow(self, target: str, pool: list[str]) -> np.ndarray:
        donation = self._donation(target, pool)
        if self.method in REUSABLE_METHODS and _same_donation(
            donation, self._loo_donation(target)
        ):
            self.reused += 1
            return self.loo.simulated[self.method][target].to_numpy(dtype=float)
        self.simulated += 1
        return method_flows(self.context, donation, [target])[self.context.evaluation, 0]

    def _loo_donation(self, target: str) -> Donation:
        if target not in self._loo_donations:
            everyone = [str(b) for b in self.context.calibrated.index]
            self._loo_donations[target] = self._donation(target, everyone)
        return self._loo_donations[target]

    def _donation(self, target: str, pool: list[str]) -> Donation:
        drop = {target, *self.context.excluded.get(target, ())}
        train = [b for b in pool if b not in drop]
        estimators, _ = fit_transfers(
            self.context, level=self.level, train=train, methods=[self.method]
        )
        return estimators[self.method].donate(self.context.attributes.loc[[target]])


def _same_donation(first: Donation, second: Donation) -> bool:
    """Same donors with the same weights and parameter sets (so the same flow)."""
    columns = ["donor_id", "weight", *first.parameters]
    a, b = first.sets[columns], second.sets[columns]
    if a.shape != b.shape or first.combine != second.combine:
        return False
    if not (a["donor_id"].to_numpy() == b["donor_id"].to_numpy()).all():
        return False
    numbers = columns[1:]
    return bool(
        np.allclose(
            a[numbers].to_numpy(dtype=float), b[numbers].to_numpy(dtype=float), rtol=1e-12, atol=0
        )
    )


def held_out_check(
    run: ModelRun,
    method: str,
    error_model: ConformalErrorModel,
    *,
    level: float,
    repeats: int,
    fit_level: float,
) -> tuple[pd.DataFrame | None, ConformalErrorModel, list[str], tuple[HeldOutRepeat, ...]]:
    """Held-out coverage of the chosen bounds; classes short by > tolerance are widened.

    Parameters
    ----------
    run : ModelRun
        Calibration and leave-one-out of the chosen storage model.
    method : str
        The chosen transfer method.
    error_model : ConformalErrorModel
        The chosen bounds as first built from all leave-one-out residuals.
    level : float
        Nominal level of the bounds.
    repeats : int
        Repeats of the check (``[prediction] held_out_repeats``; 0: no check).
    fit_level : float
        Interval level the transfers are fit with (``[prediction] level``).

    Returns
    -------
    (table or None, error model, notes, repeats)
        The held-out table (see :attr:`regional.predict.Prediction.held_out`; None when the
        check does not run), the error model to use (widened where classes fell short), the
        notes saying what was done, and the repeats' flows (empty when the check does not run;
        the flow statistics reuse them for their own held-out check).
    """
    n_gauged = run.loo.observed.shape[1]
    if repeats == 0:
        return (
            None,
            error_model,
            ["no held-out check of the bounds ([prediction] held_out_repeats = 0)"],
            (),
        )
    if n_gauged < MIN_HELD_OUT_BASINS:
        return (
            None,
            error_model,
            [
                f"no held-out check of the bounds: {n_gauged} gauged basins, fewer than "
                f"{MIN_HELD_OUT_BASINS}"
            ],
            (),
        )
    draws = held_out_flows(run, method=method, repeats=repeats, level=fit_level)
    observed, simulated = run.loo.observed, run.loo.simulated[method]
    k = error_model.n_classes
    table = held_out_coverage(observed, draws, level=level, n_classes=k)
    table = table.rename(columns={"coverage": "held_out_coverage"})
    measured = [table.loc[f"class {c + 1}", "held_out_coverage"] for c in range(k)]
    levels = widened_levels(measured, level=level)
    widen = levels > level
    table["level_used"] = np.nan
    for c in range(k):
        table.loc[f"class {c + 1}", "level_used"] = levels[c]
    if widen.any():
        error_model = conformal_bounds(
            observed, simulated, level=level, n_classes=k, class_levels=levels
        )
        after = held_out_coverage(observed, draws, level=level, n_classes=k, class_levels=levels)
        table["held_out_coverage_widened"] = after["coverage"]
    else:
        table["held_out_coverage_widened"] = table["held_out_coverage"]
    table = table.reset_index()
    table.attrs.update(
        repeats=len(draws),
        basins=len(draws[0].held_out),
        simulated=sum(d.n_simulated for d in draws),
        reused=sum(d.n_reused for d in draws),
        widened={c + 1: (level, float(levels[c])) for c in np.flatnonzero(widen)},
    )
    return table, error_model, _held_out_notes(table, level, n_gauged), tuple(draws)


def _held_out_notes(table: pd.DataFrame, level: float, n_gauged: int) -> list[str]:
    info = table.attrs
    rows = table.set_index("flow_class")["held_out_coverage"]
    deciles = ", ".join(
        f"{'lowest' if d == 1 else 'highest'} decile {rows.get(f'decile {d}', np.nan):.1%}"
        for d in REPORTED_DECILES
    )
    notes = [
        f"held-out check of the {level:.0%} bounds: {info['repeats']} repeats, each holding "
        f"{info['basins']} of {n_gauged} gauged basins out of the whole fit (transfer and error "
        f"model; seed {HELD_OUT_SEED}); coverage at the held-out basins {rows['all']:.1%} "
        f"({deciles}); {info['simulated']} basin flows simulated afresh, {info['reused']} "
        "reused from leave-one-out"
    ]
    if info["widened"]:
        widened = ", ".join(f"class {c} to {new:.1%}" for c, (_, new) in info["widened"].items())
        after = table.set_index("flow_class")["held_out_coverage_widened"]["all"]
        notes.append(
            f"bounds widened where the held-out coverage fell short of {level:.0%} by more than "
            f"{WIDEN_TOLERANCE:.2f}: quantiles of {widened} (flow classes of the error model); "
            f"on the same repeats the widened bounds cover {after:.1%} (not an independent check)"
        )
    return notes


def with_held_out(
    coverage: pd.DataFrame, held_out: pd.DataFrame | None, *, model: str, method: str
) -> pd.DataFrame:
    """Coverage table with the held-out columns filled on the chosen (model, method) row."""
    coverage = coverage.copy()
    columns = {
        "held_out_coverage": np.nan,
        **{f"held_out_coverage_decile_{d}": np.nan for d in REPORTED_DECILES},
        "held_out_coverage_widened": np.nan,
        "held_out_repeats": 0,
        "held_out_basins": 0,
        "widened_classes": "",
    }
    for name, default in columns.items():
        coverage[name] = default
    if held_out is None:
        return coverage
    chosen = (coverage["model"] == model) & (coverage["method"] == method)
    rows = held_out.set_index("flow_class")
    coverage.loc[chosen, "held_out_coverage"] = rows.loc["all", "held_out_coverage"]
    for d in REPORTED_DECILES:
        value = rows["held_out_coverage"].get(f"decile {d}", np.nan)
        coverage.loc[chosen, f"held_out_coverage_decile_{d}"] = value
    coverage.loc[chosen, "held_out_coverage_widened"] = rows.loc[
        "all", "held_out_coverage_widened"
    ]
    coverage.loc[chosen, "held_out_repeats"] = held_out.attrs["repeats"]
    coverage.loc[chosen, "held_out_basins"] = held_out.attrs["basins"]
    coverage.loc[chosen, "widened_classes"] = "; ".join(
        f"{c}: {old:.2f} -> {new:.3f}" for c, (old, new) in held_out.attrs["widened"].items()
    )
    return coverage
