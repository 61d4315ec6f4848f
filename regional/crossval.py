"""Leave-one-out validation of parameter transfer.

Every gauged basin is treated as ungauged in turn: each transfer method is refit on the other
gauged basins (minus the donors nested in or overlapping the target beyond a set share of area),
gives the target its parameters, the target's flow is simulated from its own forcing and scored
against its observations over the evaluation period (the validation period when given, else the
calibration period), warm-up excluded. Two baselines run beside the methods: ``calibrated``, the
basin's own calibrated parameters (the upper bound of what a transfer can reach), and ``median``,
the regional median parameters (the benchmark every method must beat).

References
----------
Oudin, L., Andreassian, V., Perrin, C., Michel, C., Le Moine, N. (2008): Spatial proximity,
physical similarity, regression and ungaged catchments: a comparison of regionalization
approaches based on 913 French catchments. Water Resour. Res. 44, W03413.
Parajka, J., Viglione, A., Rogger, M., Salinas, J. L., Sivapalan, M., Bloeschl, G. (2013):
Comparative assessment of predictions in ungauged basins - Part 1: Runoff-hydrograph studies.
Hydrol. Earth Syst. Sci. 17, 1783-1795.
"""

from __future__ import annotations

import threading
import warnings
import weakref
from collections import Counter, OrderedDict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from regional import metrics
from regional.calibrate import Window
from regional.compute import InProcessExecutor, chunked
from regional.errors import InputError
from regional.kept import KeptBlocks, KeptTable
from regional.models import parameter_transforms, simulate
from regional.models.base import forward, inverse
from regional.series import StoreReader, shipped
from regional.transfer import DONOR_METHODS, Donation, inverse_distance_weights
from regional.transfer.base import weighted_estimate
from regional.transfer.folds import FoldDonations, FoldSettings, PreparedPool
from regional.transfer.step import (
    CALIBRATED,
    MEDIAN,
    DonationSimulation,
    TransferOptions,
    donor_simulator,
    method_order,
)

SCORE_COLUMNS = ("nse", "kge", "kge_r", "kge_alpha", "kge_beta", "log_nse", "pbias", "n_days")
LOO_FLOW_DTYPE = np.float32
"""Storage type of :attr:`LeaveOneOut.simulated`: each method's flow of each gauged basin over
the evaluation period is held for the run (error model, coverage, statistics, figures), 4 bytes
per day instead of 8. The scores are computed from the float64 flow before it is stored; what
the stored flows feed changes in about the seventh digit (docs/scale.md, tested)."""
CHUNK_BASINS = 8
"""Target basins per task handed to the executor."""


@dataclass(frozen=True)
class FoldContext:
    """Everything one fold needs; shipped once to every worker.

    Forcing and flow hold only the simulated window (``window.start:window.stop``);
    ``fixed_params`` (snow parameters set in the config) is empty when no snow store runs.
    ``donor_only`` names basins of ``calibrated`` (the user's parameters, no observed flow)
    that serve as donors in every fold but are never a target (:attr:`targets`).
    """

    model: str
    attributes: pd.DataFrame
    calibrated: pd.DataFrame
    precip_mm: pd.DataFrame
    pet_mm: pd.DataFrame
    temp_c: pd.DataFrame | None
    flow_mm: pd.DataFrame
    window: Window
    evaluation: np.ndarray
    options: TransferOptions
    excluded: Mapping[str, frozenset[str]] = field(default_factory=dict)
    fixed_params: Mapping[str, float] = field(default_factory=dict)
    initial_storage: float | None = None
    donor_only: frozenset[str] = frozenset()

    @property
    def targets(self) -> list[str]:
        """The basins scored in leave-one-out: every basin of ``calibrated`` with observed
        flow (not in ``donor_only``), in its order."""
        return [str(b) for b in self.calibrated.index if b not in self.donor_only]

    @property
    def simulation(self) -> DonationSimulation:
        """How a donation becomes a target's flow over this window (model, fixed parameters,
        warm-up, initial storage)."""
        return DonationSimulation(
            self.model,
            self.window.warmup_days,
            fixed_params=self.fixed_params,
            initial_storage=self.initial_storage,
        )

    def donation_flows(self, donation: Donation, targets: Sequence[str]) -> np.ndarray:
        """Each target's flow from its donated sets over this window: :attr:`simulation` on
        the targets' own forcing. Days x targets, mm/day, warm-up days included."""
        columns = list(targets)
        temp = None if self.temp_c is None else self.temp_c[columns].to_numpy(dtype=float)
        return self.simulation.flows(
            donation,
            columns,
            precip=self.precip_mm[columns].to_numpy(dtype=float),
            pet=self.pet_mm[columns].to_numpy(dtype=float),
            temp=temp,
        )

    @property
    def transforms(self) -> dict[str, str]:
        """Transferred parameter -> its regression transform: the model's parameters and,
        when the snow store runs, the store's, less those fixed in the config."""
        snow = self.temp_c is not None
        return parameter_transforms(self.model, snow=snow, fixed=self.fixed_params)


