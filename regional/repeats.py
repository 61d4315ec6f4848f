"""The repeats of the held-out check: gauged basins held out of the WHOLE fit, and their flows.

:func:`held_out_flows` draws repeated groups of gauged basins, refits the transfer without them
and gives them (and the remaining training basins) their flows; :func:`repeat_summaries` gives
each repeat summarised (:func:`regional.repeatcoverage.summarise_repeat`) as it comes back, in
this process or as tasks on a cluster (a repeat's target basins a chunk per task). The folds of
a repeat, and what a worker keeps across a check's tasks, are :mod:`regional.repeatfolds`; the
check itself, which measures the coverage of the bounds on these repeats and widens the flow
classes that fall short, is :mod:`regional.heldout`. See ``docs/prediction.md``.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from dataclasses import dataclass, replace
from functools import partial
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional import flowstats
from regional.compute import BATCHES_AHEAD, TASKS_PER_WORKER, chunked
from regional.crossval import FoldContext
from regional.errors import InputError
from regional.kept import is_kept
from regional.repeatcoverage import HeldOutRepeat, HeldOutSummary, summarise_repeat
from regional.repeatfolds import HeldOutFolds, KeptColumn, KeptReader, worker_loo_donations
from regional.series import StoreReader, shipped

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import ModelRun

HELD_OUT_FRACTION = 0.1
"""Share of the gauged basins held out of the whole fit in each repeat of the held-out check."""
HELD_OUT_CHUNK = 64
"""Most target basins per task when a repeat runs on a cluster (:func:`held_out_chunk`)."""
HELD_OUT_SEED = 20_241_202
"""Seed of the random draws of held-out basins (the check is reproducible)."""


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
    as in leave-one-out. Every fold's donation is that of a refit without its basins, made
    for all the targets at once (:func:`regional.transfer.folds.fold_donations`, no refit per
    basin); a basin's flow is simulated again only when its donation (donors, weights and
    parameter sets) differs from its leave-one-out donation, else its leave-one-out flow is
    reused. Statistics of these flows
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
    return list(_repeats(run, method, repeats=repeats, level=level, fraction=fraction, seed=seed))


def _repeats(
    run: ModelRun,
    method: str,
    *,
    repeats,
    level: float,
    fraction,
    seed,
    executor=None,
    chunk_basins: int = HELD_OUT_CHUNK,
    reader: StoreReader | None = None,
) -> Iterator[HeldOutRepeat]:
    """The repeats of :func:`held_out_flows` one at a time (each can be summarised and dropped
    before the next is simulated). With an ``executor`` (a Dask cluster) each repeat's target
    basins run as tasks of ``chunk_basins``, reading their series with ``reader`` when given,
    and the first repeats' tasks are submitted by this call (the caller may work before it
    takes them); the flows are the same."""
    draws = _checked_draws(run, repeats, fraction, seed)
    if executor is not None:
        return _repeats_as_tasks(run, method, level, draws, executor, chunk_basins, reader)
    return _repeats_here(run, method, level, draws)


def _checked_draws(run: ModelRun, repeats, fraction, seed) -> list[tuple]:
    """The held-out basins of every repeat (:func:`_held_out_draws`), the arguments checked."""
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
    return _held_out_draws(gauged, size, int(repeats), seed)


def repeat_summaries(
    run: ModelRun,
    method: str,
    *,
    repeats: int,
    fit_level: float,
    job: SummaryJob,
    executor=None,
    chunk_basins: int = HELD_OUT_CHUNK,
    reader: StoreReader | None = None,
) -> Iterator[HeldOutSummary]:
    """The summaries of the repeats of :func:`held_out_flows` (:func:`summarise_repeat`), in
    draw order. In process each repeat is simulated and summarised when it is taken; with an
    ``executor`` each repeat's tasks are followed by one more that summarises it where they
    ran (:meth:`regional.compute.DaskExecutor.map_batches`), so only the summaries reach the
    caller, and the first repeats are submitted by this call. The same numbers either way.

    Where the leave-one-out flows stayed on the workers (:mod:`regional.kept`) the summaries
    stay there too: each repeat is given as a pair (its summary without the tails and the
    held-out flows, the future of the whole summary)."""
    draws = _checked_draws(run, repeats, HELD_OUT_FRACTION, HELD_OUT_SEED)
    if executor is None:
        return (job.summarise(r) for r in _repeats_here(run, method, fit_level, draws))
    gauged = [str(b) for b in run.loo.observed.columns]
    basins = [_Draw.of(held, gauged, run.context.donor_only) for held in draws]
    check = uuid.uuid4().hex  # the key of this check's leave-one-out donations on a worker
    keep = is_kept(run.loo.observed)
    if isinstance(job, SummaryJob):  # its precipitation read through the kept tables
        job = replace(job, precip_mm=KeptColumn.of(job.precip_mm, reader, check))
    finish = _summarised_apart if keep else _summarised
    batches = (
        (
            *_repeat_batch(run.context, method, fit_level, draw, chunk_basins, reader, check),
            partial(finish, draw),
        )
        for draw in basins
    )
    return executor.map_batches(batches, shared=job, keep=keep)


def _repeats_here(run: ModelRun, method: str, level: float, draws) -> Iterator[HeldOutRepeat]:
    """The repeats in this process, each simulated when it is taken."""
    gauged = [str(b) for b in run.loo.observed.columns]
    loo_flow = run.loo.simulated[method]
    folds = HeldOutFolds(run.context, method, level=level)
    for held in draws:
        held_set = set(held)
        training = [b for b in gauged if b not in held_set]
        pool = sorted([*training, *run.context.donor_only])  # donor-only basins always donate
        flows = folds.flows(training, pool=pool) | folds.flows(list(held), pool=pool)
        yield _assembled(held, training, flows, loo_flow)


def _repeats_as_tasks(
    run: ModelRun, method, level, draws, executor, chunk_basins, reader
) -> Iterator[HeldOutRepeat]:
    """The repeats run as tasks with no barrier between them: the tasks of the first repeats
    are submitted now, those of the next ones while the caller summarises a repeat
    (:meth:`regional.compute.DaskExecutor.map_batches`); repeats come back in draw order,
    each whole."""
    gauged = [str(b) for b in run.loo.observed.columns]
    basins = [_Draw.of(held, gauged, run.context.donor_only) for held in draws]
    check = uuid.uuid4().hex  # the key of this check's leave-one-out donations on a worker
    batches = (
        _repeat_batch(run.context, method, level, draw, chunk_basins, reader, check)
        for draw in basins
    )
    loo_flow = run.loo.simulated[method]
    results = executor.map_batches(batches)
    return (
        _assembled(
            draw.held, draw.training, {k: v for part in parts for k, v in part.items()}, loo_flow
        )
        for draw, parts in zip(basins, results, strict=True)
    )


@dataclass(frozen=True)
class _Draw:
    """One repeat's basins: held out, training (gauged order) and the pool of donors."""

    held: tuple[str, ...]
    training: list[str]
    pool: list[str]

    @classmethod
    def of(cls, held, gauged: list[str], donor_only) -> _Draw:
        held_set = set(held)
        training = [b for b in gauged if b not in held_set]
        pool = sorted([*training, *donor_only])  # donor-only basins always donate
        return cls(tuple(held), training, pool)


