"""Region settings: ``region.toml`` -> a frozen :class:`Settings` object.

A region is a folder holding ``region.toml``. Paths in the file are relative to the file and are
resolved to absolute paths here. Every section is described by one table of its keys
(:data:`SECTIONS`): the parser, the default, and whether the key is required. Unknown sections or
keys are an :class:`~regional.errors.InputError` that suggests the nearest known key; so are
missing required keys and values of the wrong type or outside the allowed set.

The full key reference with an example is in ``docs/config.md``.
"""

from __future__ import annotations

import datetime as dt
import difflib
import math
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from regional import transfer
from regional.errors import InputError
from regional.models import model_names
from regional.models.snow import MELT_THRESHOLD
from regional.models.snow import PARAMETERS as SNOW_PARAMETERS

CONFIG_NAME = "region.toml"

#: Storage models a region may name (``[model] name``): the models' registry.
MODEL_NAMES = model_names()
#: Calibration objectives (``[model] objective``).
OBJECTIVES = ("kge", "nse", "log_nse", "nse_blend")
#: Transfer methods (``[transfer] methods``): the methods' registry; ``median`` is the naive
#: benchmark.
TRANSFER_METHODS = tuple(transfer.TRANSFER_METHODS)
#: How flows from several donors are combined (``[transfer] combine``).
COMBINE_MODES = transfer.COMBINE_OPTIONS
STATISTICS_ROUTES = ("auto", "model", "direct")
"""``[prediction] statistics_route``: pick per statistic, or force the model or direct route."""
#: Donor counts tried in leave-one-out with ``[transfer] donors = "auto"``.
AUTO_DONOR_COUNTS = tuple(range(1, 11))
#: Calibration searches for models with several parameters (``[model] search``).
SEARCHES = ("fast", "thorough")
#: ``[model] snow`` values.
SNOW_MODES = ("auto", "true", "false")
#: Units of flow in the report (``[report] flow_unit``); tables in files keep both.
REPORT_FLOW_UNITS = ("m3/s", "mm/day")


# --------------------------------------------------------------------------------------------
# Settings objects
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RegionSection:
    """``[region]``: free text describing the region."""

    name: str


@dataclass(frozen=True)
class BasinsSettings:
    """``[basins]``: the basins layer (polygons, or points carrying their area)."""

    path: Path
    layer: str | None
    id: str
    area: str | None


@dataclass(frozen=True)
class OverlaySettings:
    """One ``[[overlays]]`` table: polygons whose numeric ``fields`` are area-averaged."""

    path: Path
    layer: str | None
    fields: tuple[str, ...]


@dataclass(frozen=True)
class RasterSettings:
    """``[raster]``: a DEM (elevation in m) for mean elevation and slope per basin."""

    path: Path


@dataclass(frozen=True)
class SeriesSettings:
    """``[series]``: the long table of daily series and its column names.

    Exactly one of ``flow`` (mm/day) and ``flow_m3s`` (m3/s) is set.
    """

    path: Path
    layer: str | None
    id: str
    date: str
    precip: str
    pet: str
    temp: str | None
    flow: str | None
    flow_m3s: str | None
    max_precip_mm_per_day: float = 2000.0

    @property
    def flow_column(self) -> str:
        """Name of the observed-flow column, whichever unit it is in."""
        return self.flow if self.flow is not None else self.flow_m3s  # type: ignore[return-value]

    @property
    def flow_unit(self) -> str:
        """``"mm/day"`` or ``"m3/s"``."""
        return "mm/day" if self.flow is not None else "m3/s"


@dataclass(frozen=True)
class ModelSettings:
    """``[model]``: storage model(s), objective, warm-up and periods.

    ``calibration`` is ``None`` when the whole common record is used; ``validation`` is ``None``
    when no split-sample test is asked for. ``parameters`` names the user's table of calibrated
    parameters (``basin_id`` plus the model's parameter columns); ``None``: every gauged basin
    is calibrated.
    """

    names: tuple[str, ...]
    snow: str
    objective: str
    warmup_days: int
    initial_storage_mm: float | None
    calibration: tuple[pd.Timestamp, pd.Timestamp] | None
    validation: tuple[pd.Timestamp, pd.Timestamp] | None
    snow_threshold_c: float | None
    melt_threshold_c: float | None
    melt_factor_mm_per_degc_day: float | None
    search: str = "fast"
    parameters: Path | None = None

    @property
    def name(self) -> str:
        """The first (main) model name."""
        return self.names[0]

    def use_snow(self, *, has_temperature: bool) -> bool:
        """Whether to put the degree-day snow store in front of the model.

        ``"auto"`` turns it on exactly when a temperature column is given.
        """
        if self.snow == "auto":
            return has_temperature
        return self.snow == "true"


