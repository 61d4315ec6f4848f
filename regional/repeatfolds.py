"""The folds of the held-out check's repeats, and what a worker keeps across their tasks.

In each repeat of the held-out check (:mod:`regional.repeats`) every target basin gets its
donation from a fit without it (:class:`HeldOutFolds`, all the targets at once); a basin's flow
is simulated again only where that donation differs from its leave-one-out one. Every repeat
reads the series of the gauged basins again and needs the same leave-one-out donations, so on a
cluster a worker keeps both across the tasks of one check (named by a key the check draws): the
donations as they are made, the basins' daily tables as read from the series store, up to
:data:`KEPT_TABLE_BYTES`. A later check drops the earlier one's state.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from regional.compute import chunked
from regional.crossval import FoldContext, prepared_pool
from regional.series import LazyTable, StoreChunk, StoreReader, StoreTable
from regional.transfer import Donation

DONATION_BLOCK = 256
"""Targets whose donations are made and held at once (bounds the memory of a repeat)."""
REUSABLE_METHODS = ("similarity", "proximity")
"""Donor methods whose fold may give the same donation without the held-out basins (then the
leave-one-out flow is reused); regression and median refit on other basins always differ."""


class HeldOutFolds:
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


def worker_loo_donations(check: str) -> dict[str, Donation]:
    """This process's leave-one-out donations of ``check``."""
    return _worker_state(check).loo_donations


@dataclass(frozen=True, eq=False)
class KeptReader:
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
class KeptColumn(LazyTable):
    """One daily table left in the series store (a :class:`StoreTable`) read through a
    worker's kept tables of a held-out check (:class:`KeptReader`, over the same days): the
    flow statistics of a repeat's summary read the precipitation of basins the repeat's
    tasks have just read, on a worker that mostly kept them (read from the store again: 0.9 s
    of the workers' CPU in 10 repeats of 150 basins on the development machine). The values
    of the table's own :meth:`StoreTable.read`; once the kept tables are full, basins not
    kept are read as that does (one column, not kept)."""

    kept: KeptReader
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
        return cls(KeptReader(reader, check), table)