@dataclass(frozen=True)
class LeaveOneOut:
    """Result of :func:`leave_one_out`.

    Attributes
    ----------
    scores : DataFrame
        Long: ``basin_id``, ``method``, then nse, kge, kge_r, kge_alpha, kge_beta, log_nse, pbias
        (percent), n_days.
    params : DataFrame
        Long: ``basin_id``, ``method``, one column per parameter (the transferred estimate in
        parameter units; ``calibrated`` rows hold the basin's own parameters).
    observed : DataFrame or KeptTable
        Evaluation days x basin_id, observed flow, mm/day (NaN = missing). On a cluster with
        ``keep`` a :class:`regional.kept.KeptTable`: the values stay on the workers.
    simulated : dict
        Method -> DataFrame (evaluation days x basin_id) of the flow each method gave, mm/day,
        held as :data:`LOO_FLOW_DTYPE` (float32; the scores come from the float64 flow); on a
        cluster with ``keep`` a :class:`regional.kept.KeptTable` each.
    excluded : dict
        Target -> donors left out of its folds for sharing area with it.
    warnings : tuple of str
        Distinct warnings raised inside the folds, with how many folds raised each.
    methods : tuple of str
        Methods in report order: calibrated, median, then the configured ones.
    """

    scores: pd.DataFrame
    params: pd.DataFrame
    observed: pd.DataFrame
    simulated: dict[str, pd.DataFrame]
    excluded: dict[str, tuple[str, ...]]
    warnings: tuple[str, ...]
    methods: tuple[str, ...]


def leave_one_out(
    context: FoldContext,
    *,
    executor=None,
    progress: Callable[[int, int], None] | None = None,
    chunk_basins: int = CHUNK_BASINS,
    reader: StoreReader | None = None,
    keep: bool = False,
) -> LeaveOneOut:
    """Treat every gauged basin as ungauged in turn and score each transfer method.

    Parameters
    ----------
    context : FoldContext
        Attributes and calibrated parameters of the gauged basins (same index), their forcing
        and observed flow over the simulated window, and the transfer options.
    executor : optional
        Runs chunks of target basins (:mod:`regional.compute`); default in this process.
    progress : callable(done, total), optional
        Called as target basins complete.
    chunk_basins : int, default 8
        Target basins per task; the results do not depend on it (tested).
    reader : StoreReader, optional
        Each task reads its targets' daily tables from the series store
        (:mod:`regional.series`) instead of receiving the context's tables; same results.
    keep : bool, default False
        With a Dask executor, leave the daily flows (:attr:`LeaveOneOut.observed` and
        :attr:`LeaveOneOut.simulated`) on the workers, one block per task, as
        :class:`regional.kept.KeptTable` objects: the client gathers the scores, parameters
        and warnings only (the executor must stay open while the result is used). Ignored in
        process.

    Returns
    -------
    LeaveOneOut
    """
    _check_context(context)
    executor = executor or InProcessExecutor()
    chunks = chunked(context.targets, chunk_basins)
    if keep and executor.name == "dask":
        return _kept_leave_one_out(context, executor, chunks, progress, reader)
    task, shared = shipped(run_folds, context, reader)
    results = executor.map(task, chunks, shared, progress=progress)
    folds = [fold for chunk in results for fold in chunk]
    return _assemble(folds, context, _grids(folds, context))


def _kept_leave_one_out(context, executor, chunks, progress, reader) -> LeaveOneOut:
    """:func:`leave_one_out` whose daily flows stay on the workers (``keep``)."""
    task, shared = shipped(run_kept_folds, context, reader)
    results, futures = executor.map_keeping(task, chunks, shared, progress=progress)
    folds = [fold for chunk in results for fold in chunk]
    blocks = KeptBlocks.of(executor, futures, chunks)
    dates = context.flow_mm.index[context.evaluation]
    names = ["observed", *method_order(context.options.methods)]
    observed, *flows = (KeptTable(blocks, name, dates) for name in names)
    return _assemble(folds, context, (observed, dict(zip(names[1:], flows, strict=True))))