@dataclass(frozen=True)
class TransferSettings:
    """``[transfer]``: transfer methods and their settings.

    ``attributes`` is ``None`` for "every numeric attribute". ``donors`` is one number of donors
    per target, or a sorted tuple of candidate numbers (``"auto"``: 1 to 10) from which
    leave-one-out picks the best per donor method.
    """

    attributes: tuple[str, ...] | None
    methods: tuple[str, ...]
    donors: int | tuple[int, ...]
    power: float
    combine: str
    exclude_overlap: float


@dataclass(frozen=True)
class PredictionSettings:
    """``[prediction]``: interval level and the method/model used for the final estimates."""

    level: float
    method: str | None
    model: str | None
    held_out_repeats: int = 10
    statistics_route: str = "auto"


@dataclass(frozen=True)
class ScreeningSettings:
    """``[screening]``: candidate gauge sites (``None``: every ungauged basin)."""

    candidates: tuple[str, ...] | None


@dataclass(frozen=True)
class ComputeSettings:
    """``[compute]``: in-process by default; a Dask scheduler address to spread the work."""

    scheduler: str | None
    workers: int | None
    connect_timeout_s: float = 10.0
    chunk_basins: int | None = None


@dataclass(frozen=True)
class ReportSettings:
    """``[report]``: how the report and its figures show flows at the sites.

    Attributes
    ----------
    flow_unit : {"m3/s", "mm/day"}
        Unit of flows in the report's tables and figures (CSV files keep both units).
    window : (Timestamp, Timestamp) or None
        Dates of the hydrograph window at ungauged basins; None: the last 365 days.
    sites_per_figure : int
        Most ungauged basins per hydrograph figure; more basins go to further figures.
    """

    flow_unit: str
    window: tuple[pd.Timestamp, pd.Timestamp] | None
    sites_per_figure: int


@dataclass(frozen=True)
class OutputSettings:
    """``[output]``: the results folder (absolute)."""

    folder: Path


@dataclass(frozen=True)
class Settings:
    """Everything ``region.toml`` says, validated, with absolute paths.

    Attributes
    ----------
    path : Path
        The ``region.toml`` file read.
    folder : Path
        Its folder (the region folder).
    """

    path: Path
    folder: Path
    region: RegionSection
    basins: BasinsSettings
    overlays: tuple[OverlaySettings, ...]
    raster: RasterSettings | None
    series: SeriesSettings
    model: ModelSettings
    transfer: TransferSettings
    prediction: PredictionSettings
    screening: ScreeningSettings
    compute: ComputeSettings
    output: OutputSettings
    report: ReportSettings

    def input_paths(self) -> tuple[Path, ...]:
        """Every file the region names: this TOML, basins, series, overlays, raster, the user's
        parameter table (sorted)."""
        paths = [self.path, self.basins.path, self.series.path]
        if self.model.parameters is not None:
            paths.append(self.model.parameters)
        paths += [overlay.path for overlay in self.overlays]
        if self.raster is not None:
            paths.append(self.raster.path)
        return tuple(sorted(set(paths)))


# --------------------------------------------------------------------------------------------
# Value parsers: each takes (value, context) and returns the clean value or raises InputError
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Context:
    """Where a value sits, for messages, and the folder relative paths start from."""

    file: Path
    section: str
    key: str

    def where(self) -> str:
        return f"key '{self.key}' in [{self.section}] of {self.file}"

    def fail(self, value: Any, rule: str, fix: str) -> InputError:
        return InputError(f"{self.where()}: {rule}; found {value!r}. Fix: {fix}")


Parser = Callable[[Any, _Context], Any]


def _text(value: Any, ctx: _Context) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ctx.fail(value, "must be a non-empty text", 'write it in quotes, e.g. key = "name"')
    return value


