"""The held-out check of the bounds: gauged basins held out of the WHOLE fit.

:func:`held_out_flows` draws repeated groups of gauged basins, refits the transfer without them
and gives them (and the remaining training basins) their flows; :func:`held_out_check` measures the
coverage of the chosen bounds there (:func:`regional.coverage.held_out_coverage`) and widens the
flow classes that fall short. See ``docs/prediction.md``.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from functools import partial
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional import flowstats
from regional.bounds import ConformalErrorModel, conformal_bounds, default_n_classes
from regional.compute import BATCHES_AHEAD, TASKS_PER_WORKER, chunked, release_freed_memory
from regional.coverage import (
    REPORTED_DECILES,
    WIDEN_TOLERANCE,
    HeldOutRepeat,
    HeldOutSummary,
    coverage_table,
    repeat_shares,
    summarise_repeat,
    widened_levels,
)
from regional.crossval import FoldContext, prepared_pool
from regional.errors import InputError
from regional.kept import is_kept, near, part_of, submit_near
from regional.series import LazyTable, StoreChunk, StoreReader, StoreTable, shipped
from regional.transfer import Donation

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import ModelRun

HELD_OUT_FRACTION = 0.1
"""Share of the gauged basins held out of the whole fit in each repeat of the held-out check."""
HELD_OUT_CHUNK = 64
"""Most target basins per task when a repeat runs on a cluster (:func:`held_out_chunk`)."""
HELD_OUT_SEED = 20_241_202
"""Seed of the random draws of held-out basins (the check is reproducible)."""
MIN_HELD_OUT_BASINS = 10
"""Fewer gauged basins than this: no held-out check (a tenth would be no basin at all)."""
DONATION_BLOCK = 256
"""Targets whose donations are made and held at once (bounds the memory of a repeat)."""
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


def _summaries(
    run: ModelRun,
    method: str,
    *,
    repeats: int,
    fit_level: float,
    job: _SummaryJob,
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
    if isinstance(job, _SummaryJob):  # its precipitation read through the kept tables
        job = replace(job, precip_mm=_KeptColumn.of(job.precip_mm, reader, check))
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
    folds = _HeldOutFolds(run.context, method, level=level)
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
        _repeat_chunk, job, None if reader is None else _KeptReader(reader, check)
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
class _SummaryJob:
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


def _summarised(draw: _Draw, parts: list[dict], job: _SummaryJob) -> HeldOutSummary:
    """A repeat's summary from the results of its tasks (the task that finishes a repeat on a
    cluster)."""
    flows = {k: v for part in parts for k, v in part.items()}
    return job.summarise(_assembled(draw.held, draw.training, flows, job.loo_flow))


def _summarised_apart(draw: _Draw, parts: list[dict], job: _SummaryJob) -> tuple:
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
    folds = _HeldOutFolds(replace(job.context, **tables), job.method, level=job.level)
    folds._loo_donations = _worker_loo_donations(job.check)
    return folds.flows(list(targets), pool=list(job.pool))


KEPT_TABLE_BYTES = 128 * 2**20
"""Most bytes of daily tables a worker keeps across the repeats of a held-out check (every
repeat reads the gauged basins again); the basins beyond are read again each time."""


@dataclass
class _CheckState:
    """What a process (a worker) keeps across the tasks of one held-out check: the targets'
    leave-one-out donations (the same in every repeat) and the basins' tables as read."""

    check: str
    loo_donations: dict[str, Donation] = field(default_factory=dict)
    rows: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    nbytes: int = 0


_CHECK_STATE: list[_CheckState] = []
"""This process's state of the latest held-out check (at most one)."""


def _worker_state(check: str) -> _CheckState:
    """This process's state of ``check`` (an older check's dropped); a fresh, unshared one
    when the job names no check."""
    if not check:
        return _CheckState(check)
    if not _CHECK_STATE or _CHECK_STATE[0].check != check:
        _CHECK_STATE[:] = [_CheckState(check)]
    return _CHECK_STATE[0]


def _worker_loo_donations(check: str) -> dict[str, Donation]:
    """This process's leave-one-out donations of ``check``."""
    return _worker_state(check).loo_donations


@dataclass(frozen=True, eq=False)
class _KeptReader:
    """A series store reader whose basins' tables a worker keeps across the repeats of one
    held-out check, up to :data:`KEPT_TABLE_BYTES` (every repeat reads the gauged basins
    again: 1.3 s of the workers' CPU in 10 repeats of 147 basins on the development
    machine). The tables are those of :meth:`StoreReader.read`, built the same way."""

    reader: StoreReader
    check: str

    def read(self, basins: Sequence[str], names: Sequence[str] | None = None) -> StoreChunk:
        """The tables ``names`` (default all the reader's) of ``basins``; the basins not kept
        yet are read whole (every table) and kept within the budget."""
        state = _worker_state(self.check)
        rows = dict(state.rows)
        missing = [b for b in dict.fromkeys(basins) if b not in rows]
        read = 0
        if missing:
            grids, read = self.reader.read_grids(missing)
            for position, basin in enumerate(missing):
                rows[basin] = {name: grid[position] for name, grid in grids.items()}
                size = sum(row.nbytes for row in rows[basin].values())
                if state.nbytes + size <= KEPT_TABLE_BYTES:
                    state.rows[basin] = {k: v.copy() for k, v in rows[basin].items()}
                    state.nbytes += size
        names = self.reader.columns if names is None else names
        grids = {name: np.stack([rows[b][name] for b in basins]) for name in names}
        return StoreChunk(tables=self.reader.frames(grids, basins), rows_read=read)


