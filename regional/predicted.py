"""What a prediction at ungauged basins or new sites produced: :class:`Prediction`, its daily
flows held as grids (:class:`DailyFlows`) and the long table built from them when read or
written part by part (:func:`flow_parts`).

See ``docs/prediction.md`` and ``docs/outputs.md``.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from regional import io
from regional.flowstats import to_m3s

FLOW_COLUMNS = (
    "basin_id",
    "date",
    "flow_mm",
    "flow_m3s",
    "flow_low_mm",
    "flow_high_mm",
    "flow_low_m3s",
    "flow_high_m3s",
)
"""Columns of :attr:`Prediction.flows`."""
FLOW_PART_BASINS = 16
"""Basins per part when the long table of daily flows is built part by part for writing."""


@dataclass(frozen=True)
class DailyFlows:
    """Daily flow of target basins with its bounds, held as grids (days x basins, mm/day).

    The long table of :attr:`Prediction.flows` (one row per basin and day) takes about three
    times the memory; it is built from these grids when read, or part by part
    (:meth:`parts`) when written.

    Attributes
    ----------
    flow_mm, low_mm, high_mm : DataFrame
        Days x basins (``basin_id``): flow and its lower and upper bounds, mm/day.
    area_km2 : Series
        Basin area, km2, by basin (for the flows in m3/s).
    """

    flow_mm: pd.DataFrame
    low_mm: pd.DataFrame
    high_mm: pd.DataFrame
    area_km2: pd.Series

    def long(self, basins: Sequence[str] | None = None) -> pd.DataFrame:
        """The long table (:data:`FLOW_COLUMNS`) of ``basins`` (default all), basin by basin."""
        basins = list(self.flow_mm.columns if basins is None else basins)
        return long_flows(
            self.flow_mm[basins],
            self.low_mm[basins],
            self.high_mm[basins],
            self.area_km2[basins],
        )

    def parts(self, basins_per_part: int = FLOW_PART_BASINS) -> Iterator[pd.DataFrame]:
        """The long table in consecutive parts of ``basins_per_part`` basins (at least one part,
        empty when there is no basin); their concatenation is :meth:`long`."""
        basins = [str(b) for b in self.flow_mm.columns]
        if not basins:
            yield self.long([])
        for first in range(0, len(basins), basins_per_part):
            yield self.long(basins[first : first + basins_per_part])


@dataclass(frozen=True)
class Prediction:
    """Estimates at the ungauged basins of a region (see :func:`predict_ungauged`).

    Attributes
    ----------
    model, method : str
        The chosen storage model and transfer method.
    level : float
        Nominal level of the daily flow bounds, e.g. 0.9.
    table : DataFrame
        Indexed by ``basin_id`` (ungauged): the transfer attributes; for every method m and
        parameter p ``{p}_{m}``, ``{p}_{m}_low``, ``{p}_{m}_high`` (parameter units); ``method``
        (chosen), the chosen ``p``, ``p_low``, ``p_high``; the statistics of
        :data:`STATISTIC_COLUMNS` (mm/day, ``mean_flow_m3s`` in m3/s); ``applicable`` (bool),
        ``reason`` (str, "" when applicable), ``mahalanobis_d2``, ``nearest_donor_distance``.
    flows : DataFrame
        Long: ``basin_id``, ``date``, ``flow_mm``, ``flow_m3s``, ``flow_low_mm``,
        ``flow_high_mm``, ``flow_low_m3s``, ``flow_high_m3s``, every simulated day after the
        warm-up (a property, built from ``daily`` when read).
    daily : DailyFlows
        The same daily flows held as grids (days x basins); :meth:`DailyFlows.parts` gives
        the long table part by part.
    coverage : DataFrame
        Per (model, method) of leave-one-out: ``model``, ``method``, ``level``, ``coverage``
        (mean over basins of the share of observed days inside the bounds built without the
        basin), ``coverage_decile_1``, ``coverage_decile_10`` (the same on the lowest and
        highest tenth of each basin's simulated flow), ``n_days``, ``n_basins``; and for the
        chosen (model, method) only (NaN elsewhere) the held-out check: ``held_out_coverage``,
        ``held_out_coverage_decile_1``, ``held_out_coverage_decile_10`` (bounds as first
        built, at basins held out of the whole fit), ``held_out_coverage_widened`` (after
        widening, same repeats), ``held_out_repeats``, ``held_out_basins`` (held out per
        repeat), ``widened_classes`` (e.g. ``"1: 0.90 -> 0.95"``; "" when none).
    error_model : DataFrame
        The conformal quantiles of the chosen (model, method), one row per flow class:
        ``class``, ``percentile_low``, ``percentile_high`` (within-basin quantile range of the
        simulated flow), ``lower_q``, ``upper_q`` (log-flow residuals, dimensionless),
        ``n`` (days), ``n_basins``, ``offset_fraction`` (each basin's log offset c is this
        share of its mean simulated flow, mm/day).
    notes : tuple of str
        What the user should read beside the numbers.
    held_out : DataFrame or None
        The held-out check of the chosen (model, method)
        (:func:`regional.repeats.held_out_flows`), one row per ``flow_class`` (``all``,
        ``class 1`` .., ``decile 1``, ``decile 10``): ``held_out_coverage`` (bounds as first
        built), ``n_pairs`` ((repeat, basin) pairs), ``level_used`` (the level the class's
        quantiles were finally taken at; NaN for the deciles and ``all``),
        ``held_out_coverage_widened`` (the same repeats with the widened classes; not an
        independent check). None when the check did not run.
    held_out_draws : tuple of HeldOutRepeat
        The repeats' flows (:func:`regional.repeats.held_out_flows`), reused by the flow
        statistics' held-out check; empty when the check did not run, and in the result of
        :func:`regional.pipeline.run`, which drops them once the statistics are computed.
    model_statistics : DataFrame or None
        Indexed by ``basin_id`` (sorted): the flow statistics
        (:func:`regional.flowstats.statistics_frame`) of each target's daily flow over the
        fitted region's evaluation days, with its precipitation: the model route of
        :mod:`regional.statroutes`, computed beside the flows (by the same task on a cluster);
        no column when the flows share no day with the evaluation days.
    """

    model: str
    method: str
    level: float
    table: pd.DataFrame
    daily: DailyFlows = field(repr=False)
    coverage: pd.DataFrame
    error_model: pd.DataFrame
    notes: tuple[str, ...]
    held_out: pd.DataFrame | None = None
    held_out_draws: tuple = field(default=(), repr=False)
    model_statistics: pd.DataFrame | None = field(default=None, repr=False)

    @property
    def flows(self) -> pd.DataFrame:
        """The long table of daily flows (see the class docstring), built from :attr:`daily`
        when read."""
        return self.daily.long()


def flow_parts(prediction: Prediction) -> io.TableParts:
    """The long table of daily flows with the bounds' level, to be written part by part (the
    whole table is never held: it takes about three times the memory of the grids)."""
    level = prediction.level
    return io.TableParts(lambda: (part.assign(level=level) for part in prediction.daily.parts()))


def long_flows(flow_mm: pd.DataFrame, low, high, area: pd.Series) -> pd.DataFrame:
    """The long table (:data:`FLOW_COLUMNS`) of days x basins grids of flow and bounds
    (mm/day) and the basins' areas (km2): one row per basin and day, basin by basin."""
    n_days, n_basins = flow_mm.shape
    values = flow_mm.to_numpy(dtype=float)
    areas = area.to_numpy(dtype=float)[None, :]
    low, high = low.to_numpy(dtype=float), high.to_numpy(dtype=float)
    return pd.DataFrame(
        {
            "basin_id": np.repeat(flow_mm.columns.to_numpy(dtype=object), n_days),
            "date": np.tile(flow_mm.index.to_numpy(), n_basins),
            "flow_mm": values.T.ravel(),
            "flow_m3s": to_m3s(values, areas).T.ravel(),
            "flow_low_mm": low.T.ravel(),
            "flow_high_mm": high.T.ravel(),
            "flow_low_m3s": to_m3s(low, areas).T.ravel(),
            "flow_high_m3s": to_m3s(high, areas).T.ravel(),
        },
        columns=list(FLOW_COLUMNS),
    )