def _path(value: Any, ctx: _Context) -> Path:
    text = _text(value, ctx)
    path = Path(text).expanduser()
    if not path.is_absolute():
        path = ctx.file.parent / path
    return path.resolve()


def _text_list(value: Any, ctx: _Context) -> tuple[str, ...]:
    if isinstance(value, str):
        value = [value]
    ok = isinstance(value, list) and value and all(isinstance(v, str) and v for v in value)
    if not ok:
        raise ctx.fail(value, "must be a non-empty list of texts", 'write e.g. ["a", "b"]')
    if len(set(value)) != len(value):
        raise ctx.fail(value, "must not repeat an entry", "list each entry once")
    return tuple(value)


def _choice(allowed: tuple[str, ...]) -> Parser:
    def parse(value: Any, ctx: _Context) -> str:
        if not isinstance(value, str) or value not in allowed:
            raise ctx.fail(value, f"must be one of {_quoted(allowed)}", _nearest(value, allowed))
        return value

    return parse


def _choice_list(allowed: tuple[str, ...]) -> Parser:
    def parse(value: Any, ctx: _Context) -> tuple[str, ...]:
        items = _text_list(value, ctx)
        for item in items:
            if item not in allowed:
                raise ctx.fail(
                    item, f"each entry must be one of {_quoted(allowed)}", _nearest(item, allowed)
                )
        return items

    return parse


def _snow(value: Any, ctx: _Context) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    return _choice(SNOW_MODES)(value, ctx)


def _integer(minimum: int) -> Parser:
    def parse(value: Any, ctx: _Context) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            raise ctx.fail(
                value, f"must be a whole number >= {minimum}", f"write e.g. {ctx.key} = {minimum}"
            )
        return value

    return parse


def _donors(value: Any, ctx: _Context) -> int | tuple[int, ...]:
    fix = 'write donors = 5, donors = "auto" (1 to 10) or a list such as donors = [1, 3, 5, 10]'
    if value == "auto":
        return AUTO_DONOR_COUNTS
    if isinstance(value, list):
        whole = [isinstance(v, int) and not isinstance(v, bool) and v >= 1 for v in value]
        if not value or not all(whole):
            raise ctx.fail(value, "a list of donor counts must hold whole numbers >= 1", fix)
        if len(set(value)) != len(value):
            raise ctx.fail(value, "must not repeat a donor count", "list each count once")
        return tuple(sorted(value))
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise ctx.fail(value, "must be a whole number >= 1", fix)
    return value


def _number(lower: float = -math.inf, upper: float = math.inf, *, open_: bool = False) -> Parser:
    def parse(value: Any, ctx: _Context) -> float:
        number = (
            float(value)
            if isinstance(value, int | float) and not isinstance(value, bool)
            else None
        )
        if number is None or not math.isfinite(number):
            raise ctx.fail(value, "must be a number", f"write e.g. {ctx.key} = 1.0")
        inside = lower < number < upper if open_ else lower <= number <= upper
        if not inside:
            brackets = ("(", ")") if open_ else ("[", "]")
            span = f"{brackets[0]}{lower:g}, {upper:g}{brackets[1]}"
            raise ctx.fail(value, f"must lie in {span}", f"choose a value in {span}")
        return number

    return parse


def _date(value: Any, ctx: _Context) -> pd.Timestamp:
    if isinstance(value, dt.datetime | dt.date):
        return pd.Timestamp(value).normalize()
    if isinstance(value, str):
        try:
            stamp = pd.Timestamp(dt.date.fromisoformat(value.strip()))
        except ValueError:
            stamp = None
        if stamp is not None:
            return stamp
    raise ctx.fail(value, "dates must be ISO calendar dates", 'write e.g. "2001-01-01"')


def _period(value: Any, ctx: _Context) -> tuple[pd.Timestamp, pd.Timestamp]:
    if not isinstance(value, list) or len(value) != 2:
        raise ctx.fail(
            value, "must be a [start, end] pair", 'write e.g. ["2001-01-01", "2010-12-31"]'
        )
    start, end = (_date(v, ctx) for v in value)
    if end < start:
        raise ctx.fail(value, "the end must not come before the start", "swap the two dates")
    return start, end


