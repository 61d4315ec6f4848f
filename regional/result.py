"""What a run produced: one :class:`ModelRun` per storage model and the :class:`RunResult`.

Plain containers: the pipeline builds one :class:`RunResult` once, at the end of the chain
(prediction, statistics and screening take the fitted region and the tables they read, never a
run result); the report and :mod:`regional.outputs` read it.
"""

from __future__ import annotations

import importlib.metadata
import platform
from dataclasses import dataclass, field

import pandas as pd

from regional import __version__
from regional.config import Settings
from regional.crossval import FoldContext, LeaveOneOut
from regional.region import Region
from regional.transfer import RegressionFit


@dataclass(frozen=True)
class ModelRun:
    """Calibration and leave-one-out of one storage model.

    Attributes
    ----------
    model : str
        Model name.
    calibration : DataFrame
        Per gauged basin: parameters and scores (see :func:`regional.calibrate`).
    loo : LeaveOneOut
        Leave-one-out scores, transferred parameters and flows.
    regression : RegressionFit
        The regression fit on every gauged basin (coefficient table for the report).
    context : FoldContext
        What the folds saw (forcing window, attributes, options with the donor counts chosen),
        reused by prediction.
    donor_counts : DataFrame or None
        Median leave-one-out skill per donor method and candidate donor count, the chosen count
        marked (see :class:`regional.crossval.DonorCountChoice`); None with one fixed count.
    """

    model: str
    calibration: pd.DataFrame
    loo: LeaveOneOut
    regression: RegressionFit
    context: FoldContext
    donor_counts: pd.DataFrame | None = None


@dataclass(frozen=True)
class RunResult:
    """Everything one run produced; :mod:`regional.outputs` turns it into files.

    Attributes
    ----------
    settings : Settings
        The parsed config.
    region : Region
        The checked region with its attributes.
    attributes : tuple of str
        Attribute columns used by regression and similarity.
    runs : dict
        Model name -> :class:`ModelRun`.
    scores : DataFrame
        Leave-one-out scores of every model and method (long, with a ``model`` column).
    summary : DataFrame
        One row per (model, method) (see :func:`regional.crossval.summarise`).
    chosen_model, chosen_method : str
        What prediction uses: the config's choice or the best median leave-one-out NSE.
    prediction : object or None
        :class:`regional.predicted.Prediction` when the region has ungauged basins.
    screening : object or None
        :class:`regional.screen.Screening` when candidates were screened.
    statistics : object or None
        :class:`regional.statroutes.FlowStatistics`: flow statistics by route in leave-one-out,
        with bounds at the ungauged basins.
    fitted : object or None
        :class:`regional.fitted.FittedRegion`: what prediction and screening used, stored
        with the results for reuse.
    warnings : tuple of str
        Everything the user should read, for the report.
    stages : dict
        Stage (``run``, ``prediction``, ``screening``) -> when it last wrote the results
        folder (ISO 8601, UTC); filled by :mod:`regional.outputs` when writing.
    timings : dict
        Stage -> seconds.
    """

    settings: Settings
    region: Region
    attributes: tuple[str, ...]
    runs: dict[str, ModelRun]
    scores: pd.DataFrame
    summary: pd.DataFrame
    chosen_model: str
    chosen_method: str
    prediction: object | None = None
    screening: object | None = None
    statistics: object | None = None
    fitted: object | None = None
    warnings: tuple[str, ...] = ()
    timings: dict[str, float] = field(default_factory=dict)
    stages: dict[str, str] = field(default_factory=dict)


SOFTWARE = (
    "numpy",
    "pandas",
    "scipy",
    "numba",
    "scikit-learn",
    "geopandas",
    "shapely",
    "pyproj",
    "pyogrio",
    "rasterio",
    "matplotlib",
)
"""Packages whose versions are recorded with every run (report and run.json); this package's
own version is ``regional.__version__`` (its distribution is named ``regional-flows``)."""


def software_versions() -> dict[str, str]:
    """Python and package versions of this run, ``"not installed"`` for absent ones."""
    versions = {"python": platform.python_version(), "regional": __version__}
    for name in SOFTWARE:
        try:
            versions[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions
