"""The held-out check of the bounds: gauged basins held out of the WHOLE fit.

The repeats (:mod:`regional.repeats`: random groups of gauged basins held out, the transfer
refit without them, their flows and each repeat's summary) are started first
(:func:`start_held_out_check`); :func:`held_out_check` then measures the coverage of the chosen
bounds at the held-out basins (:func:`regional.repeatcoverage.repeat_shares`) and widens the flow
classes that fall short. See ``docs/prediction.md``.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from functools import partial
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional.bounds import ConformalErrorModel, conformal_bounds, default_n_classes
from regional.compute import release_freed_memory
from regional.coverage import REPORTED_DECILES
from regional.kept import is_kept, near, part_of, submit_near
from regional.repeatcoverage import (
    WIDEN_TOLERANCE,
    HeldOutSummary,
    coverage_table,
    repeat_shares,
    widened_levels,
)
from regional.repeats import HELD_OUT_SEED, SummaryJob, held_out_chunk, repeat_summaries
from regional.series import StoreReader

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import ModelRun

MIN_HELD_OUT_BASINS = 10
"""Fewer gauged basins than this: no held-out check (a tenth would be no basin at all)."""


CheckResult = tuple[
    pd.DataFrame | None, ConformalErrorModel, list[str], tuple[HeldOutSummary, ...]
]
"""What :func:`held_out_check` returns: table or None, error model, notes, repeats."""


def held_out_check(
    run: ModelRun,
    method: str,
    error_model: ConformalErrorModel,
    *,
    level: float,
    repeats: int,
    fit_level: float,
    executor=None,
    reader: StoreReader | None = None,
) -> CheckResult:
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
    executor : optional
        A Dask executor (:mod:`regional.compute`): each repeat's basins run as its tasks
        (reading their series with ``reader`` when given); default in this process. The
        results are the same.
    reader : StoreReader, optional
        Reads a task's basins from the series store.

    Returns
    -------
    (table or None, error model, notes, repeats)
        The held-out table (see :attr:`regional.predicted.Prediction.held_out`; None when the
        check does not run), the error model to use (widened where classes fell short), the
        notes saying what was done, and the repeats' summaries (:class:`HeldOutSummary`: the
        held-out basins' flows, the tails of each repeat's error model and the flow statistics,
        no training basin's daily flow; empty when the check does not run; the flow statistics
        reuse them for their own held-out check).
    """
    finish = start_held_out_check(
        run,
        method,
        level=level,
        repeats=repeats,
        fit_level=fit_level,
        n_classes=error_model.n_classes,
        executor=executor,
        reader=reader,
    )
    return finish(error_model)


def start_held_out_check(
    run: ModelRun,
    method: str,
    *,
    level: float,
    repeats: int,
    fit_level: float,
    n_classes: int | None = None,
    executor=None,
    reader: StoreReader | None = None,
) -> Callable[[ConformalErrorModel], CheckResult]:
    """:func:`held_out_check` in two steps: start the repeats now (on a cluster the tasks of
    the first repeats are submitted by this call), then finish with the error model.

    The caller builds the error model, and may do other work, while the workers simulate
    and summarise the first repeats; the returned call takes the error model, gathers the
    repeats' summaries as they come back (handing each to its optional ``on_repeat`` call)
    and gives what :func:`held_out_check` gives (the same numbers: the repeats do not depend
    on the error model). ``n_classes`` is the flow
    classes of that error model (default: :func:`regional.bounds.default_n_classes` of the
    observed flow, as :func:`regional.bounds.conformal_bounds` chooses them); the other
    parameters as :func:`held_out_check`.
    """
    n_gauged = run.loo.observed.shape[1]
    if repeats == 0:
        return partial(
            _unchecked, "no held-out check of the bounds ([prediction] held_out_repeats = 0)"
        )
    if n_gauged < MIN_HELD_OUT_BASINS:
        return partial(
            _unchecked,
            f"no held-out check of the bounds: {n_gauged} gauged basins, fewer than "
            f"{MIN_HELD_OUT_BASINS}",
        )
    flows = (run.loo.observed, run.loo.simulated[method])
    if executor is None and is_kept(flows[0]):
        executor = flows[0].blocks.executor  # the repeats run where the flows stayed
    if n_classes is None:
        n_classes = near(_default_n_classes, flows[:1])
    job = _summary_job(flows, run.context.precip_mm, level=level, n_classes=int(n_classes))
    started = repeat_summaries(
        run,
        method,
        repeats=repeats,
        fit_level=fit_level,
        job=job,
        executor=executor,
        chunk_basins=held_out_chunk(n_gauged, n_workers=_workers(executor)),
        reader=reader,
    )
    return partial(_finished_check, run, method, started, level=level, n_classes=int(n_classes))