def _scheduler(value: Any, ctx: _Context) -> str:
    text = _text(value, ctx)
    if any(ch.isspace() for ch in text):
        raise ctx.fail(value, "must be an address without spaces", 'write e.g. "tcp://host:8786"')
    return text


def _quoted(items: tuple[str, ...]) -> str:
    return ", ".join(f"'{item}'" for item in items)


def _suggest(value: Any, known: tuple[str, ...]) -> str:
    match = difflib.get_close_matches(str(value), known, n=1, cutoff=0.5)
    return f"did you mean '{match[0]}'? " if match else ""


def _nearest(value: Any, allowed: tuple[str, ...]) -> str:
    match = difflib.get_close_matches(str(value), allowed, n=1, cutoff=0.5)
    if match:
        return f"did you mean '{match[0]}'?"
    return f"use one of {_quoted(allowed)}"


# --------------------------------------------------------------------------------------------
# The key table: section -> key -> (parser, default). REQUIRED marks keys without a default;
# defaults are written as in TOML and go through the same parser as the user's values.
# --------------------------------------------------------------------------------------------

REQUIRED = object()


@dataclass(frozen=True)
class _Key:
    parse: Parser
    default: Any = None


SECTIONS: dict[str, dict[str, _Key]] = {
    "region": {"name": _Key(_text, None)},
    "basins": {
        "path": _Key(_path, REQUIRED),
        "layer": _Key(_text),
        "id": _Key(_text, REQUIRED),
        "area": _Key(_text),
    },
    "overlays": {
        "path": _Key(_path, REQUIRED),
        "layer": _Key(_text),
        "fields": _Key(_text_list, REQUIRED),
    },
    "raster": {"path": _Key(_path, REQUIRED)},
    "series": {
        "path": _Key(_path, REQUIRED),
        "layer": _Key(_text),
        "id": _Key(_text, REQUIRED),
        "date": _Key(_text, REQUIRED),
        "precip": _Key(_text, REQUIRED),
        "pet": _Key(_text, REQUIRED),
        "temp": _Key(_text),
        "flow": _Key(_text),
        "flow_m3s": _Key(_text),
        "max_precip_mm_per_day": _Key(_number(0.0, open_=True), 2000.0),
    },
    "model": {
        "name": _Key(_choice_list(MODEL_NAMES), "linear"),
        "snow": _Key(_snow, "auto"),
        "objective": _Key(_choice(OBJECTIVES), "nse"),
        "search": _Key(_choice(SEARCHES), "fast"),
        "warmup_days": _Key(_integer(0), 365),
        "initial_storage_mm": _Key(_number(0.0)),
        "calibration": _Key(_period),
        "validation": _Key(_period),
        # held snow values lie within the snow store's own bounds (regional.models.snow)
        **{p.name: _Key(_number(p.lower, p.upper)) for p in (*SNOW_PARAMETERS, MELT_THRESHOLD)},
        "parameters": _Key(_path),
    },
    "transfer": {
        "attributes": _Key(_text_list),
        "methods": _Key(_choice_list(TRANSFER_METHODS), ["regression", "similarity", "proximity"]),
        "donors": _Key(_donors, "auto"),
        "power": _Key(_number(0.0, 10.0), 1.0),
        "combine": _Key(_choice(COMBINE_MODES), "output"),
        "exclude_overlap": _Key(_number(0.0, 1.0), 0.5),
    },
    "prediction": {
        "level": _Key(_number(0.0, 1.0, open_=True), 0.9),
        "method": _Key(_choice(TRANSFER_METHODS)),
        "model": _Key(_choice(MODEL_NAMES)),
        "held_out_repeats": _Key(_integer(0), 10),
        "statistics_route": _Key(_choice(STATISTICS_ROUTES), "auto"),
    },
    "screening": {"candidates": _Key(_text_list)},
    "compute": {
        "scheduler": _Key(_scheduler),
        "workers": _Key(_integer(1)),
        "connect_timeout_s": _Key(_number(0.0, 600.0, open_=True), 10.0),
        "chunk_basins": _Key(_integer(1)),
    },
    "output": {"folder": _Key(_path, "results")},
    "report": {
        "flow_unit": _Key(_choice(REPORT_FLOW_UNITS), "m3/s"),
        "window": _Key(_period),
        "sites_per_figure": _Key(_integer(1), 6),
    },
}

