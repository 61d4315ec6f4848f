"""A fitted region as open files and back, and whether a stored one may be reused.

:func:`fitted_files` and :func:`from_files` turn a :class:`~regional.fitted.FittedRegion` into
open files (JSON and Parquet, no pickles of code objects) and back; :func:`stale_reason` says
whether the inputs and settings it was fitted from have changed. :mod:`regional.io` writes and
reads the files. The format is described in ``docs/outputs.md``.
"""

from __future__ import annotations

import json
from functools import partial

import numpy as np
import pandas as pd

from regional.bounds import ConformalErrorModel
from regional.config import Settings
from regional.fitted import FittedRegion, fit_settings, plain
from regional.io import TableParts
from regional.kept import day_parts
from regional.transfer.step import TransferOptions

FORMAT = 1
"""Version of the stored layout (grows when it changes)."""
FOLDER = "fitted"
"""Sub-folder of a results folder holding the fitted region."""
META = f"{FOLDER}/region.json"
TRAINING = f"{FOLDER}/training.parquet"
LOO_OBSERVED = f"{FOLDER}/loo_observed.parquet"
LOO_SIMULATED = f"{FOLDER}/loo_simulated.parquet"
LOO_NSE = f"{FOLDER}/loo_nse.parquet"
COVERAGE = f"{FOLDER}/coverage.parquet"
HELD_OUT = f"{FOLDER}/held_out.parquet"


def fitted_files(fitted: FittedRegion) -> tuple[bytes, dict[str, pd.DataFrame | TableParts]]:
    """The fitted region as the JSON text of ``fitted/region.json`` and Parquet tables.

    Returns
    -------
    (meta, tables)
        UTF-8 JSON bytes (floats written exactly: Python's shortest round-trip repr, with
        ``Infinity`` for an unbounded class) and file name -> DataFrame (written as Parquet,
        index kept); the two leave-one-out flows as :class:`regional.io.TableParts`, written
        a row group per run of days (fetched part by part where they stayed on a cluster's
        workers, :mod:`regional.kept`).
    """
    model = fitted.error_model
    meta = {
        "format": FORMAT,
        "model": fitted.model,
        "method": fitted.method,
        "level": fitted.level,
        "attributes": list(fitted.attributes),
        "parameters": list(fitted.parameters),
        "options": plain(fitted.options),
        "window": {
            "first_day": f"{fitted.first_day:%Y-%m-%d}",
            "last_day": f"{fitted.last_day:%Y-%m-%d}",
            "warmup_days": fitted.warmup_days,
        },
        "initial_storage_mm": fitted.initial_storage,
        "snow": fitted.snow,
        "fixed_params": fitted.fixed_params,
        "error_model": {
            "level": model.level,
            "offset_fraction": model.offset_fraction,
            "edges": model.edges.tolist(),
            "lower_q": model.lower_q.tolist(),
            "upper_q": model.upper_q.tolist(),
            "n_days": model.n_days.tolist(),
            "n_basins": model.n_basins,
            "class_levels": None if model.class_levels is None else model.levels.tolist(),
        },
        "held_out_attrs": None if fitted.held_out is None else plain(fitted.held_out.attrs),
        "notes": list(fitted.notes),
        "area_crs": fitted.area_crs,
        "inputs": fitted.inputs,
        "settings": fitted.settings,
    }
    tables = {
        TRAINING: fitted.training,
        LOO_OBSERVED: _when_written(fitted.loo_observed),
        LOO_SIMULATED: _when_written(fitted.loo_simulated),
        LOO_NSE: fitted.loo_nse.to_frame("nse"),
        COVERAGE: fitted.coverage,
    }
    if fitted.held_out is not None:
        held_out = fitted.held_out.copy()
        held_out.attrs = {}  # kept in region.json
        tables[HELD_OUT] = held_out
    text = json.dumps(meta, indent=1, allow_nan=True)
    return (text + "\n").encode("utf-8"), tables


def _when_written(table) -> TableParts:
    """A leave-one-out flow (days x gauged basins) written a run of days at a time, one
    Parquet row group each (:func:`regional.kept.day_parts`): a flow left on the workers
    (:mod:`regional.kept`) is fetched part by part as its file is written, never whole (at
    7,500 gauged basins over 9 years of evaluation days a flow takes 99 MB as float32). A
    DataFrame is cut into the same parts, so the file has the same bytes either way."""
    return TableParts(partial(day_parts, table))