def run_kept_folds(targets: Sequence[str], context: FoldContext) -> tuple[list[dict], dict]:
    """:func:`run_folds` split into the folds without their daily flows (for the client) and
    the flows as one block (left on the worker: :class:`regional.kept.KeptBlocks`)."""
    folds = run_folds(targets, context)
    n_days = int(np.count_nonzero(context.evaluation))
    block = {"basins": list(targets), "observed": _observed_rows(folds, n_days)}
    for method in method_order(context.options.methods):
        block[method] = _flow_rows(folds, method, n_days)
    return folds, block


def _check_context(context: FoldContext) -> None:
    gauged = context.calibrated.index
    if not context.attributes.index.equals(gauged):
        raise ValueError("attributes and calibrated parameters must share one index")
    needed = 3
    if len(context.targets) < needed:
        raise InputError(
            f"leave-one-out needs at least {needed} gauged basins; found "
            f"{len(context.targets)}: "
            "add gauged basins or widen the calibration period"
        )
    if not context.evaluation.any():
        raise InputError("the evaluation period has no day after the warm-up; widen it")


def run_folds(targets: Sequence[str], context: FoldContext) -> list[dict]:
    """Run the folds of some target basins (one task of the executor)."""
    methods = method_order(context.options.methods)[1:]
    donations = fold_donations_of(targets, context, methods)
    return [_one_fold(target, context, donations) for target in targets]


def fold_donations_of(
    targets: Sequence[str],
    context: FoldContext,
    methods: Sequence[str],
    *,
    n_donors: int | None = None,
) -> dict[str, FoldDonations]:
    """Each method's donation to each target from a fit on the other gauged basins (minus the
    basins sharing the target's area), for all the targets at once
    (:func:`regional.transfer.folds.fold_donations`: the same donations as a refit per fold).

    ``n_donors`` overrides the donor count of every method (default: the method's own).
    """
    drops = [_drop_set(target, context) for target in targets]
    return {
        method: prepared_pool(context, method, n_donors=n_donors).donations(
            targets, drops, target_X=context.attributes
        )
        for method in methods
    }


PREPARED_KEPT = 6
"""Prepared pools kept per process (:func:`prepared_pool`): a stage's methods and pools."""
_PREPARED: OrderedDict = OrderedDict()
_PREPARED_LOCK = threading.Lock()  # tasks of a multi-threaded worker share the kept pools


def prepared_pool(
    context: FoldContext,
    method: str,
    *,
    pool: Sequence[str] | None = None,
    n_donors: int | None = None,
    level: float = 0.9,
) -> PreparedPool:
    """``method`` prepared on ``pool`` (default: every basin of ``context.calibrated``), made
    once per process and kept for the next tasks of the stage.

    A stage cuts its targets into chunks of a few basins; preparing the pool (sorting,
    checking, the sums and fits every fold starts from) costs O(pool), so preparing it per
    chunk would cost O(pool^2 / chunk) in all. The last :data:`PREPARED_KEPT` pools are kept,
    keyed by the very attribute and parameter tables of the context (a task of a cluster gets
    the scattered context's, one copy per worker), the method, its settings and the pool.
    """
    settings = fold_settings(context, method, n_donors=n_donors, level=level)
    members = None if pool is None else tuple(str(b) for b in pool)
    key = (id(context.attributes), id(context.calibrated), method, repr(settings), members)
    tables = (context.attributes, context.calibrated)
    with _PREPARED_LOCK:
        entry = _PREPARED.get(key)
        if entry is not None and (entry[0](), entry[1]()) == (id(tables[0]), id(tables[1])):
            _PREPARED.move_to_end(key)
            return entry[2]
    names = list(context.transforms)
    X, y = context.attributes, context.calibrated[names]
    if members is not None:
        X, y = X.loc[list(members)], y.loc[list(members)]
    prepared = PreparedPool(method, X, y, settings)
    with _PREPARED_LOCK:
        _PREPARED[key] = (*(_alive_id(table) for table in tables), prepared)
        while len(_PREPARED) > PREPARED_KEPT:
            _PREPARED.popitem(last=False)
    return prepared


