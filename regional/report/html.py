"""The run's report: one self-contained HTML page (figures embedded, no external resource).

:func:`render_report` builds the page as a string from a run result and the PNG bytes of its
figures; :func:`report_pieces` gives the same text piece by piece, each figure encoded only when
its piece is taken, so that :mod:`regional.io` writes the page without holding it (or more than
one encoded figure) whole. Every text that comes from the inputs or the run (names,
messages, table cells) is escaped. The page carries its own modest style sheet and loads nothing
from anywhere, so it opens offline and can be mailed as one file.
"""

from __future__ import annotations

import base64
import calendar
import html
import math
import numbers
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional import flowstats
from regional.crossval import CALIBRATED, MEDIAN
from regional.models import parameter_table
from regional.report import statistics as statistics_report
from regional.report.labels import column_label, flow_in_unit, parameter_labels
from regional.report.methods import methods_text
from regional.result import software_versions

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import RunResult

SECTIONS = (
    ("summary", "Summary"),
    ("cautions", "Cautions"),
    ("inputs", "Inputs"),
    ("calibration", "Calibration at gauged basins"),
    ("transfer", "Transfer methods compared in leave-one-out"),
    ("regression", "Regression of parameters on attributes"),
    ("figures", "Maps and figures"),
    ("ungauged", "Estimates at ungauged basins"),
    ("statistics", "Flow statistics"),
    ("screening", "Candidate gauge sites"),
    ("warnings", "Warnings"),
    ("methods", "Methods and references"),
    ("run", "Run information"),
)
"""(id, heading) of every section, in page order."""

FIGURE_CAPTIONS = {
    "loo_nse_map": "Leave-one-out NSE of each gauged basin for the chosen method; ungauged "
    "basins outlined in grey.",
    "parameters": "Calibrated parameter of each gauged basin against the value each method "
    "transferred to it when it was left out; the dashed line is 1:1.",
    "nse_cdf": "Cumulative distribution of leave-one-out NSE per method; calibrated (upper "
    "bound) dashed, median (benchmark) dotted.",
    "hydrographs": "Observed, calibrated and transferred daily flow at the basins with the best, "
    "median and worst leave-one-out NSE of the chosen method.",
    "model_comparison": "Median leave-one-out NSE per method and model; whiskers span the "
    "quartiles.",
    "ungauged_mean_flow_map": "Estimated mean flow at ungauged basins; hatched basins failed the "
    "applicability check.",
    "ungauged_hydrographs": "Estimated flow at every ungauged basin with its lower and upper "
    "bounds: daily flow over the chosen window (left) and the flow-duration curve of the whole "
    "period (right). On log axes, zero and very low flows are drawn on the marked floor.",
    "screening": "Candidate gauge sites ranked by screening score, beside the score's parts.",
    "statistics_loo": "Observed statistic of each gauged basin against its leave-one-out "
    "estimate by the model route and the best direct route (log axes; dashed 1:1 line; values "
    "at or below 0.001 drawn at 0.001).",
    "statistics_fdc": "Flow-duration curve at each ungauged basin from the chosen route of each "
    "point, with its bounds (exceedance on a normal-probability scale, log flow axis).",
}
FIGURE_SECTIONS = {
    "ungauged_mean_flow_map": "ungauged",
    "ungauged_hydrographs": "ungauged",
    "screening": "screening",
    "statistics_loo": "statistics",
    "statistics_fdc": "statistics",
}
"""Figures shown beside their tables; every other figure goes to the ``figures`` section."""

DISTRIBUTION_COLUMNS = (
    "score_calibration",
    "score_validation",
    "nse_calibration",
    "nse_validation",
    "kge_calibration",
    "kge_validation",
)
SCREENING_COLUMNS = (
    "rank",
    "score",
    "variance_reduction",
    "donor_spread",
    "applicable",
    "reason",
)
APPLICABILITY_COLUMNS = ("mahalanobis_d2", "nearest_donor_distance")
MONTH_COLUMNS = tuple(f"flow_m{month:02d}_mm" for month in range(1, 13))
STATISTICS_MM = ("mean_flow_mm", "q5_mm", "q50_mm", "q95_mm", "min7_mean_mm")
"""Headline statistics of the prediction table, mm/day (shown in the report's unit)."""
DASH = "\u2013"

STYLE = """
:root { --ink: #1d2428; --muted: #5b6670; --rule: #d5dade; --band: #f3f5f6; --accent: #2a5d84;
        --flag: #9b1c1c; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff;
       font: 15px/1.5 system-ui, "Segoe UI", "Helvetica Neue", Arial, sans-serif; }
header { padding: 1.6em 2em 1em; border-bottom: 3px solid var(--accent); }
header h1 { margin: 0 0 .2em; font-size: 1.6em; font-weight: 600; }
header p { margin: 0; color: var(--muted); }
nav { padding: .6em 2em; background: var(--band); font-size: .9em; display: flex;
      flex-wrap: wrap; row-gap: .3em; }
nav a { color: var(--accent); margin-right: 1.1em; text-decoration: none; white-space: nowrap; }
main { max-width: 1180px; padding: 0 2em 3em; }
section { border-top: 1px solid var(--rule); padding-top: .4em; margin-top: 1.6em; }
h2 { font-size: 1.25em; color: var(--accent); margin: .4em 0 .6em; }
h3 { font-size: 1.02em; margin: 1.2em 0 .4em; }
p, li { max-width: 78ch; }
.cautions { border-left: 4px solid var(--flag); background: #fbf3f3; padding: .5em 1em; }
table { border-collapse: collapse; margin: .4em 0 1em; font-size: .85em;
        font-variant-numeric: tabular-nums; }
caption { text-align: left; color: var(--muted); padding-bottom: .3em; }
th, td { padding: .25em .6em; border-bottom: 1px solid var(--rule); vertical-align: top; }
th { background: var(--band); text-align: left; font-weight: 600; vertical-align: bottom;
     min-width: 4.5em; max-width: 12em; }
th .unit { display: block; font-weight: 400; color: var(--muted); font-size: .92em; }
td.num { text-align: right; white-space: nowrap; }
td.text { white-space: normal; min-width: 12em; max-width: 30em; overflow-wrap: anywhere; }
tr.chosen td { background: #e8f0f7; font-weight: 600; }
td.flag { color: var(--flag); font-weight: 600; }
.scroll { overflow-x: auto; max-width: 100%; }
table.data th:first-child, table.data td:first-child { position: sticky; left: 0; z-index: 1;
        background: #fff; box-shadow: 1px 0 0 var(--rule); }
table.data th:first-child { background: var(--band); }
table.data tr.chosen td:first-child { background: #e8f0f7; }
figure { margin: 1em 0 1.6em; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: .9em; max-width: 90ch; }
details { margin: .4em 0 1em; }
summary { cursor: pointer; color: var(--accent); }
.muted { color: var(--muted); }
"""


# --------------------------------------------------------------------------------------------
# Public
# --------------------------------------------------------------------------------------------


def render_report(result: RunResult, figures: Mapping[str, bytes]) -> str:
    """The run's report as one self-contained HTML page.

    Parameters
    ----------
    result : RunResult
        From :func:`regional.pipeline.run`; ``prediction`` and ``screening`` may be None (their
        sections then say why they are empty).
    figures : mapping of str -> bytes
        PNG images by figure name (see :func:`regional.report.make_figures`); each is embedded
        once as a base64 data URI beside its section's tables (unknown names go to the figures
        section).

    Returns
    -------
    str
        The HTML document (UTF-8 text): the concatenation of :func:`report_pieces`.
    """
    return "".join(report_pieces(result, figures))


def report_pieces(result: RunResult, figures: Mapping[str, bytes]) -> Iterator[str]:
    """The text of :func:`render_report` in pieces, to be written one after another.

    The tables and text are built first (a few MB at most); each figure is read from
    ``figures`` and encoded only when its piece is taken, so a mapping that reads the PNG files
    on access keeps one image in memory at a time.
    """
    placed = _place_figures(figures)
    sections = {
        "summary": _summary(result),
        "cautions": _cautions(),
        "inputs": _inputs(result),
        "calibration": _calibration(result),
        "transfer": _transfer(result),
        "regression": _regression(result),
        "figures": _figures_section(placed["figures"]),
        "ungauged": _ungauged(result) + placed["ungauged"],
        "statistics": _statistics(result) + placed["statistics"],
        "screening": _screening(result) + placed["screening"],
        "warnings": _warnings(result),
        "methods": _methods(result),
        "run": _run_information(result),
    }
    yield _page_head(result.settings.region.name)
    for number, (key, title) in enumerate(SECTIONS):
        yield ("\n" if number else "") + f'<section id="{key}">\n<h2>{_esc(title)}</h2>\n'
        for position, part in enumerate(sections[key]):
            yield "\n" if position else ""
            yield _figure(part.name, figures[part.name]) if isinstance(part, _Figure) else part
        yield "\n</section>"
    yield "\n</main>\n</body>\n</html>\n"


# --------------------------------------------------------------------------------------------
# Page and building blocks
# --------------------------------------------------------------------------------------------


def _page_head(name: str) -> str:
    """The page up to the first section."""
    title = f"regional report: {name}"
    navigation = "".join(f'<a href="#{key}">{_esc(text)}</a>' for key, text in SECTIONS)
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{_esc(title)}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n"
        f"<header><h1>{_esc(name)}</h1><p>Flows at ungauged basins by parameter transfer, with "
        "leave-one-out skill. Report of one run of regional.</p></header>\n"
        f"<nav>{navigation}</nav>\n<main>\n"
    )


def _esc(value: object) -> str:
    return html.escape(str(value), quote=True)


def _p(text: str, *, css: str | None = None) -> str:
    attribute = f' class="{css}"' if css else ""
    return f"<p{attribute}>{_esc(text)}</p>"


def _h3(text: str) -> str:
    return f"<h3>{_esc(text)}</h3>"