def _repeat_batch(context, method, level, draw: _Draw, chunk_basins: int, reader, check: str):
    """A repeat's tasks for :meth:`regional.compute.DaskExecutor.map_batches`: the task
    function, the chunks of its basins and the context they share."""
    job = _RepeatJob.of(context, method, level, tuple(draw.pool), check=check)
    chunks = chunked([*draw.training, *draw.held], chunk_basins)
    task, shared = shipped(
        _repeat_chunk, job, None if reader is None else KeptReader(reader, check)
    )
    return task, chunks, shared


def _assembled(held, training, flows: dict, loo_flow: pd.DataFrame) -> HeldOutRepeat:
    """A repeat from its basins' flows (None: the leave-one-out flow is reused), taken out of
    ``flows`` as they are copied into the repeat's frames (each basin's array freed then)."""

    def frame(targets: list[str]) -> pd.DataFrame:
        # filled a basin at a time (the repeat's flows never held twice, as arrays and as the
        # frame), in the layout the frame had when built from stacked columns: each basin's
        # days contiguous
        by_basin = np.empty((len(targets), len(loo_flow.index)))
        for row, target in enumerate(targets):
            flow = flows.pop(target)
            by_basin[row] = loo_flow[target].to_numpy() if flow is None else flow
        return pd.DataFrame(
            by_basin.T,
            index=loo_flow.index,
            columns=pd.Index(targets, name="basin_id"),
            copy=False,
        )

    reused = sum(flows[t] is None for t in [*training, *held])
    return HeldOutRepeat(
        held_out=held,
        training_flow=frame(list(training)),
        held_out_flow=frame(list(held)),
        n_simulated=len(training) + len(held) - reused,
        n_reused=reused,
    )