def _alive_id(table: pd.DataFrame) -> Callable[[], int | None]:
    """The id of ``table`` while it lives, None once it is gone (a new table may reuse an id)."""
    ref = weakref.ref(table)

    def alive() -> int | None:
        obj = ref()
        return None if obj is None else id(obj)

    return alive


def fold_settings(
    context: FoldContext, method: str, *, n_donors: int | None = None, level: float = 0.9
) -> FoldSettings:
    """The settings ``method`` is fit with in every fold of ``context``."""
    options = context.options
    return FoldSettings(
        transforms=context.transforms,
        attributes=tuple(options.attributes) if options.attributes else None,
        n_donors=options.donors_for(method) if n_donors is None else n_donors,
        power=options.power,
        combine=options.combine,
        level=level,
    )


def _drop_set(target: str, context: FoldContext) -> frozenset[str]:
    """The basins left out of the target's fold: itself and those sharing its area."""
    return frozenset([target, *context.excluded.get(target, ())])


def _one_fold(target: str, context: FoldContext, donations: Mapping[str, FoldDonations]) -> dict:
    transforms = context.transforms
    names = list(transforms)
    forcing = _target_forcing(target, context)
    observed = context.flow_mm[target].to_numpy()[context.evaluation]
    obs = observed.astype(float)
    # the observed flow travels back with the fold: the client never reads it from the grids
    fold = {"basin_id": target, "methods": {}, "warnings": [], "observed": observed}
    raised: set[str] = set()
    simulation = context.simulation
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        own = {name: float(context.calibrated.loc[target, name]) for name in names}
        flow = _simulate_set(context, forcing, own)
        fold["methods"][CALIBRATED] = _outcome(obs, flow[context.evaluation], own)
        for method in method_order(context.options.methods)[1:]:
            donation = donations[method].donations[target]
            raised.update(donations[method].warnings[target])
            estimate = weighted_estimate(donation.sets, names, transforms).iloc[0].to_dict()
            flow = simulation.flow(
                donation,
                target,
                precip=forcing["precip"],
                pet=forcing["pet"],
                temp=forcing["temp"],
            )
            fold["methods"][method] = _outcome(obs, flow[context.evaluation], estimate)
    fold["warnings"] = sorted(raised | {str(w.message) for w in caught})
    return fold


def _target_forcing(target: str, context: FoldContext) -> dict[str, np.ndarray | None]:
    return {
        "precip": context.precip_mm[target].to_numpy(dtype=float),
        "pet": context.pet_mm[target].to_numpy(dtype=float),
        "temp": None if context.temp_c is None else context.temp_c[target].to_numpy(dtype=float),
    }


def _simulate_set(context: FoldContext, forcing, params: Mapping[str, float]) -> np.ndarray:
    result = simulate(
        context.model,
        forcing["precip"],
        forcing["pet"],
        {**context.fixed_params, **params},
        temp=forcing["temp"],
        initial_storage=context.initial_storage,
        warmup_days=context.window.warmup_days,
    )
    return result.flow[:, 0]


def _outcome(obs: np.ndarray, flow: np.ndarray, params: Mapping[str, float]) -> dict:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", metrics.DegenerateSeriesWarning)
        scores = metrics.all_scores(obs, flow)
    return {
        "scores": {k: float(v) for k, v in scores.items()},
        "params": dict(params),
        "flow": flow.astype(LOO_FLOW_DTYPE),  # stored so at once: folds wait at half the size
    }


def _assemble(folds: list[dict], context: FoldContext, grids: tuple) -> LeaveOneOut:
    """The folds' scores and parameters beside their flows ``grids`` (observed, method ->
    simulated)."""
    methods = method_order(context.options.methods)
    rows, params = [], []
    for fold in folds:
        for method in methods:
            outcome = fold["methods"][method]
            rows.append({"basin_id": fold["basin_id"], "method": method, **outcome["scores"]})
            params.append({"basin_id": fold["basin_id"], "method": method, **outcome["params"]})
    scores = pd.DataFrame(rows, columns=["basin_id", "method", *SCORE_COLUMNS])
    scores["n_days"] = scores["n_days"].astype(int)
    ids = [fold["basin_id"] for fold in folds]
    observed, simulated = grids
    counts = Counter(message for fold in folds for message in fold["warnings"])
    notes = tuple(
        f"{message} (in {count} of {len(folds)} folds)"
        for message, count in sorted(counts.items())
    )
    excluded = {
        t: tuple(sorted(context.excluded.get(t, ()))) for t in ids if context.excluded.get(t)
    }
    return LeaveOneOut(
        scores=scores,
        params=pd.DataFrame(params),
        observed=observed,
        simulated=simulated,
        excluded=excluded,
        warnings=notes,
        methods=methods,
    )