def _list(items: Iterable[str]) -> str:
    return "<ul>" + "".join(f"<li>{_esc(item)}</li>" for item in items) + "</ul>"


def _details(label: str, content: str) -> str:
    return f"<details><summary>{_esc(label)}</summary>{content}</details>"


def _fmt(value: object) -> str:
    """A table cell as text: numbers to three significant digits, missing as a dash."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return DASH
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        number = float(value)
        if math.isnan(number):
            return DASH
        if math.isinf(number):
            return "inf" if number > 0 else "-inf"
        if number == 0:
            return "0"
        if abs(number) >= 1000:
            return f"{number:,.0f}"
        return f"{number:.3g}"
    if isinstance(value, pd.Timestamp):
        return DASH if pd.isna(value) else str(value.date())
    if value is pd.NaT:
        return DASH
    return str(value)


def _table(
    frame: pd.DataFrame,
    *,
    caption: str | None = None,
    index: bool = False,
    chosen: Sequence[bool] | None = None,
    flag_column: str | None = None,
    labels: Mapping[str, tuple[str, str]] | None = None,
    anchor: str | None = None,
) -> str:
    """An HTML table of a frame: readable headers with units, every cell escaped.

    Headers come from :func:`regional.report.labels.column_label` (``labels`` first, for this
    table's own columns), each carrying its machine name as a tooltip; numbers are
    right-aligned, text cells wrap, and the first column stays in view when a wide table
    scrolls sideways. ``chosen`` marks rows to highlight; cells of ``flag_column`` that read
    "no" are marked; ``anchor`` is an id for links to the table.
    """
    frame = frame.reset_index() if index else frame
    head = "".join(_header_cell(str(column), labels) for column in frame.columns)
    marks = list(chosen) if chosen is not None else [False] * len(frame)
    rows = [
        _row(frame.columns, values, mark=mark, flag_column=flag_column)
        for mark, values in zip(marks, frame.itertuples(index=False, name=None), strict=True)
    ]
    title = f"<caption>{_esc(caption)}</caption>" if caption else ""
    identity = f' id="{_esc(anchor)}"' if anchor else ""
    return (
        f'<div class="scroll"{identity}><table class="data">{title}<thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table></div>"
    )


def _header_cell(column: str, labels: Mapping[str, tuple[str, str]] | None) -> str:
    label, unit = column_label(column, extra=labels)
    shown = f'<span class="unit">{_esc(unit)}</span>' if unit else ""
    return f'<th scope="col" title="{_esc(column)}">{_esc(label)}{shown}</th>'


def _row(columns, values, *, mark: bool, flag_column: str | None) -> str:
    cells = []
    for column, value in zip(columns, values, strict=True):
        text = _fmt(value)
        css = _cell_class(value, column == flag_column and text == "no")
        cells.append(f"<td{css}>{_esc(text)}</td>")
    opening = '<tr class="chosen">' if mark else "<tr>"
    return opening + "".join(cells) + "</tr>"


def _cell_class(value: object, flagged: bool) -> str:
    if flagged:
        return ' class="flag"'
    numeric = isinstance(value, numbers.Real) and not isinstance(value, bool | np.bool_)
    if numeric:
        return ' class="num"'
    return ' class="text"' if isinstance(value, str) and len(value) > 24 else ""


def _key_values(pairs: Sequence[tuple[str, object]], *, caption: str | None = None) -> str:
    frame = pd.DataFrame({"item": [k for k, _ in pairs], "value": [_fmt(v) for _, v in pairs]})
    return _table(frame, caption=caption)


def _period(period) -> str:
    if period is None:
        return "none"
    start, end = period
    return f"{_fmt(pd.Timestamp(start))} to {_fmt(pd.Timestamp(end))}"


def _names(result: RunResult) -> pd.Series | None:
    """The basins layer's ``name`` column when it has one."""
    basins = result.region.basins
    return basins["name"].astype(str) if "name" in basins.columns else None


def _with_names(result: RunResult, frame: pd.DataFrame) -> pd.DataFrame:
    """``basin_id`` (and ``name`` when known) as the first columns of a basin-indexed frame."""
    out = frame.copy()
    out.index = out.index.astype(str)
    names = _names(result)
    if names is not None and "name" not in out.columns:
        out.insert(0, "name", names.reindex(out.index).to_numpy())
    out.index.name = "basin_id"
    return out.reset_index()


def _median_nse(result: RunResult, model: str, method: str) -> float:
    rows = result.summary[
        (result.summary["model"] == model) & (result.summary["method"] == method)
    ]
    return float(rows["median_nse"].iloc[0]) if len(rows) else float("nan")


# --------------------------------------------------------------------------------------------
# Figures
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Figure:
    """Where a figure goes among a section's parts (encoded when written)."""

    name: str


def _place_figures(figures: Mapping[str, bytes]) -> dict[str, list[str | _Figure]]:
    placed: dict[str, list[str | _Figure]] = {
        "figures": [],
        "ungauged": [],
        "statistics": [],
        "screening": [],
    }
    for name in figures:
        placed[FIGURE_SECTIONS.get(_figure_kind(name), "figures")].append(_Figure(name))
    return placed


def _figure_kind(name: str) -> str:
    """A figure name without its page number (``ungauged_hydrographs_2``: ``..._hydrographs``)."""
    stem, _, number = name.rpartition("_")
    return stem if number.isdigit() and stem else name


def _figure(name: str, png: bytes) -> str:
    caption = FIGURE_CAPTIONS.get(_figure_kind(name), name.replace("_", " "))
    data = base64.b64encode(bytes(png)).decode("ascii")
    return (
        f'<figure id="figure-{_esc(name)}"><img src="data:image/png;base64,{data}" '
        f'alt="{_esc(caption)}"><figcaption>{_esc(caption)}</figcaption></figure>'
    )


def _figures_section(figures: list[str | _Figure]) -> list[str | _Figure]:
    if not figures:
        return [_p("No figures were drawn for this run.")]
    return figures


# --------------------------------------------------------------------------------------------
# Sections
# --------------------------------------------------------------------------------------------


def _summary(result: RunResult) -> list[str]:
    region = result.region
    model, method = result.chosen_model, result.chosen_method
    chosen = _median_nse(result, model, method)
    upper = _median_nse(result, model, CALIBRATED)
    benchmark = _median_nse(result, model, MEDIAN)
    text = (
        f"{result.settings.region.name}: {len(region.basins)} basins "
        f"({'outlet points' if region.is_point else 'polygons'}), {len(region.gauged)} gauged "
        f"and {len(region.ungauged)} ungauged. The estimates use the {model} model with "
        f"{method} transfer: its median leave-one-out NSE is {_fmt(chosen)}, against "
        f"{_fmt(upper)} for the basins' own calibrated parameters (the upper bound) and "
        f"{_fmt(benchmark)} for the regional median parameters (the benchmark)."
    )
    text += " " + _verdict(chosen, upper, benchmark, method)
    prediction = result.prediction
    if prediction is not None:
        table = prediction.table
        flagged = int((~table["applicable"].astype(bool)).sum())
        text += (
            f" Flows were estimated at {len(table)} ungauged basins with {prediction.level:.0%} "
            f"bounds; {flagged} of them lie outside what the gauged basins support and are "
            "flagged."
        )
    return [_p(text)]


def _verdict(chosen: float, upper: float, benchmark: float, method: str) -> str:
    if not np.isfinite(chosen) or not np.isfinite(benchmark):
        return ""
    if method == MEDIAN or chosen <= benchmark:
        return (
            "No transfer method beat the median benchmark: the attributes and locations add no "
            "skill here, so treat the estimates as regional averages."
        )
    return (
        f"It gains {_fmt(chosen - benchmark)} in median NSE over the benchmark and stays "
        f"{_fmt(upper - chosen)} below the upper bound."
    )


def _cautions() -> list[str]:
    return [
        '<div class="cautions">',
        _list(
            [
                "Flows estimated at ungauged sites carry large uncertainty: no observation at the "
                "site has checked them. Their skill is what the leave-one-out test measured at "
                "gauged basins of this region, and it may be lower at a site unlike them.",
                "Show the validation skill and the bounds beside every estimate you pass on; do "
                "not quote an estimate without them, and read the applicability flag first.",
                "Design decisions that affect safety (floods, dam safety, water supply) must "
                "follow local codes and licensed professional practice; these estimates do not "
                "replace them.",
            ]
        ),
        "</div>",
    ]


def _inputs(result: RunResult) -> list[str]:
    settings, region = result.settings, result.region
    model_settings, transfer = settings.model, settings.transfer
    crs = region.basins.crs
    pairs = [
        ("config", settings.path),
        ("basins", f"{settings.basins.path} (layer {settings.basins.layer or 'first'})"),
        ("daily series", settings.series.path),
        ("geometry", "outlet points with area" if region.is_point else "polygons"),
        ("coordinate reference system", crs.to_string() if crs is not None else "none"),
        ("basins", len(region.basins)),
        ("gauged basins", len(region.gauged)),
        ("ungauged basins", len(region.ungauged)),
        ("common daily period", _period((region.dates[0], region.dates[-1]))),
        ("calibration period", _period(region.calibration)),
        ("validation period", _period(model_settings.validation)),
        ("warm-up (days, not scored)", model_settings.warmup_days),
        ("models", ", ".join(result.runs)),
        ("calibration objective", model_settings.objective),
        ("snow store", "on" if _snow_on(result) else "off"),
        ("transfer methods", ", ".join(transfer.methods)),
        ("donors per target", _donor_setting(transfer.donors)),
        ("donor combination", transfer.combine),
        ("overlap share excluding a donor", transfer.exclude_overlap),
        ("attributes used", ", ".join(result.attributes)),
    ]
    parts = [_key_values(pairs)]
    parts.append(_h3("Attributes used: range over all basins"))
    parts.append(_table(_attribute_ranges(region.attributes, result.attributes)))
    if region.notes:
        parts += [_h3("Notes from loading the region"), _list(region.notes)]
    return parts


def _donor_setting(donors: int | tuple[int, ...]) -> str:
    if isinstance(donors, tuple):
        return f"chosen in leave-one-out from {', '.join(map(str, donors))}"
    return str(donors)


def _attribute_ranges(attributes: pd.DataFrame, names: Sequence[str]) -> pd.DataFrame:
    """Minimum, median and maximum of each attribute, with its readable name and unit."""
    ranges = attributes[list(names)].astype(float).agg(["min", "median", "max"]).T
    labels = [column_label(name) for name in ranges.index]
    ranges.insert(0, "unit", [unit or "as given" for _, unit in labels])
    ranges.insert(
        0,
        "attribute",
        [f"{label} ({name})" for (label, _), name in zip(labels, ranges.index, strict=True)],
    )
    return ranges.reset_index(drop=True)


def _snow_on(result: RunResult) -> bool:
    return any(run.context.temp_c is not None for run in result.runs.values())


def _calibration(result: RunResult) -> list[str]:
    model_settings = result.settings.model
    parts = [
        _p(
            f"Each gauged basin was calibrated on {_period(result.region.calibration)} "
            f"(objective {model_settings.objective}) and scored on the validation period "
            f"{_period(model_settings.validation)} (split-sample test), warm-up excluded."
        )
    ]
    for model, run in result.runs.items():
        calibration = run.calibration
        names = [
            p.name for p in parameter_table(model, snow=True) if p.name in calibration.columns
        ]
        columns = [c for c in (*names, *DISTRIBUTION_COLUMNS) if c in calibration.columns]
        spread = calibration[columns].astype(float).describe(percentiles=[0.25, 0.5, 0.75]).T
        spread = spread.rename(columns={"25%": "q25", "50%": "median", "75%": "q75"})
        spread = spread[["count", "min", "q25", "median", "q75", "max"]]
        labels = parameter_labels(parameter_table(model, snow=True))
        spread.index = [_label_with_unit(name, labels) for name in spread.index]
        spread.index.name = "quantity"
        parts.append(_h3(f"Model {model}: distribution over {len(calibration)} gauged basins"))
        parts.append(_table(spread, index=True))
        per_basin = _with_names(result, calibration.drop(columns=["objective"], errors="ignore"))
        parts.append(_details(f"Per basin ({model})", _table(per_basin, labels=labels)))
    return parts


def _label_with_unit(name: str, labels: Mapping[str, tuple[str, str]] | None = None) -> str:
    label, unit = column_label(name, extra=labels)
    return f"{label} ({unit})" if unit and unit != "-" else label


def _transfer(result: RunResult) -> list[str]:
    parts = [
        _p(
            "Every gauged basin was treated as ungauged in turn: each method was refit without "
            "it (and without donors sharing much of its area), its flow simulated and scored "
            "against its observations over the evaluation period. 'calibrated' uses the "
            "basin's own parameters (the upper bound); 'median' the regional median parameters "
            "(the benchmark every method should beat)."
        )
    ]
    summary = _summary_with_coverage(result)
    for model in result.runs:
        rows = summary[summary["model"] == model].drop(columns=["model"])
        chosen = (rows["method"] == result.chosen_method) & (model == result.chosen_model)
        if len(result.runs) > 1:
            parts.append(_h3(f"Model {model}"))
        parts.append(
            _table(rows, caption="Highlighted: the method used for estimates.", chosen=chosen)
        )
        parts += _donor_counts(result.runs[model].donor_counts, model)
        excluded = result.runs[model].loo.excluded
        if excluded:
            parts.append(
                _p(
                    f"{len(excluded)} gauged basins had donors left out of their folds for "
                    "sharing area with them (nested or overlapping basins).",
                    css="muted",
                )
            )
    return parts


def _donor_counts(table: pd.DataFrame | None, model: str) -> list[str]:
    """One line naming the donor counts chosen in leave-one-out, and the table per count."""
    if table is None:
        return []
    chosen = table[table["chosen"]]
    picks = "; ".join(
        f"{row.method} {row.n_donors} (median NSE {row.median_nse:.3f}, "
        f"{row.median_nse_choice_held_out:.3f} with each basin's count chosen without its score)"
        for row in chosen.itertuples()
    )
    candidates = ", ".join(str(n) for n in sorted(table["n_donors"].unique()))
    line = _p(
        f"Donors per target chosen in leave-one-out from {candidates}: {picks}. Choosing the "
        "count on the same folds makes the medians above slightly optimistic.",
        css="muted",
    )
    return [line, _details(f"Median skill per number of donors ({model})", _table(table))]


def _summary_with_coverage(result: RunResult) -> pd.DataFrame:
    summary = result.summary
    coverage = getattr(result.prediction, "coverage", None)
    if coverage is None or not len(coverage):
        return summary
    extra = coverage[["model", "method", "coverage", "level"]].rename(
        columns={"level": "nominal_level"}
    )
    return summary.merge(extra, on=["model", "method"], how="left")


def _regression(result: RunResult) -> list[str]:
    parts = [
        _p(
            "Ordinary least squares of each (transformed) parameter on standardised attributes, "
            "fit on every gauged basin, attributes chosen by forward selection on the "
            "leave-one-out prediction error (PRESS)."
        )
    ]
    for model, run in result.runs.items():
        regression = run.regression
        parts.append(_h3(f"Model {model}"))
        fit = pd.DataFrame(
            {
                "transform": pd.Series(regression.transforms_),
                "terms": pd.Series(
                    {p: ", ".join(t) or "intercept only" for p, t in regression.selected_.items()}
                ),
                "R2": regression.r2_,
                "adjusted R2": regression.adj_r2_,
                "RSE (transformed units)": regression.rse_,
                "basins": regression.n_train_,
                "residual dof": regression.dof_resid_,
            }
        )
        fit.index.name = "parameter"
        parts.append(_table(fit, index=True))
        coefficients = regression.coefficients_.drop(columns=["vif_warning"], errors="ignore")
        parts.append(
            _table(
                coefficients,
                caption="Coefficients: estimate and std_error per standard deviation of the "
                "attribute; *_raw per attribute unit; p two-sided.",
            )
        )
        parts.append(_p(_vif_sentence(regression.coefficients_)))
        if regression.dropped_:
            parts.append(
                _p("Constant attributes left out: " + ", ".join(map(str, regression.dropped_)))
            )
    return parts


def _vif_sentence(coefficients: pd.DataFrame) -> str:
    high = coefficients[coefficients["vif_warning"].astype(bool)]
    if high.empty:
        return "Collinearity: no variance inflation factor above 10."
    terms = ", ".join(
        f"{row.term} ({row.parameter}, VIF {_fmt(row.vif)})" for row in high.itertuples()
    )
    return (
        f"Collinearity warning: VIF above 10 for {terms}; these coefficients are unstable, "
        "although predictions inside the attribute range may still be sound."
    )


def _ungauged(result: RunResult) -> list[str]:
    prediction = result.prediction
    if prediction is None:
        why = (
            "the region has no ungauged basins"
            if not result.region.ungauged
            else "prediction did not run for this result"
        )
        return [_p(f"No estimates at ungauged basins: {why}.")]
    unit = result.settings.report.flow_unit
    skill = _median_nse(result, prediction.model, prediction.method)
    parts = [
        _p(
            f"Estimates from the {prediction.model} model with {prediction.method} transfer "
            f"(median leave-one-out NSE {_fmt(skill)}), flows in {unit}. Parameters carry their "
            f"interval (low-high); daily flows carry {prediction.level:.0%} bounds built from "
            f"the leave-one-out errors (split-conformal prediction){_coverage_clause(prediction)}"
            ". A basin whose attributes lie outside what the gauged basins cover is flagged "
            "'applicable: no' with the reason."
        ),
        _h3("Estimates at the sites"),
        _table(
            _estimate_table(result, unit),
            caption=f"Bounds: the mean over the period of the daily lower and upper "
            f"{prediction.level:.0%} bounds (wider than an interval of the mean flow itself).",
            flag_column="applicable",
            labels={
                "mean_flow": ("Mean flow", unit),
                "mean_flow_bounds": (f"Bounds (mean of daily {prediction.level:.0%})", unit),
            },
            anchor="site-estimates",
        ),
        _h3("Coverage of the bounds in leave-one-out"),
        _coverage_table(prediction),
        _h3(f"Flow statistics ({unit})"),
        _table(_statistics_table(result, unit), labels=_flow_labels(unit)),
        _h3("Parameters with their intervals"),
        _table(_parameter_table(result), labels=_model_labels(prediction.model)),
    ]
    return parts + _ungauged_details(result, unit)


def _ungauged_details(result: RunResult, unit: str) -> list[str]:
    prediction = result.prediction
    table = prediction.table
    parts = []
    months = [c for c in MONTH_COLUMNS if c in table.columns]
    if months:
        regime = _in_unit(result, table[months].astype(float), unit)
        regime.columns = [calendar.month_abbr[int(c[6:8])] for c in months]
        parts.append(_details(f"Monthly mean flow ({unit})", _table(_with_names(result, regime))))
    measures = [c for c in (*result.attributes, *APPLICABILITY_COLUMNS) if c in table.columns]
    if measures:
        parts.append(
            _details(
                "Attributes and applicability measures",
                _table(_with_names(result, table[[*measures, "applicable", "reason"]])),
            )
        )
    per_method = _per_method_parameters(result)
    if per_method is not None:
        labels = _per_method_labels(result)
        parts.append(_details("Parameters from every method", _table(per_method, labels=labels)))
    error_model = getattr(prediction, "error_model", None)
    if error_model is not None and len(error_model):
        parts.append(_details("Error model of the bounds", _table(error_model)))
    if prediction.notes:
        parts += [_h3("Notes"), _list(prediction.notes)]
    return parts


def _coverage_clause(prediction) -> str:
    coverage = prediction.coverage
    if coverage is None or not len(coverage):
        return ""
    rows = coverage[
        (coverage["model"] == prediction.model) & (coverage["method"] == prediction.method)
    ]
    if rows.empty:
        return ""
    return (
        f", which held {_fmt(float(rows['coverage'].iloc[0]))} of the observed days in "
        f"leave-one-out against the nominal {_fmt(float(prediction.level))}"
    )


def _coverage_table(prediction) -> str:
    coverage = prediction.coverage
    if coverage is None or not len(coverage):
        return _p("No coverage was measured.")
    frame = coverage.copy()
    frame["coverage_minus_level"] = frame["coverage"] - frame["level"]
    chosen = (frame["method"] == prediction.method) & (frame["model"] == prediction.model)
    return _table(
        frame,
        caption="Share of observed days inside the bounds when each gauged basin was left out, "
        "beside the nominal level.",
        chosen=chosen,
    )


def _estimate_table(result: RunResult, unit: str) -> pd.DataFrame:
    """Per ungauged basin: mean flow, its bounds and unit, the applicability flag and reason."""
    prediction = result.prediction
    table = prediction.table
    mean_mm = table["mean_flow_mm"].astype(float)
    low_mm, high_mm = _mean_daily_bounds(prediction, table.index)
    estimate = _in_unit(result, mean_mm, unit)
    low, high = _in_unit(result, low_mm, unit), _in_unit(result, high_mm, unit)
    out = pd.DataFrame(index=table.index)
    out["mean_flow"] = estimate
    out["mean_flow_bounds"] = [f"{_fmt(a)}{DASH}{_fmt(b)}" for a, b in zip(low, high, strict=True)]
    out["flow_unit"] = unit
    out["applicable"] = table["applicable"].astype(bool)
    out["reason"] = table["reason"].fillna("").astype(str)
    return _with_names(result, out)


def _mean_daily_bounds(prediction, basins: pd.Index) -> tuple[pd.Series, pd.Series]:
    """Mean over the period of each basin's daily lower and upper bound, mm/day (the long
    table of daily flows taken part by part)."""
    columns = ["flow_low_mm", "flow_high_mm"]
    means = pd.concat(
        [part.groupby("basin_id")[columns].mean() for part in prediction.daily.parts()]
    )
    means = means.reindex(basins)
    return means["flow_low_mm"], means["flow_high_mm"]


def _in_unit(result: RunResult, flow_mm, unit: str):
    """mm/day values indexed by basin (Series, or a DataFrame of basin rows) in ``unit``."""
    area = result.region.attributes["area_km2"].astype(float)
    return flow_in_unit(flow_mm, area, unit)


def _statistics_table(result: RunResult, unit: str) -> pd.DataFrame:
    """The headline flow statistics (mean, Q5, Q50, Q95, 7-day minimum) in ``unit``."""
    table = result.prediction.table
    columns = [c for c in STATISTICS_MM if c in table.columns]
    values = _in_unit(result, table[columns].astype(float), unit)
    values.columns = [c.removesuffix("_mm") for c in columns]
    return _with_names(result, values)


def _flow_labels(unit: str) -> dict[str, tuple[str, str]]:
    names = [c.removesuffix("_mm") for c in STATISTICS_MM]
    return {name: (column_label(name)[0], unit) for name in names}


def _model_labels(model: str) -> dict[str, tuple[str, str]]:
    return parameter_labels(parameter_table(model, snow=True))


def _parameter_table(result: RunResult) -> pd.DataFrame:
    """The chosen parameters "value (low-high)" per ungauged basin, with the method."""
    prediction = result.prediction
    table = prediction.table
    names = [
        p.name for p in parameter_table(prediction.model, snow=True) if p.name in table.columns
    ]
    out = pd.DataFrame(index=table.index)
    if "method" in table.columns:
        out["method"] = table["method"]
    for name in names:
        out[name] = _interval_column(table, name)
    return _with_names(result, out)


def _interval_column(table: pd.DataFrame, column: str) -> list[str]:
    """Cells "value (low-high)" from ``column`` and its ``_low`` / ``_high`` columns."""
    missing = pd.Series(np.nan, index=table.index)
    low = table.get(f"{column}_low", missing)
    high = table.get(f"{column}_high", missing)
    return [_with_interval(*values) for values in zip(table[column], low, high, strict=True)]


def _with_interval(value: float, low: float, high: float) -> str:
    if not (np.isfinite(low) and np.isfinite(high)):
        return _fmt(value)
    return f"{_fmt(value)} ({_fmt(low)}{DASH}{_fmt(high)})"


def _per_method_parameters(result: RunResult) -> pd.DataFrame | None:
    prediction = result.prediction
    table = prediction.table
    names = list(result.runs[prediction.model].context.transforms)
    methods = [m for m in result.runs[prediction.model].loo.methods if m != CALIBRATED]
    out = pd.DataFrame(index=table.index)
    for method in methods:
        for name in names:
            column = f"{name}_{method}"
            if column in table.columns:
                out[column] = _interval_column(table, column)
    return _with_names(result, out) if len(out.columns) else None


def _per_method_labels(result: RunResult) -> dict[str, tuple[str, str]]:
    """Labels of the ``{parameter}_{method}`` columns: the parameter's label and the method."""
    model = result.prediction.model
    labels = _model_labels(model)
    methods = result.runs[model].loo.methods
    return {
        f"{name}_{method}": (f"{label} ({method})", unit)
        for name, (label, unit) in labels.items()
        for method in methods
    }


def _statistics(result: RunResult) -> list[str]:
    stats = result.statistics
    if stats is None:
        return [_p("No flow statistics were estimated for this run.")]
    unit = result.settings.report.flow_unit
    parts = [
        _p(
            "Each statistic is estimated by two routes: from the transferred daily flow "
            "(model) and by transferring the statistic itself (direct: regression of its log10 "
            "on attributes, or the donor-weighted mean of similar or nearby gauged basins). "
            "Both were validated in leave-one-out on the gauged basins; per statistic the "
            "route with the smaller median absolute log10 error is used"
            f" ([prediction] statistics_route = {stats.route_choice}). The bounds are the "
            f"{stats.level:.0%} split-conformal bounds from that route's leave-one-out errors; "
            "'coverage' is the share of gauged basins whose observed statistic fell inside "
            "bounds built without them. All statistics are taken over the evaluation period. "
            "Definitions: docs/statistics.md."
        ),
        _h3("Skill of each statistic in leave-one-out"),
        _table(statistics_report.skill_table(result), labels=statistics_report.LABELS),
    ]
    if len(stats.ungauged):
        table = statistics_report.estimate_table(result, unit)
        full = statistics_report.estimate_table(result, unit, names=flowstats.STATISTIC_NAMES)
        parts += [
            _h3(f"Estimates at ungauged basins (flows in {unit})"),
            _table(
                _with_names(result, table.set_index("basin_id")),
                index=True,
                flag_column="applicable",
                labels=statistics_report.LABELS,
                anchor="statistics-estimates",
            ),
            _details(
                "Every statistic as tab-separated text (select, copy, paste into a spreadsheet)",
                f"<pre>{_esc(statistics_report.copyable_text(full))}</pre>",
            ),
        ]
    if stats.notes:
        parts += [_h3("Notes"), _list(stats.notes)]
    return parts


def _screening(result: RunResult) -> list[str]:
    screening = result.screening
    if screening is None:
        why = (
            "the region has no ungauged candidate basins"
            if not result.region.ungauged
            else "screening did not run for this result (add a [screening] section to the "
            "config or run 'regional screen')"
        )
        return [_p(f"No candidate gauge sites were ranked: {why}.")]
    table = screening.table.sort_values("rank")
    main = [c for c in SCREENING_COLUMNS if c in table.columns]
    parts = [
        _p(
            "Candidate sites ranked by how much a gauge there would reduce the average "
            "prediction variance over the region's ungauged basins, combined with the spread "
            "of the donors at the site. The reason column says why in plain words."
        ),
        _table(_with_names(result, table[main]), flag_column="applicable"),
    ]
    others = [c for c in table.columns if c not in main]
    if others:
        parts.append(_details("Every screening column", _table(_with_names(result, table))))
    if screening.notes:
        parts += [_h3("Notes"), _list(screening.notes)]
    return parts


def _warnings(result: RunResult) -> list[str]:
    stages = [("Prediction", result.prediction), ("Screening", result.screening)]
    notes = [(label, tuple(stage.notes)) for label, stage in stages if stage is not None]
    known = {message for _, messages in notes for message in messages}
    groups = [("Run", tuple(m for m in result.warnings if m not in known)), *notes]
    if not any(messages for _, messages in groups):
        return [_p("No warnings were raised.")]
    parts = []
    for label, messages in groups:
        if messages:
            parts += [_h3(f"{label} ({len(messages)})"), _list(messages)]
    return parts


def _methods(result: RunResult) -> list[str]:
    runs = list(result.runs.values())
    methods = dict.fromkeys(m for run in runs for m in run.loo.methods)
    text = methods_text(
        result.runs,
        methods,
        snow=_snow_on(result),
        objective=result.settings.model.objective,
        screening=result.screening is not None,
    )
    parts = [
        f"<p><strong>{_esc(head)}.</strong> {_esc(body)}</p>" for head, body in text.paragraphs
    ]
    return [*parts, _h3("References"), _list(text.references)]


def _stages_written(result: RunResult) -> list[str]:
    """When each stage wrote the results folder (UTC) and the prediction level in force."""
    rows = [(f"{stage} written (UTC)", when) for stage, when in result.stages.items()]
    if result.prediction is not None:
        rows.append(("prediction level in force", f"{result.prediction.level:.0%}"))
    return [_h3("Stages written"), _key_values(rows)] if rows else []


def _run_information(result: RunResult) -> list[str]:
    timings = pd.DataFrame(
        {
            "stage": list(result.timings) + ["total"],
            "seconds": [*result.timings.values(), sum(result.timings.values())],
        }
    )
    versions = list(software_versions().items())
    return [
        _p(f"Settings: {result.settings.path}"),
        *_stages_written(result),
        _h3("Timings"),
        _table(timings),
        _h3("Software"),
        _key_values(versions),
    ]
