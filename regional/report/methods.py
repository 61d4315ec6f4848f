"""The report's methods text, built from what a run used.

Each storage model (:mod:`regional.models`) and transfer estimator (:mod:`regional.transfer`)
carries its own ``description`` (one paragraph) and ``references`` (full citations); the methods
section names exactly the models, snow store and transfer methods of the run, with their
references, beside the steps every run shares (calibration, leave-one-out, bounds, applicability,
screening) and theirs.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from regional.crossval import CALIBRATED
from regional.models import DegreeDaySnow, get_model
from regional.transfer import TRANSFER_METHODS

NASH_1970 = (
    "Nash, J. E., Sutcliffe, J. V. (1970): River flow forecasting through conceptual models "
    "part I - A discussion of principles. J. Hydrol. 10, 282-290 (NSE)."
)
GUPTA_2009 = (
    "Gupta, H. V., Kling, H., Yilmaz, K. K., Martinez, G. F. (2009): Decomposition of the mean "
    "squared error and NSE performance criteria: implications for improving hydrological "
    "modelling. J. Hydrol. 377, 80-91 (KGE)."
)
KLEMES_1986 = (
    "Klemes, V. (1986): Operational testing of hydrological simulation models. Hydrol. Sci. J. "
    "31(1), 13-24 (split-sample test)."
)
OUDIN_2008 = (
    "Oudin, L., Andreassian, V., Perrin, C., Michel, C., Le Moine, N. (2008): Spatial "
    "proximity, physical similarity, regression and ungaged catchments. Water Resour. Res. "
    "44, W03413."
)
CONFORMAL = (
    "Vovk, V., Gammerman, A., Shafer, G. (2005): Algorithmic Learning in a Random World. "
    "Springer (conformal prediction).",
    "Lei, J., G'Sell, M., Rinaldo, A., Tibshirani, R. J., Wasserman, L. (2018): "
    "Distribution-free predictive inference for regression. J. Am. Stat. Assoc. 113, "
    "1094-1111 (split-conformal prediction).",
)
MAHALANOBIS_1936 = (
    "Mahalanobis, P. C. (1936): On the generalised distance in statistics. Proc. Natl. Inst. "
    "Sci. India 2, 49-55 (applicability distance)."
)
SHERMAN_1950 = (
    "Sherman, J., Morrison, W. J. (1950): Adjustment of an inverse matrix corresponding to a "
    "change in one element of a given matrix. Ann. Math. Stat. 21, 124-127 (rank-one update "
    "in screening)."
)


@dataclass(frozen=True)
class MethodsText:
    """The methods section's content.

    Attributes
    ----------
    paragraphs : tuple of (str, str)
        (heading, text) in reading order.
    references : tuple of str
        Every work cited, once each, sorted by first author.
    """

    paragraphs: tuple[tuple[str, str], ...]
    references: tuple[str, ...]


def methods_text(
    models: Iterable[str],
    methods: Iterable[str],
    *,
    snow: bool,
    objective: str,
    screening: bool,
) -> MethodsText:
    """Describe the models and transfer methods that ran, with their references.

    Parameters
    ----------
    models : iterable of str
        Storage models of the run (registry names, e.g. ``"gr4j"``).
    methods : iterable of str
        Transfer methods of the run (``"calibrated"`` is skipped: it is the basin's own set).
    snow : bool
        Whether the degree-day snow store ran in front of the models.
    objective : str
        Calibration objective (e.g. ``"kge"``).
    screening : bool
        Whether candidate gauge sites were ranked.

    Returns
    -------
    MethodsText
    """
    parts = [_model_part(get_model(name)) for name in dict.fromkeys(models)]
    if snow:
        parts.append(_model_part(DegreeDaySnow))
    estimators = [TRANSFER_METHODS[m] for m in dict.fromkeys(methods) if m != CALIBRATED]
    parts += [_transfer_part(estimator) for estimator in estimators]
    parts += _shared_parts(objective, screening=screening)
    paragraphs = tuple((heading, text) for heading, text, _ in parts)
    cited = dict.fromkeys(reference for _, _, refs in parts for reference in refs)
    return MethodsText(paragraphs=paragraphs, references=tuple(sorted(cited, key=str.casefold)))


def _model_part(model) -> tuple[str, str, tuple[str, ...]]:
    heading = f"Storage model {model.name}" if model.name != "snow" else "Snow store"
    return heading, _described(model), tuple(getattr(model, "references", ()))


def _transfer_part(estimator) -> tuple[str, str, tuple[str, ...]]:
    name = _registry_name(estimator)
    return (
        f"Transfer method {name}",
        _described(estimator),
        tuple(getattr(estimator, "references", ())),
    )


def _described(part) -> str:
    """The part's ``description``; for a part without one, the first line of its docstring."""
    text = getattr(part, "description", "")
    return text or (part.__doc__ or "").strip().split("\n", 1)[0]


def _registry_name(estimator) -> str:
    return next(name for name, cls in TRANSFER_METHODS.items() if cls is estimator)


def _shared_parts(objective: str, *, screening: bool) -> list[tuple[str, str, tuple[str, ...]]]:
    parts = [
        (
            "Calibration",
            f"Per gauged basin, the objective ({objective}) is maximised on the calibration "
            "period after a warm-up, and the optimum scored on a separate validation period "
            "(split-sample test, Klemes 1986). NSE after Nash and Sutcliffe (1970); KGE and its "
            "correlation, variability and bias parts after Gupta et al. (2009).",
            (KLEMES_1986, NASH_1970, GUPTA_2009),
        ),
        (
            "Leave-one-out",
            "Each gauged basin is left out in turn, every transfer method refit on the others "
            "and scored on the left-out basin's observations; the basin's own calibration is the "
            "upper bound and the regional median the benchmark. The comparison of these families "
            "of methods follows Oudin et al. (2008).",
            (OUDIN_2008,),
        ),
        (
            "Bounds at ungauged basins",
            "Split-conformal prediction (Vovk et al. 2005; Lei et al. 2018) on the leave-one-out "
            "errors of log flow, by flow class where the data allow; their coverage is checked "
            "on basins they were not built from.",
            CONFORMAL,
        ),
        (
            "Applicability",
            "A target is flagged when an attribute lies outside the donors' range, when its "
            "Mahalanobis (1936) distance to the donors exceeds the chi-square 95 % quantile, or "
            "when its nearest donor is farther than any donor's nearest neighbour.",
            (MAHALANOBIS_1936,),
        ),
    ]
    if screening:
        parts.append(
            (
                "Screening",
                "The reduction in average prediction variance from adding a candidate to the "
                "regression's design, computed by a rank-one update of the inverse (Sherman and "
                "Morrison 1950), combined with the donors' spread at the candidate.",
                (SHERMAN_1950,),
            )
        )
    return parts