def _grids(folds: list[dict], context: FoldContext) -> tuple[pd.DataFrame, dict]:
    """The folds' observed flow and each method's flow as DataFrames (evaluation days x
    basins), each fold's copy dropped once placed (the folds' flows are never held twice)."""
    dates = context.flow_mm.index[context.evaluation]
    columns = pd.Index([fold["basin_id"] for fold in folds], name="basin_id")

    def frame(values: np.ndarray) -> pd.DataFrame:
        return pd.DataFrame(values.T, index=dates, columns=columns, copy=False)

    observed = frame(_observed_rows(folds, len(dates)))
    methods = method_order(context.options.methods)
    return observed, {m: frame(_flow_rows(folds, m, len(dates))) for m in methods}


def _observed_rows(folds: list[dict], n_days: int) -> np.ndarray:
    """The folds' observed flows as (folds, days), each fold's copy dropped once placed."""
    dtype = folds[0]["observed"].dtype if folds else np.float32
    values = np.empty((len(folds), n_days), dtype=dtype)
    for row, fold in enumerate(folds):
        values[row] = fold.pop("observed")
    return values


def _flow_rows(folds: list[dict], method: str, n_days: int) -> np.ndarray:
    """One method's flows of every fold as (folds, days) of :data:`LOO_FLOW_DTYPE`, each
    fold's copy dropped once placed."""
    values = np.empty((len(folds), n_days), dtype=LOO_FLOW_DTYPE)
    for row, fold in enumerate(folds):
        values[row] = fold["methods"][method].pop("flow")
    return values


def summarise(scores: pd.DataFrame) -> pd.DataFrame:
    """One row per method: distribution of leave-one-out skill, loss and gain in median NSE.

    Parameters
    ----------
    scores : DataFrame
        Long leave-one-out scores (``method``, ``nse``, ``kge``, ...), optionally with a ``model``
        column; rows are then summarised per (model, method).

    Returns
    -------
    DataFrame
        ``method``, ``n_basins``, ``median_nse``, ``q25_nse``, ``q75_nse``, ``share_nse_gt_0_5``,
        ``share_nse_gt_0``, ``median_kge``, ``loss_vs_calibrated`` (median NSE of calibrated
        minus this method's), ``gain_vs_median`` (this method's median NSE minus median's).
    """
    keys = ["model", "method"] if "model" in scores.columns else ["method"]
    grouped = scores.groupby(keys, sort=False)
    table = pd.DataFrame(
        {
            "n_basins": grouped["nse"].count(),
            "median_nse": grouped["nse"].median(),
            "q25_nse": grouped["nse"].quantile(0.25),
            "q75_nse": grouped["nse"].quantile(0.75),
            "share_nse_gt_0_5": grouped["nse"].apply(lambda s: float((s > 0.5).mean())),
            "share_nse_gt_0": grouped["nse"].apply(lambda s: float((s > 0).mean())),
            "median_kge": grouped["kge"].median(),
        }
    ).reset_index()
    calibrated = _baseline(table, keys[:-1], CALIBRATED)
    median = _baseline(table, keys[:-1], MEDIAN)
    table["loss_vs_calibrated"] = calibrated - table["median_nse"]
    table["gain_vs_median"] = table["median_nse"] - median
    return table


def _baseline(table: pd.DataFrame, by: list[str], method: str) -> pd.Series:
    """Median NSE of a baseline method, broadcast to every row (per model when ``by``)."""
    values = table["median_nse"].where(table["method"] == method)
    if not by:
        return pd.Series(values.max(), index=table.index)
    return values.groupby([table[c] for c in by]).transform("max")


def best_method(summary: pd.DataFrame) -> pd.Series:
    """The transfer row (not a baseline) with the highest median leave-one-out NSE."""
    transfers = summary[summary["method"] != CALIBRATED]
    if transfers.empty:
        raise ValueError("no transfer method in the summary")
    return transfers.sort_values(["median_nse", "method"], ascending=[False, True]).iloc[0]


