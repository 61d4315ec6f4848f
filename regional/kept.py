"""Daily results left where they were computed: on the workers of a cluster, one block per task.

On a Dask cluster (:mod:`regional.compute`) the leave-one-out folds and the prediction run as
tasks over chunks of basins. Their daily flows (every method's leave-one-out flow and the
observed flow over the evaluation days; the prediction's flow and bounds) are the largest
things the chain produces per basin: on a cluster they stay on the workers, one block per
task, and the client holds a :class:`KeptTable` per flow instead of a grid. A
:class:`KeptTable` answers like the DataFrame it stands for where the client uses it (as a
:class:`regional.series.StoreTable` does for the series): :attr:`~KeptTable.index` and
:attr:`~KeptTable.columns` fetch nothing, nor does ``loc``/``iloc`` with days only;
``table[basins]``, ``table.loc[days, basins]`` and ``table.reindex(columns=basins)`` fetch
those basins' values only (from the blocks that hold them, cut to those days on the worker).

What needs the whole grid (the error model, the coverage, the flow statistics of every gauged
basin) runs as one task next to the blocks (:func:`start_near`, :func:`submit_near`): that task
builds the DataFrame the in-process chain holds, in the same order and layout, so the numbers
are the same; only its result reaches the client. In process nothing changes: the tables are
DataFrames and :func:`start_near` calls the function on them.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from functools import partial
from typing import Any

import numpy as np
import pandas as pd

from regional.series import LazyTable

FETCH_BASINS = 256
"""Basins fetched from the workers at a time by :func:`whole` (a block of 256 gauged
basins over 9 years of evaluation days is about 3.4 MB as float32)."""


@dataclass(frozen=True, eq=False)
class KeptBlocks:
    """The blocks one stage's tasks left on the workers.

    Each block is a mapping with ``"basins"`` (its basins, in order) and one array per flow
    (basins x days). ``futures`` holds one future per block; ``basins`` every basin in block
    order, ``block_of`` and ``row_of`` where each one is.
    """

    executor: Any
    futures: tuple
    basins: pd.Index
    block_of: np.ndarray
    row_of: np.ndarray

    @classmethod
    def of(cls, executor, futures: Sequence, chunks: Sequence[Sequence[str]]) -> KeptBlocks:
        """The blocks of ``futures``, one per chunk of basins (in the same order)."""
        sizes = [len(chunk) for chunk in chunks]
        basins = pd.Index([str(b) for chunk in chunks for b in chunk], name="basin_id")
        block_of = np.repeat(np.arange(len(sizes)), sizes)
        row_of = np.concatenate([np.arange(n) for n in sizes]) if sizes else np.array([], int)
        return cls(executor, tuple(futures), basins, block_of, row_of)

    def fetch(self, name: str, basins: Sequence[str], days) -> np.ndarray:
        """Flow ``name`` of ``basins`` over ``days`` (positions), basins x days, fetched from
        the blocks that hold them (each cut on its worker)."""
        wanted, rows, masks = self.where(basins)
        futures = [
            self.executor.submit(_cut, self.futures[b], name, r, days)
            for b, r in zip(wanted, rows, strict=True)
        ]
        return _placed(self.executor.gather(futures), masks)

    def where(self, basins: Sequence[str]) -> tuple[np.ndarray, list, list]:
        """The blocks holding ``basins``, the rows of each block to take, and where those rows
        go among ``basins`` (a mask each)."""
        self._check_open()
        places = self.basins.get_indexer(list(basins))
        if (places < 0).any():
            missing = [b for b, p in zip(basins, places, strict=True) if p < 0]
            raise KeyError(f"basin(s) {missing[:5]} are not among the kept flows")
        blocks = self.block_of[places]
        wanted = np.unique(blocks)
        masks = [blocks == b for b in wanted]
        return wanted, [self.row_of[places[mask]] for mask in masks], masks

    def __reduce__(self):
        raise TypeError(
            "kept flows stay on the workers and cannot be shipped to a task: give the task "
            "their blocks with regional.kept.submit_near"
        )

    def _check_open(self) -> None:
        if getattr(self.executor.client, "status", "running") != "running":
            raise RuntimeError(
                "the run's daily results (leave-one-out flows, held-out summaries, the "
                "prediction's flows) stayed on the cluster's workers, and that cluster's "
                "client is closed: keep the executor open while the result is used "
                "(regional.pipeline.run(..., executor=...)), or run without one"
            )


def _cut(block: Mapping[str, Any], name: str, rows: np.ndarray, days) -> np.ndarray:
    """Some rows and days of one flow of a block (on the worker that holds it)."""
    values = block[name][rows]
    return values if days is None else values[:, days]


def _placed(parts: Sequence[np.ndarray], masks: Sequence[np.ndarray]) -> np.ndarray:
    """The blocks' cut rows placed in the asked basins' order (basins x days)."""
    values = np.empty((len(masks[0]), parts[0].shape[1]), dtype=parts[0].dtype)
    for mask, part in zip(masks, parts, strict=True):
        values[mask] = part
    return values


def _frame_of(blocks, rows, masks, name: str, days, index, columns) -> pd.DataFrame:
    """Some basins of a kept flow as a DataFrame, built on a worker (:func:`part_of`)."""
    parts = [_cut(b, name, r, days) for b, r in zip(blocks, rows, strict=True)]
    return pd.DataFrame(_placed(parts, masks).T, index=index, columns=columns, copy=False)


@dataclass(frozen=True, eq=False)
class KeptTable(LazyTable):
    """One flow (days x basins) whose values stay in :class:`KeptBlocks` on the workers
    (the DataFrame-like answers of :class:`regional.series.LazyTable`).

    Attributes
    ----------
    blocks : KeptBlocks
        Where the values are.
    name : str
        The flow's name in each block (``"observed"`` or a method).
    index : DatetimeIndex
        The days of this table.
    days : ndarray or None
        Positions of :attr:`index` in the blocks' days (None: all of them).
    """

    blocks: KeptBlocks
    name: str
    index: pd.DatetimeIndex
    days: np.ndarray | None = None

    @property
    def columns(self) -> pd.Index:
        return self.blocks.basins

    def over(self, positions: np.ndarray) -> KeptTable:
        """The table over some of its days (positions in :attr:`index`); fetches nothing."""
        positions = np.asarray(positions, dtype=int)
        days = positions if self.days is None else self.days[positions]
        run = len(positions) and (np.diff(positions) == 1).all()
        where = slice(positions[0], positions[-1] + 1) if run else positions  # a run keeps freq
        return replace(self, index=self.index[where], days=days)

    def read(self, basins: Sequence[str]) -> pd.DataFrame:
        """The values of ``basins`` (DataFrame days x basins) fetched from the workers."""
        basins = [str(b) for b in basins]
        if not basins:
            return pd.DataFrame(
                index=self.index, columns=pd.Index([], name="basin_id"), dtype=float
            )
        values = self.blocks.fetch(self.name, basins, self.days)
        columns = pd.Index(basins, name="basin_id")
        return pd.DataFrame(values.T, index=self.index, columns=columns, copy=False)

    def spec(self) -> _Spec:
        """What a task next to the blocks needs to build this table (no futures)."""
        return _Spec(self.name, self.index, self.days, self.columns, len(self.blocks.futures))


@dataclass(frozen=True)
class _Spec:
    """A :class:`KeptTable` without its futures: rebuilt as a DataFrame from the blocks."""

    name: str
    index: pd.DatetimeIndex
    days: np.ndarray | None
    columns: pd.Index
    n_blocks: int

    def frame(self, parts: Sequence[Mapping[str, Any]]) -> pd.DataFrame:
        """The whole table as the in-process chain holds it: (basins, days) values, transposed."""
        first = parts[0][self.name]
        n_days = first.shape[1] if self.days is None else len(self.days)
        values = np.empty((len(self.columns), n_days), dtype=first.dtype)
        row = 0
        for part in parts:
            block = part[self.name]
            values[row : row + len(block)] = block if self.days is None else block[:, self.days]
            row += len(block)
        return pd.DataFrame(values.T, index=self.index, columns=self.columns, copy=False)


def is_kept(table) -> bool:
    """Whether ``table`` is a :class:`KeptTable` (its values on the workers)."""
    return isinstance(table, KeptTable)


def submit_near(function: Callable, frames: Sequence, *args: Any, priority: int = 0):
    """``function(*frames, *args)`` as one task next to the blocks of the kept ``frames``
    (each :class:`KeptTable` given to it as the DataFrame the in-process chain holds; the
    other frames and ``args`` as they are). Returns its future. At least one frame must be
    kept, and all the kept ones must share their blocks."""
    blocks = _shared_blocks(frames)
    specs = [frame.spec() if is_kept(frame) else frame for frame in frames]
    return blocks.executor.submit(
        _near, function, specs, list(blocks.futures), args, priority=priority
    )


def start_near(
    function: Callable, frames: Sequence, *args: Any, priority: int = 0
) -> Callable[[], Any]:
    """``function(*frames, *args)`` started now, its value given by the returned call: a task
    next to the blocks when any frame is a :class:`KeptTable` (:func:`submit_near`), else
    called here when the returned call is made."""
    if not any(is_kept(frame) for frame in frames):
        return partial(function, *frames, *args)
    future = submit_near(function, frames, *args, priority=priority)
    executor = _shared_blocks(frames).executor
    return lambda: executor.gather([future])[0]


def near(function: Callable, frames: Sequence, *args: Any, priority: int = 0) -> Any:
    """:func:`start_near`, waited for."""
    return start_near(function, frames, *args, priority=priority)()


def _shared_blocks(frames: Sequence) -> KeptBlocks:
    kept = {id(frame.blocks): frame.blocks for frame in frames if is_kept(frame)}
    if len(kept) != 1:
        raise ValueError(f"the kept frames must share one set of blocks: found {len(kept)}")
    return next(iter(kept.values()))


def _near(function: Callable, specs: Sequence, parts: Sequence[Mapping], args: tuple) -> Any:
    """A task next to the blocks: the kept frames rebuilt, then ``function`` on them."""
    frames = [spec.frame(parts) if isinstance(spec, _Spec) else spec for spec in specs]
    return function(*frames, *args)


def part_of(table, basins: Sequence[str]):
    """Some basins' columns of a table, where a task will use them: a DataFrame's columns
    here, or for a :class:`KeptTable` the future of that DataFrame, built on a worker from
    the blocks that hold those basins (a task given the future gets the DataFrame)."""
    basins = [str(b) for b in basins]
    if not is_kept(table):
        return table[basins]
    blocks = table.blocks
    wanted, rows, masks = blocks.where(basins)
    futures = [blocks.futures[b] for b in wanted]
    columns = pd.Index(basins, name="basin_id")
    return blocks.executor.submit(
        _frame_of, futures, rows, masks, table.name, table.days, table.index, columns
    )


PART_VALUES = 4_000_000
"""Values of a table fetched and written at a time by :func:`day_parts` (16 MB as float32:
at 7,500 gauged basins a part of 533 days)."""


def day_parts(table, *, values: int | None = None) -> Iterator[pd.DataFrame]:
    """The table (days x basins) a run of days at a time, every basin in each part, each part
    about ``values`` values: a DataFrame's rows as they are, a :class:`KeptTable`'s fetched
    from the workers part after part (each block cut to those days on its worker). At least
    one part, maybe empty. ``values`` defaults to :data:`PART_VALUES`."""
    n_days = len(table.index)
    step = max(1, (values or PART_VALUES) // max(1, len(table.columns)))
    for first in range(0, max(n_days, 1), step):
        last = min(first + step, n_days)
        if not is_kept(table):
            yield table.iloc[first:last]
        else:
            yield table.over(np.arange(first, last)).read(list(table.columns))


def whole(table) -> pd.DataFrame:
    """The whole table here: a DataFrame as it is, a :class:`KeptTable` fetched
    :data:`FETCH_BASINS` basins at a time into one grid (each block placed as it comes)."""
    if not is_kept(table):
        return table
    ids = [str(b) for b in table.columns]
    values = None
    for first in range(0, len(ids), FETCH_BASINS):
        part = table.blocks.fetch(table.name, ids[first : first + FETCH_BASINS], table.days)
        if values is None:
            values = np.empty((len(ids), part.shape[1]), dtype=part.dtype)
        values[first : first + len(part)] = part
    if values is None:
        return table.read([])
    return pd.DataFrame(values.T, index=table.index, columns=table.columns, copy=False)