@dataclass(frozen=True, eq=False)
class _KeptColumn(LazyTable):
    """One daily table left in the series store (a :class:`StoreTable`) read through a
    worker's kept tables of a held-out check (:class:`_KeptReader`, over the same days): the
    flow statistics of a repeat's summary read the precipitation of basins the repeat's
    tasks have just read, on a worker that mostly kept them (read from the store again: 0.9 s
    of the workers' CPU in 10 repeats of 150 basins on the development machine). The values
    of the table's own :meth:`StoreTable.read`; once the kept tables are full, basins not
    kept are read as that does (one column, not kept)."""

    kept: _KeptReader
    table: StoreTable

    @property
    def index(self) -> pd.DatetimeIndex:
        return self.table.index

    @property
    def columns(self) -> pd.Index:
        return self.table.columns

    def over(self, positions: np.ndarray) -> LazyTable:
        """The store's table over some of its days (no longer those kept)."""
        return self.table.over(positions)

    def read(self, basins: Sequence[str]) -> pd.DataFrame:
        """The basins' values: through the kept tables while they have room or hold them
        all, else this table's one column from the store (as :meth:`StoreTable.read`)."""
        (name,) = self.table.reader.columns
        basins = [str(b) for b in basins]
        state = _worker_state(self.kept.check)
        if state.nbytes < KEPT_TABLE_BYTES or all(b in state.rows for b in basins):
            return self.kept.read(basins, names=[name]).tables[name]
        return self.table.read(basins)

    @classmethod
    def of(cls, table, reader: StoreReader | None, check: str):
        """``table`` read through the kept tables of ``check`` where it is a table of
        ``reader``'s store over its days (else ``table`` as it is)."""
        if reader is None or not isinstance(table, StoreTable):
            return table
        ((name, column),) = table.reader.columns.items()
        same = table.reader.path == reader.path and reader.columns.get(name) == column
        if not same or not table.index.equals(reader.dates):
            return table
        return cls(_KeptReader(reader, check), table)


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

    def __init__(self, context: FoldContext, method: str, *, level: float) -> None:
        self.context, self.method, self.level = context, method, level
        self._loo_donations: dict[str, Donation] = {}

    def flows(self, targets: list[str], *, pool: list[str]) -> dict[str, np.ndarray | None]:
        """Each target's flow over the evaluation days from a fit on ``pool`` (without the
        target); None where the donation equals the leave-one-out one (its flow is reused)."""
        flows: dict[str, np.ndarray | None] = {}
        for part in chunked(list(targets), DONATION_BLOCK):
            donations = self._donations(part, pool)
            reusable = self.method in REUSABLE_METHODS
            loo = self._loo(part) if reusable else {}
            for target in part:
                if reusable and _same_donation(donations[target], loo[target]):
                    flows[target] = None
                    continue
                flow = self.context.donation_flows(donations[target], [target])
                flows[target] = flow[self.context.evaluation, 0]
        return flows

    def _loo(self, targets: list[str]) -> dict[str, Donation]:
        """The targets' leave-one-out donations (a fit on every gauged basin but the target
        and its overlapping basins), made once per target."""
        missing = [t for t in targets if t not in self._loo_donations]
        if missing:
            everyone = [str(b) for b in self.context.calibrated.index]
            self._loo_donations.update(self._donations(missing, everyone))
        return {t: self._loo_donations[t] for t in targets}

    def _donations(self, targets: list[str], pool: list[str]) -> dict[str, Donation]:
        """Each target's donation from a fit on ``pool`` without it and its overlapping
        basins, all targets at once (:func:`regional.transfer.folds.fold_donations`: the
        donations of a refit per target; a target outside the pool gets the pool's fit)."""
        context = self.context
        drops = [frozenset([t, *context.excluded.get(t, ())]) for t in targets]
        prepared = prepared_pool(context, self.method, pool=pool, level=self.level)
        return prepared.donations(targets, drops, target_X=context.attributes).donations


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
    started = _summaries(
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
    """The :class:`_SummaryJob` of ``flows`` (observed, the method's leave-one-out flow): here,
    or, where the flows stayed on the workers (:mod:`regional.kept`), built on a worker next to
    them (its future: the summarising tasks get it from there)."""
    if not is_kept(flows[0]):
        return _SummaryJob(*flows, precip_mm, level, n_classes)
    return submit_near(_SummaryJob, flows, precip_mm, level, n_classes, priority=1)


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
    """Each repeat's :func:`regional.coverage.repeat_shares`: here, or where the summaries
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


def _workers(executor) -> int:
    return 1 if executor is None else getattr(executor, "n_workers", 1)


def _statistics_of(precip_mm: pd.DataFrame):
    """Flow statistics of a (days x basins) flow table with the basins' precipitation (of
    those days, read from ``precip_mm``)."""

    def statistics(flow: pd.DataFrame) -> pd.DataFrame:
        # a block of basins at a time, each reading its own precipitation: no copy of the
        # whole table
        return flowstats.statistics_frame(flow, precip_mm_day=precip_mm)

    return statistics


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