# --------------------------------------------------------------------------------------------
# Number of donors chosen in leave-one-out


@dataclass(frozen=True)
class DonorCountChoice:
    """Result of :func:`choose_donor_counts`.

    Attributes
    ----------
    chosen : dict
        Donor method -> the donor count with the highest median leave-one-out NSE (ties: the
        smaller count).
    table : DataFrame
        One row per (method, count): ``method``, ``n_donors``, ``median_nse``, ``median_kge``,
        ``share_nse_gt_0``, ``chosen`` (bool), and ``median_nse_choice_held_out`` on the chosen
        row: the median NSE when each basin's count is chosen without that basin's own score
        (NaN on the other rows).
    scores : DataFrame
        Long: ``basin_id``, ``method``, ``n_donors``, ``nse``, ``kge`` per fold and count.
    """

    chosen: dict[str, int]
    table: pd.DataFrame
    scores: pd.DataFrame


def choose_donor_counts(
    context: FoldContext,
    *,
    executor=None,
    progress: Callable[[int, int], None] | None = None,
    chunk_basins: int = CHUNK_BASINS,
    reader: StoreReader | None = None,
) -> DonorCountChoice | None:
    """Pick the number of donors of each donor method by median leave-one-out NSE.

    Each fold simulates the largest candidate donor set once: the k nearest donors' sets in one
    vectorised call (output averaging), or one averaged set per candidate count (parameter
    averaging); the flow for n donors combines the first n with inverse-distance weights
    renormalised over them. Choosing n on the same folds that report the skill makes the
    reported skill slightly optimistic; ``median_nse_choice_held_out`` in the table measures by
    how much (each basin's count chosen from the other basins' scores only).

    Parameters
    ----------
    context : FoldContext
        As for :func:`leave_one_out`; ``options.donor_choices`` holds the candidate counts.
    executor : optional
        Runs chunks of target basins (:mod:`regional.compute`); default in this process.
    progress : callable(done, total), optional
        Called as target basins complete.
    chunk_basins : int, default 8
        Target basins per task.
    reader : StoreReader, optional
        As for :func:`leave_one_out`.

    Returns
    -------
    DonorCountChoice or None
        None when no candidate counts are given or no donor method is configured.
    """
    methods = _donor_methods(context.options)
    if not context.options.donor_choices or not methods:
        return None
    _check_context(context)
    executor = executor or InProcessExecutor()
    chunks = chunked(context.targets, chunk_basins)
    task, shared = shipped(run_count_folds, context, reader)
    results = executor.map(task, chunks, shared, progress=progress)
    scores = pd.DataFrame(
        [row for chunk in results for row in chunk],
        columns=["basin_id", "method", "n_donors", "nse", "kge"],
    )
    return _pick_counts(scores, methods)


def with_donor_counts(context: FoldContext, chosen: Mapping[str, int]) -> FoldContext:
    """The same context with ``chosen`` donor counts used by every later fold and prediction."""
    options = replace(context.options, chosen_donors=dict(chosen))
    return replace(context, options=options)


def _donor_methods(options: TransferOptions) -> list[str]:
    return [m for m in options.methods if m in DONOR_METHODS]


def run_count_folds(targets: Sequence[str], context: FoldContext) -> list[dict]:
    """Score every candidate donor count at some target basins (one task of the executor)."""
    methods = _donor_methods(context.options)
    most = max(context.options.donor_choices)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the same warnings reach the user from leave_one_out
        donations = fold_donations_of(targets, context, methods, n_donors=most)
    return [row for target in targets for row in _count_fold(target, context, donations)]


def _count_fold(
    target: str, context: FoldContext, donations: Mapping[str, FoldDonations]
) -> list[dict]:
    transforms = context.transforms
    forcing = _target_forcing(target, context)
    obs = context.flow_mm[target].to_numpy(dtype=float)[context.evaluation]
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the same warnings reach the user from leave_one_out
        for method in _donor_methods(context.options):
            sets = donations[method].donations[target].for_target(target)
            counts = sorted({min(n, len(sets)) for n in context.options.donor_choices})
            flows = count_flows(
                sets, counts, transforms=transforms, context=context, forcing=forcing
            )
            for n, flow in zip(counts, flows.T, strict=True):
                scores = metrics.all_scores(obs, flow[context.evaluation])
                rows.append(
                    {
                        "basin_id": target,
                        "method": method,
                        "n_donors": n,
                        "nse": float(scores["nse"]),
                        "kge": float(scores["kge"]),
                    }
                )
    return rows