#: Sections that must appear in every ``region.toml``.
REQUIRED_SECTIONS = ("basins", "series")


# --------------------------------------------------------------------------------------------
# Public entry point
# --------------------------------------------------------------------------------------------


def load_settings(path: str | Path) -> Settings:
    """Read and validate a region's ``region.toml``.

    Parameters
    ----------
    path : str or Path
        The region folder (holding ``region.toml``) or the TOML file itself.

    Returns
    -------
    Settings
        Frozen settings with every path absolute (relative paths start at the TOML file's folder).

    Raises
    ------
    InputError
        Missing file, TOML syntax error, unknown section or key (with the nearest known one),
        missing required key, or a value of the wrong type or outside the allowed values.
    """
    file = _locate(Path(path))
    document = _parse_toml(file)
    _reject_unknown_sections(document, file)
    sections = {name: _section(document, name, file) for name in SECTIONS if name != "overlays"}
    overlays = _overlays(document, file)
    return _assemble(file, sections, overlays)


# --------------------------------------------------------------------------------------------
# Steps
# --------------------------------------------------------------------------------------------


def _locate(path: Path) -> Path:
    file = path / CONFIG_NAME if path.is_dir() else path
    if not file.is_file():
        where = f"folder {path}" if path.is_dir() else f"{path}"
        raise InputError(
            f"region settings not found: {file} does not exist (looked in {where}). "
            f"Fix: give the region folder that holds {CONFIG_NAME}, or the path of the TOML file."
        )
    return file.resolve()


def _parse_toml(file: Path) -> dict[str, Any]:
    try:
        with open(file, "rb") as handle:
            return tomllib.load(handle)
    except tomllib.TOMLDecodeError as error:
        raise InputError(
            f"{file} is not valid TOML: {error}. Fix: correct the syntax at that line "
            '(texts in quotes, lists in [ ], one "key = value" per line).'
        ) from None
    except UnicodeDecodeError as error:
        raise InputError(f"{file} is not UTF-8 text ({error}). Fix: save it as UTF-8.") from None


def _reject_unknown_sections(document: Mapping[str, Any], file: Path) -> None:
    for name, value in document.items():
        if name not in SECTIONS:
            raise InputError(
                f"unknown section [{name}] in {file}; {_suggest(name, tuple(SECTIONS))}"
                f"Known sections: {_quoted(tuple(SECTIONS))}."
            )
        if name == "overlays":
            continue
        if not isinstance(value, dict):
            raise InputError(
                f"'{name}' in {file} must be a section [{name}] with keys, found {value!r}. "
                f"Fix: write [{name}] on its own line and the keys below it."
            )
    for name in REQUIRED_SECTIONS:
        if name not in document:
            keys = [k for k, spec in SECTIONS[name].items() if spec.default is REQUIRED]
            raise InputError(
                f"missing section [{name}] in {file}; it needs the keys {_quoted(tuple(keys))}. "
                "Fix: add the section (see docs/config.md for an example)."
            )


def _section(
    document: Mapping[str, Any], name: str, file: Path, table: Mapping[str, Any] | None = None
) -> dict[str, Any] | None:
    """Validate one section's keys against :data:`SECTIONS`; ``None`` when it is absent."""
    if table is None:
        if name not in document:
            return _defaults_only(name, file)
        table = document[name]
    spec = SECTIONS[name]
    for key in table:
        if key not in spec:
            raise InputError(
                f"unknown key '{key}' in [{name}] of {file}; {_suggest(key, tuple(spec))}"
                f"Known keys in [{name}]: {_quoted(tuple(spec))}."
            )
    values: dict[str, Any] = {}
    for key, entry in spec.items():
        if key in table:
            values[key] = entry.parse(table[key], _Context(file, name, key))
        elif entry.default is REQUIRED:
            raise InputError(
                f"missing required key '{key}' in [{name}] of {file}. "
                f"Fix: add a line {key} = ... under [{name}] (see docs/config.md)."
            )
        elif entry.default is not None:
            values[key] = entry.parse(entry.default, _Context(file, name, key))
        else:
            values[key] = None
    return values