@dataclass(frozen=True)
class SummaryJob:
    """What summarising a repeat needs besides its flows (scattered once per check on a
    cluster): the observed flow and the checked method's leave-one-out flow (evaluation days x
    gauged basins, mm/day; the latter for the basins whose flow is reused), the
    precipitation of the flow statistics (the fold context's), the level and the flow
    classes of the error model."""

    observed: pd.DataFrame
    loo_flow: pd.DataFrame
    precip_mm: pd.DataFrame
    level: float
    n_classes: int

    def summarise(self, repeat: HeldOutRepeat) -> HeldOutSummary:
        """:func:`summarise_repeat` of ``repeat`` with its flow statistics."""
        return summarise_repeat(
            self.observed,
            repeat,
            level=self.level,
            n_classes=self.n_classes,
            statistics=_statistics_of(self.precip_mm),
        )


def _summarised(draw: _Draw, parts: list[dict], job: SummaryJob) -> HeldOutSummary:
    """A repeat's summary from the results of its tasks (the task that finishes a repeat on a
    cluster)."""
    flows = {k: v for part in parts for k, v in part.items()}
    return job.summarise(_assembled(draw.held, draw.training, flows, job.loo_flow))


def _summarised_apart(draw: _Draw, parts: list[dict], job: SummaryJob) -> tuple:
    """:func:`_summarised` as a pair: the summary without its tails and held-out flows (for
    the client), and the whole summary (left on the worker)."""
    summary = _summarised(draw, parts, job)
    return replace(summary, tails=None, held_out_flow=None), summary


@dataclass(frozen=True)
class _RepeatJob:
    """What a task of one repeat needs: the fold context (its daily tables travel in the four
    table fields, whole in process or the task's basins read from the store), the method and
    the repeat's pool of donors (training and donor-only basins); ``check`` names the held-out
    check the repeat belongs to (its tasks share the leave-one-out donations of a worker)."""

    context: FoldContext
    method: str
    level: float
    pool: tuple[str, ...]
    precip_mm: pd.DataFrame | None
    pet_mm: pd.DataFrame | None
    flow_mm: pd.DataFrame | None
    temp_c: pd.DataFrame | None
    check: str = ""

    @classmethod
    def of(
        cls, context: FoldContext, method: str, level: float, pool, *, check: str = ""
    ) -> _RepeatJob:
        tables = {name: getattr(context, name) for name in _TABLES}
        bare = replace(context, **dict.fromkeys(_TABLES))
        return cls(bare, method, level, tuple(pool), **tables, check=check)


_TABLES = ("precip_mm", "pet_mm", "flow_mm", "temp_c")


def _repeat_chunk(targets, job: _RepeatJob) -> dict[str, np.ndarray | None]:
    """Flows of some target basins of one repeat (one task)."""
    tables = {name: getattr(job, name) for name in _TABLES}
    folds = HeldOutFolds(replace(job.context, **tables), job.method, level=job.level)
    folds._loo_donations = worker_loo_donations(job.check)
    return folds.flows(list(targets), pool=list(job.pool))


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


def held_out_chunk(n_gauged: int, *, n_workers: int) -> int:
    """Basins per task of a repeat on a cluster: few, large tasks.

    The repeats run without a barrier, :data:`~regional.compute.BATCHES_AHEAD` + 1 of them in
    flight, so a repeat needs only its share of :data:`~regional.compute.TASKS_PER_WORKER`
    tasks per worker over those repeats (2 tasks per repeat on 2 workers), at most
    :data:`HELD_OUT_CHUNK` basins each. Every task has a fixed cost (reading its basins from
    the store, the pool's fit, scheduling): on the development machine chunks of 37 basins
    instead of 10 cut the workers' CPU time of the check by about a fifth (7.1 s to 5.5 s,
    mean of two runs; 100 basins, 10 repeats).
    """
    per_repeat = -(-TASKS_PER_WORKER * n_workers // (BATCHES_AHEAD + 1))
    return max(1, min(HELD_OUT_CHUNK, -(-n_gauged // per_repeat)))


def _statistics_of(precip_mm: pd.DataFrame):
    """Flow statistics of a (days x basins) flow table with the basins' precipitation (of
    those days, read from ``precip_mm``)."""

    def statistics(flow: pd.DataFrame) -> pd.DataFrame:
        # a block of basins at a time, each reading its own precipitation: no copy of the
        # whole table
        return flowstats.statistics_frame(flow, precip_mm_day=precip_mm)

    return statistics