def count_flows(
    sets: pd.DataFrame,
    counts: Sequence[int],
    *,
    transforms: Mapping[str, str],
    context: FoldContext,
    forcing: Mapping[str, np.ndarray | None],
) -> np.ndarray:
    """Flow of one target from its first n donors, for every n in ``counts``.

    Parameters
    ----------
    sets : DataFrame
        One target's donor rows sorted by rank (``distance`` and the parameters), at least
        ``max(counts)`` of them.
    counts : sequence of int
        Donor counts, each <= len(sets).
    transforms : mapping
        Parameter -> ``"log"`` or ``"identity"`` (every model parameter): the space parameter
        averaging works in.
    context : FoldContext
        Model, fixed parameters, warm-up, initial storage and combination mode.
    forcing : mapping
        ``precip``, ``pet`` (mm/day) and ``temp`` (degC or None) of the target.

    Returns
    -------
    ndarray (window days, len(counts))
        mm/day: output averaging of the first n donors' flows, or the flow of their averaged
        set (parameter averaging), weights inverse-distance renormalised over the n donors.
    """
    names = list(transforms)
    distance = sets["distance"].to_numpy(dtype=float)
    weights = [inverse_distance_weights(distance[:n], context.options.power) for n in counts]
    if context.options.combine == "output":
        params = {name: sets[name].to_numpy(dtype=float) for name in names}
    else:
        params = {name: _averaged(sets[name], weights, transforms[name]) for name in names}
    simulator = donor_simulator(context.model, context.fixed_params)
    flow = simulator(
        context.model,
        forcing["precip"],
        forcing["pet"],
        params,
        temp=forcing["temp"],
        initial_storage=context.initial_storage,
        warmup_days=context.window.warmup_days,
    ).flow
    if context.options.combine == "output":
        return np.column_stack([flow[:, : len(w)] @ w for w in weights])
    return np.asarray(flow)


def _averaged(values: pd.Series, weights: Sequence[np.ndarray], transform: str) -> np.ndarray:
    """Weighted mean of the first len(w) values in transformed space, for every w."""
    z = forward(values.to_numpy(dtype=float), transform)
    return np.array([inverse(w @ z[: len(w)], transform) for w in weights], dtype=float)


def _pick_counts(scores: pd.DataFrame, methods: Sequence[str]) -> DonorCountChoice:
    grouped = scores.groupby(["method", "n_donors"], sort=False)
    table = pd.DataFrame(
        {
            "median_nse": grouped["nse"].median(),
            "median_kge": grouped["kge"].median(),
            "share_nse_gt_0": grouped["nse"].apply(lambda s: float((s > 0).mean())),
        }
    ).reset_index()
    table["method"] = pd.Categorical(table["method"], categories=list(methods), ordered=True)
    table = table.sort_values(["method", "n_donors"]).reset_index(drop=True)
    table["method"] = table["method"].astype(str)
    chosen = {}
    for method, rows in table.groupby("method", sort=False):
        best = rows.sort_values(["median_nse", "n_donors"], ascending=[False, True]).iloc[0]
        chosen[str(method)] = int(best["n_donors"])
    table["chosen"] = table["n_donors"].to_numpy() == table["method"].map(chosen).to_numpy()
    held_out = {m: _held_out_choice(scores[scores["method"] == m]) for m in chosen}
    table["median_nse_choice_held_out"] = [
        held_out[m] if is_chosen else np.nan
        for m, is_chosen in zip(table["method"], table["chosen"], strict=True)
    ]
    return DonorCountChoice(chosen=chosen, table=table, scores=scores)


def _held_out_choice(scores: pd.DataFrame) -> float:
    """Median NSE when each basin's count is the best by the other basins' median NSE."""
    wide = scores.pivot(index="basin_id", columns="n_donors", values="nse")
    values = wide.to_numpy(dtype=float)
    picked = np.empty(len(values))
    for i in range(len(values)):
        others = np.nanmedian(np.delete(values, i, axis=0), axis=0)
        best = np.flatnonzero(others == np.nanmax(others))[0]  # ties: the smaller count
        picked[i] = values[i, best]
    return float(np.nanmedian(picked))