def from_files(meta: bytes, tables: dict[str, pd.DataFrame | TableParts]) -> FittedRegion:
    """Rebuild a :class:`FittedRegion` from :func:`fitted_files`' output, or from its files
    read back (:func:`regional.io.read_folder_files`)."""
    info = json.loads(meta.decode("utf-8"))
    tables = {name: _whole(table) for name, table in tables.items()}
    model = info["error_model"]
    window = info["window"]
    options = info["options"]
    held_out = tables.get(HELD_OUT)
    if held_out is not None:
        held_out = held_out.copy()
        held_out.attrs.update(_held_out_attrs(info["held_out_attrs"]))
    return FittedRegion(
        model=info["model"],
        method=info["method"],
        level=float(info["level"]),
        attributes=tuple(info["attributes"]),
        training=tables[TRAINING],
        parameters=tuple(info["parameters"]),
        options=TransferOptions(
            methods=tuple(options["methods"]),
            attributes=None if options["attributes"] is None else tuple(options["attributes"]),
            n_donors=int(options["n_donors"]),
            power=float(options["power"]),
            combine=options["combine"],
            donor_choices=tuple(options["donor_choices"]),
            chosen_donors={k: int(v) for k, v in options["chosen_donors"].items()},
        ),
        first_day=pd.Timestamp(window["first_day"]),
        last_day=pd.Timestamp(window["last_day"]),
        warmup_days=int(window["warmup_days"]),
        initial_storage=info["initial_storage_mm"],
        snow=bool(info["snow"]),
        fixed_params={k: float(v) for k, v in info["fixed_params"].items()},
        error_model=ConformalErrorModel(
            level=float(model["level"]),
            offset_fraction=float(model["offset_fraction"]),
            edges=np.asarray(model["edges"], dtype=float),
            lower_q=np.asarray(model["lower_q"], dtype=float),
            upper_q=np.asarray(model["upper_q"], dtype=float),
            n_days=np.asarray(model["n_days"], dtype=float),
            n_basins=int(model["n_basins"]),
            class_levels=None
            if model["class_levels"] is None
            else np.asarray(model["class_levels"], dtype=float),
        ),
        coverage=tables[COVERAGE],
        held_out=held_out,
        notes=tuple(info["notes"]),
        loo_nse=tables[LOO_NSE]["nse"],
        loo_observed=tables[LOO_OBSERVED],
        loo_simulated=tables[LOO_SIMULATED],
        area_crs=info["area_crs"],
        inputs=dict(info["inputs"]),
        settings=info["settings"],
    )


def _whole(table: pd.DataFrame | TableParts) -> pd.DataFrame:
    """A table as one DataFrame (the parts of :class:`TableParts` put together)."""
    if not isinstance(table, TableParts):
        return table
    parts = list(table.parts())
    return pd.concat(parts) if len(parts) > 1 else parts[0]


def _held_out_attrs(attrs: dict) -> dict:
    widened = {int(c): (float(old), float(new)) for c, (old, new) in attrs["widened"].items()}
    return {**attrs, "widened": widened}


def stale_reason(meta: bytes | None, settings: Settings, inputs: dict[str, str]) -> str | None:
    """Why a stored fitted region cannot be reused; None when it can.

    Parameters
    ----------
    meta : bytes or None
        ``fitted/region.json`` of the results folder (None: absent).
    settings : Settings
        The settings now.
    inputs : dict
        Input file -> SHA-256 now.
    """
    if meta is None:
        return "the results folder holds no fitted region (written by 'regional run')"
    try:
        info = json.loads(meta.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        return "the stored fitted region is unreadable"
    if info.get("format") != FORMAT:
        return f"the stored fitted region has format {info.get('format')!r}, not {FORMAT}"
    before = info.get("inputs", {})
    changed = sorted(
        path for path in set(before) | set(inputs) if before.get(path) != inputs.get(path)
    )
    if changed:
        return f"input changed since the region was fitted: {', '.join(changed)}"
    now = fit_settings(settings)
    before = info.get("settings", {})
    changed = [name for name in now if before.get(name) != now[name]]
    if changed:
        listed = ", ".join(f"[{name}]" for name in changed)
        return f"settings changed since the region was fitted: {listed} of {settings.path}"
    return None