def _defaults_only(name: str, file: Path) -> dict[str, Any] | None:
    """An absent optional section: defaults, or ``None`` for sections that are all-or-nothing."""
    if name == "raster":
        return None
    return _section({}, name, file, table={})


def _overlays(document: Mapping[str, Any], file: Path) -> tuple[OverlaySettings, ...]:
    tables = document.get("overlays", [])
    if isinstance(tables, dict):
        raise InputError(
            f"[overlays] in {file} must be written [[overlays]] (double brackets), one table per "
            "overlay layer. Fix: replace [overlays] by [[overlays]]."
        )
    overlays = []
    for table in tables:
        values = _section(document, "overlays", file, table=table)
        overlays.append(OverlaySettings(**values))
    return tuple(overlays)


def _assemble(
    file: Path,
    sections: Mapping[str, dict[str, Any] | None],
    overlays: tuple[OverlaySettings, ...],
) -> Settings:
    series = _series(sections["series"], file)
    model = _model(sections["model"], file)
    if model.snow == "true" and series.temp is None:
        raise InputError(
            f"key 'snow' in [model] of {file} is true, but [series] names no 'temp' column; the "
            'snow store needs daily temperature. Fix: add temp = "..." to [series], or set '
            'snow = "auto" or false.'
        )
    prediction = _prediction(sections["prediction"], sections["transfer"], model, file)
    raster = sections["raster"]
    region = dict(sections["region"])
    if region["name"] is None:
        region["name"] = file.parent.name
    return Settings(
        path=file,
        folder=file.parent,
        region=RegionSection(**region),
        basins=BasinsSettings(**sections["basins"]),
        overlays=overlays,
        raster=RasterSettings(**raster) if raster is not None else None,
        series=series,
        model=model,
        transfer=TransferSettings(**sections["transfer"]),
        prediction=prediction,
        screening=ScreeningSettings(**sections["screening"]),
        compute=ComputeSettings(**sections["compute"]),
        output=OutputSettings(**sections["output"]),
        report=ReportSettings(**sections["report"]),
    )


def _series(values: Mapping[str, Any], file: Path) -> SeriesSettings:
    flows = [key for key in ("flow", "flow_m3s") if values[key] is not None]
    if len(flows) != 1:
        found = "both" if flows else "neither"
        raise InputError(
            f"[series] of {file} must name exactly one observed-flow column, 'flow' (mm/day) or "
            f"'flow_m3s' (m3/s); found {found}. Fix: keep one of the two keys."
        )
    return SeriesSettings(**values)


def _model(values: Mapping[str, Any], file: Path) -> ModelSettings:
    values = dict(values)
    values["names"] = values.pop("name")
    calibration, validation = values["calibration"], values["validation"]
    if validation is not None and calibration is None:
        raise InputError(
            f"[model] of {file} sets 'validation' without 'calibration'. Fix: add calibration = "
            '["start", "end"] so the two periods are split.'
        )
    if (
        validation is not None
        and validation[0] <= calibration[1]
        and calibration[0] <= validation[1]
    ):
        raise InputError(
            f"[model] of {file}: the validation period {_span(validation)} overlaps the "
            f"calibration period {_span(calibration)}; a split-sample test needs separate "
            "periods. Fix: move one so they do not share days."
        )
    return ModelSettings(**values)


def _prediction(
    values: Mapping[str, Any], transfer: Mapping[str, Any], model: ModelSettings, file: Path
) -> PredictionSettings:
    method = values["method"]
    if method is not None and method not in transfer["methods"] and method != "median":
        raise InputError(
            f"key 'method' in [prediction] of {file} is '{method}', which is not among "
            f"[transfer] methods ({_quoted(transfer['methods'])}). Fix: add it to the methods "
            "or choose one of them."
        )
    if values["model"] is not None and values["model"] not in model.names:
        raise InputError(
            f"key 'model' in [prediction] of {file} is '{values['model']}', which is not among "
            f"[model] name ({_quoted(model.names)}). Fix: add it to [model] name or choose one "
            "of them."
        )
    return PredictionSettings(**values)


def _span(period: tuple[pd.Timestamp, pd.Timestamp]) -> str:
    return f"{period[0]:%Y-%m-%d}..{period[1]:%Y-%m-%d}"