def _default_n_classes(observed: pd.DataFrame) -> int:
    """:func:`regional.bounds.default_n_classes` of an observed-flow frame."""
    return default_n_classes(observed.to_numpy())


def _summary_job(flows: tuple, precip_mm, *, level: float, n_classes: int):
    """The :class:`SummaryJob` of ``flows`` (observed, the method's leave-one-out flow): here,
    or, where the flows stayed on the workers (:mod:`regional.kept`), built on a worker next to
    them (its future: the summarising tasks get it from there)."""
    if not is_kept(flows[0]):
        return SummaryJob(*flows, precip_mm, level, n_classes)
    return submit_near(SummaryJob, flows, precip_mm, level, n_classes, priority=1)


def _unchecked(note: str, error_model: ConformalErrorModel, *, on_repeat=None) -> CheckResult:
    return None, error_model, [note], ()


def _finished_check(
    run: ModelRun,
    method: str,
    started: Iterator[HeldOutSummary],
    error_model: ConformalErrorModel,
    *,
    level: float,
    n_classes: int,
    on_repeat: Callable[[HeldOutSummary], None] | None = None,
) -> CheckResult:
    """The coverage of the repeats ``started`` (their summaries), and the error model
    widened where short; ``on_repeat`` is called with each summary as it comes back."""
    n_gauged = run.loo.observed.shape[1]
    observed, simulated = run.loo.observed, run.loo.simulated[method]
    k = error_model.n_classes
    if k != n_classes:
        raise ValueError(
            f"the repeats were summarised with {n_classes} flow classes, the error model has "
            f"{k}: start the check with n_classes={k}"
        )
    draws, kept = [], []
    for item in started:
        draw, whole_summary = item if isinstance(item, tuple) else (item, None)
        if on_repeat is not None:
            on_repeat(draw)
        draws.append(draw)
        kept.append(whole_summary)
        # what the repeat's simulation and summary freed goes back to the system now, not at
        # the end of the stage: the repeats' scattered leftovers otherwise pile up under the
        # summaries kept (docs/scale.md, "side by side again")
        release_freed_memory()
    table = coverage_table(_shares(observed, draws, kept, level, k, None))
    table = table.rename(columns={"coverage": "held_out_coverage"})
    measured = [table.loc[f"class {c + 1}", "held_out_coverage"] for c in range(k)]
    levels = widened_levels(measured, level=level)
    widen = levels > level
    table["level_used"] = np.nan
    for c in range(k):
        table.loc[f"class {c + 1}", "level_used"] = levels[c]
    if widen.any():
        widened = partial(conformal_bounds, level=level, n_classes=k, class_levels=levels)
        error_model = near(widened, (observed, simulated))
        after = coverage_table(_shares(observed, draws, kept, level, k, levels))
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


def _shares(observed, draws, kept, level: float, n_classes: int, class_levels) -> list[dict]:
    """Each repeat's :func:`regional.repeatcoverage.repeat_shares`: here, or where the summaries
    stayed on the workers (``kept``: their futures), as a task next to each, given the
    repeat's held-out basins' observed flow only."""
    if kept[0] is None:
        return [repeat_shares(observed, d, level, n_classes, class_levels) for d in draws]
    executor = observed.blocks.executor
    futures = [
        executor.submit(
            repeat_shares, part_of(observed, d.held_out), s, level, n_classes, class_levels
        )
        for d, s in zip(draws, kept, strict=True)
    ]
    return executor.gather(futures)


def _workers(executor) -> int:
    return 1 if executor is None else getattr(executor, "n_workers", 1)


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
