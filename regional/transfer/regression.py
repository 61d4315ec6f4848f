"""Regression transfer: ordinary least squares of transformed parameters on basin attributes.

For each parameter (e.g. log k), an OLS regression on attributes standardised with the training
basins' mean and standard deviation. Attributes are chosen by forward selection scored by the
leave-one-out prediction error sum of squares (PRESS, Allen 1974, Technometrics 16(1), 125-127),
computed with the hat-matrix shortcut e_i / (1 - h_ii), so no refitting loop is needed. Prediction
intervals at a target use the OLS observation prediction variance
sigma^2 (1 + x0' (X'X)^-1 x0) with Student-t quantiles (e.g. Kutner et al. 2005, Applied Linear
Statistical Models, 5th ed., McGraw-Hill), back-transformed to parameter units. See
``docs/transfer-regression.md``.

:class:`RegressionFit` holds the method without scikit-learn; its estimator
``RegressionTransfer`` is made in :mod:`regional.transfer.estimators`.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import special

from regional.errors import InputError, InputWarning
from regional.transfer.base import (
    Donation,
    PlainFit,
    check_complete,
    check_level,
    check_parameters,
    check_table,
    drop_constant,
    forward,
    inverse,
    select_attributes,
    sort_training,
)

METHOD = "regression"
DONOR_LABEL = "<regression>"
INTERCEPT = "intercept"
VIF_LIMIT = 10.0
"""VIF above which a warning is raised (rule of thumb, Kutner et al. 2005)."""
MIN_RESIDUAL_DOF = 2
"""Training basins must number at least the terms (intercept included) + this."""


class RegressionFit(PlainFit):
    """Transfer parameters by OLS regression of transformed parameters on attributes.

    Parameters
    ----------
    attributes : sequence of str, optional
        Candidate attribute columns. Default: every numeric column of ``X``. Constant ones are
        dropped with an :class:`~regional.errors.InputWarning`.
    select : bool, default True
        Forward selection by leave-one-out PRESS, separately for each parameter. With
        ``select=False`` every candidate attribute enters the regression (a user list then
        fixes the model).
    level : float, default 0.9
        Coverage of the prediction intervals given by :meth:`donate`.
    max_terms : int, optional
        Most attributes (intercept not counted) a selected model may hold. Default: as many as
        improve PRESS while leaving at least 2 residual degrees of freedom.

    Attributes
    ----------
    parameters_ : tuple of str
        Parameter columns of ``y``.
    transforms_ : dict
        Parameter -> ``"log"`` or ``"identity"``; the regression is in transformed space.
    attributes_ : list of str
        Candidate attributes after dropping constant ones.
    dropped_ : list of str
        Candidate attributes dropped as constant.
    selected_ : dict
        Parameter -> tuple of the attributes in its regression.
    mean_, scale_ : pandas.Series
        Training mean and standard deviation (ddof=1) of each candidate attribute, in its units.
    coefficients_ : pandas.DataFrame
        One row per (parameter, term), intercept first: ``parameter``, ``term``, ``estimate``,
        ``std_error``, ``t``, ``p`` (two-sided), ``vif`` (NaN for the intercept), ``vif_warning``
        (VIF > 10), ``estimate_raw`` and ``std_error_raw`` (the same model written in attribute
        units: transformed parameter per attribute unit).
    r2_, adj_r2_, rse_, press_ : pandas.Series
        Per parameter: R2, adjusted R2, residual standard error (transformed units) and
        leave-one-out PRESS (transformed units squared).
    dof_resid_ : pandas.Series
        Residual degrees of freedom n - p per parameter.
    design_inverse_ : dict
        Parameter -> (X'X)^-1 of its standardised design (intercept first), shape (p, p).
    selection_path_ : pandas.DataFrame
        Forward-selection steps: ``parameter``, ``step``, ``term`` added, ``press`` after it.
    n_train_ : int
        Number of training basins.
    """

    description = (
        "Regression: ordinary least squares of each transformed parameter (log for positive "
        "ones) on standardised attributes, the attributes chosen by forward selection on the "
        "leave-one-out prediction error (PRESS), with Student-t prediction intervals and "
        "variance inflation factors."
    )
    references = (
        "Allen, D. M. (1974): The relationship between variable selection and data augmentation "
        "and a method for prediction. Technometrics 16(1), 125-127 (PRESS).",
        "Kutner, M. H., Nachtsheim, C. J., Neter, J., Li, W. (2005): Applied Linear Statistical "
        "Models, 5th ed. McGraw-Hill (prediction intervals, VIF).",
        "Oudin, L., Andreassian, V., Perrin, C., Michel, C., Le Moine, N. (2008): Spatial "
        "proximity, physical similarity, regression and ungaged catchments. Water Resour. Res. "
        "44, W03413.",
    )

    def __init__(
        self,
        attributes: Sequence[str] | None = None,
        select: bool = True,
        level: float = 0.9,
        max_terms: int | None = None,
    ) -> None:
        self.attributes = attributes
        self.select = select
        self.level = level
        self.max_terms = max_terms

    # ---------------------------------------------------------------------------------------
    def fit(
        self,
        X: pd.DataFrame,
        y: pd.DataFrame,
        *,
        transforms: Mapping[str, str] | None = None,
    ) -> RegressionFit:
        """Fit one regression per parameter on the gauged basins.

        Parameters
        ----------
        X : pandas.DataFrame
            Attributes of the training (gauged) basins, indexed by basin id (str), in their own
            units.
        y : pandas.DataFrame
            Calibrated parameters, same basins as ``X``, one column per parameter (e.g.
            ``k_per_day`` in 1/day).
        transforms : mapping, optional
            Parameter -> ``"log"`` or ``"identity"``. Default ``"log"`` for ``k_per_day``,
            ``"identity"`` otherwise; the pipeline passes the model's ``Parameter.transform``.

        Returns
        -------
        self
        """
        check_level(self.level, method=METHOD)
        max_terms = _check_max_terms(self.max_terms)
        X = check_table(X, method=METHOD, role="the training attributes X")
        candidates = select_attributes(
            X, self.attributes, method=METHOD, role="the training attributes X"
        )
        y, transforms_ = check_parameters(y, X.index, transforms, method=METHOD)
        X, y = sort_training(X, y)
        check_complete(X, candidates, method=METHOD, role="the training attributes X")
        kept, dropped = drop_constant(X, candidates, method=METHOD)
        _check_enough_basins(len(X), 1 if self.select else 1 + len(kept))

        self.parameters_ = tuple(y.columns)
        self.transforms_ = transforms_
        self.attributes_ = kept
        self.dropped_ = dropped
        self.n_train_ = len(X)
        self.training_ids_ = X.index.copy()
        self.mean_ = X[kept].mean()
        self.scale_ = X[kept].std(ddof=1)
        Z = _standardise(X[kept], self.mean_, self.scale_)
        self._fit_all(Z, y, max_terms)
        return self

    def _fit_all(self, Z: pd.DataFrame, y: pd.DataFrame, max_terms: int | None) -> None:
        selected, fits, paths = {}, {}, []
        values = Z.to_numpy(dtype=float)
        position = {str(name): i for i, name in enumerate(Z.columns)}
        for name in self.parameters_:
            target = forward(y[name].to_numpy(), self.transforms_[name])
            if self.select:
                terms, path = _forward_selection(Z, target, max_terms=max_terms)
                paths += [{"parameter": name, **step} for step in path]
            else:
                terms = list(Z.columns)
            design = _design_of(values, [position[str(t)] for t in terms])
            _check_rank(design, terms)
            selected[name] = tuple(terms)
            fits[name] = _ols(design, target)
        self.selected_ = selected
        self.design_inverse_ = {name: fit["xtx_inv"] for name, fit in fits.items()}
        self._fits = fits
        self._coefficients = None  # built on first use (:attr:`coefficients_`)
        self.r2_ = pd.Series({n: f["r2"] for n, f in fits.items()}, name="r2")
        self.adj_r2_ = pd.Series({n: f["adj_r2"] for n, f in fits.items()}, name="adj_r2")
        self.rse_ = pd.Series({n: np.sqrt(f["sigma2"]) for n, f in fits.items()}, name="rse")
        self.press_ = pd.Series({n: f["press"] for n, f in fits.items()}, name="press")
        self.dof_resid_ = pd.Series({n: f["dof"] for n, f in fits.items()}, name="dof_resid")
        self.selection_path_ = pd.DataFrame(paths, columns=["parameter", "step", "term", "press"])
        self._beta = {name: fit["beta"] for name, fit in fits.items()}
        self._sigma2 = {name: fit["sigma2"] for name, fit in fits.items()}
        self._warn_vif(fits)

    @property
    def coefficients_(self) -> pd.DataFrame:
        """The coefficient table (see the class docstring), built once when first read: the
        held-out check and leave-one-out refit the regression thousands of times and read
        only its predictions."""
        if self._coefficients is None:
            self._coefficients = self._coefficient_table(self._fits)
        return self._coefficients

    @coefficients_.setter
    def coefficients_(self, table: pd.DataFrame) -> None:
        self._coefficients = table

    def _coefficient_table(self, fits: Mapping[str, dict]) -> pd.DataFrame:
        frames = []
        for name, fit in fits.items():
            terms = [INTERCEPT, *self.selected_[name]]
            raw, raw_se = _raw_units(
                fit["beta"], fit["cov"], self.mean_[list(terms[1:])], self.scale_[list(terms[1:])]
            )
            frames.append(
                pd.DataFrame(
                    {
                        "parameter": name,
                        "term": terms,
                        "estimate": fit["beta"],
                        "std_error": fit["se"],
                        "t": fit["t"],
                        "p": fit["p"],
                        "vif": fit["vif"],
                        "vif_warning": fit["vif"] > VIF_LIMIT,
                        "estimate_raw": raw,
                        "std_error_raw": raw_se,
                    }
                )
            )
        return pd.concat(frames, ignore_index=True)

    def _warn_vif(self, fits: Mapping[str, dict]) -> None:
        high = [
            (term, name, vif)
            for name, fit in fits.items()
            for term, vif in zip([INTERCEPT, *self.selected_[name]], fit["vif"], strict=True)
            if vif > VIF_LIMIT
        ]
        if len(high):
            listed = ", ".join(f"{term!r} ({name}: VIF {vif:.1f})" for term, name, vif in high)
            warnings.warn(
                f"{METHOD} transfer: {len(high)} attribute(s) have a variance inflation factor "
                f"above {VIF_LIMIT:g}: {listed}. Their coefficients are unstable; drop one of "
                "each collinear group or use select=True.",
                InputWarning,
                stacklevel=4,
            )

    # ---------------------------------------------------------------------------------------
    def design_rows(self, X: pd.DataFrame) -> dict[str, pd.DataFrame]:
        """Standardised design rows of target basins, one table per parameter.

        Parameters
        ----------
        X : pandas.DataFrame
            Attributes of the targets, indexed by basin id, in the training units.

        Returns
        -------
        dict
            Parameter -> DataFrame indexed by ``target_id`` with columns ``intercept`` (1.0) and
            the selected attributes standardised with the training mean and standard deviation;
            with :attr:`design_inverse_` it gives the leverage x0' (X'X)^-1 x0.
        """
        X, needed = self._checked_targets(X)
        index = X.index.rename("target_id")
        return {
            name: pd.DataFrame(design, index=index, columns=[INTERCEPT, *self.selected_[name]])
            for name, design in self._designs(X, needed).items()
        }

    def _checked_targets(self, X: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
        """Target attributes checked, and the attributes any selected regression needs."""
        self._check_fitted()
        X = check_table(X, method=METHOD, role="the target attributes X")
        needed = sorted({a for terms in self.selected_.values() for a in terms})
        if needed:
            select_attributes(X, needed, method=METHOD, role="the target attributes X")
            check_complete(X, needed, method=METHOD, role="the target attributes X")
        return X, needed

    def _designs(self, X: pd.DataFrame, needed: list[str]) -> dict[str, np.ndarray]:
        """Parameter -> standardised design rows of ``X`` (intercept first), as arrays."""
        values = X[needed].to_numpy(dtype=float) if needed else np.empty((len(X), 0))
        column = {a: i for i, a in enumerate(needed)}
        moment = {str(a): i for i, a in enumerate(self.mean_.index)}
        mean, scale = self.mean_.to_numpy(dtype=float), self.scale_.to_numpy(dtype=float)
        designs = {}
        for name in self.parameters_:
            terms = list(self.selected_[name])
            at = [moment[t] for t in terms]
            z = (values[:, [column[t] for t in terms]] - mean[at]) / scale[at]
            designs[name] = np.column_stack([np.ones(len(X)), z])
        return designs

    def predict_transformed(self, X: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Predicted transformed parameters and their observation prediction standard errors.

        Returns
        -------
        (mean, std) : tuple of pandas.DataFrame
            Indexed by ``target_id``, one column per parameter, in transformed units:
            x0' beta and sqrt(sigma^2 (1 + x0' (X'X)^-1 x0)).
        """
        X, needed = self._checked_targets(X)
        means, stds = {}, {}
        for name, x0 in self._designs(X, needed).items():
            leverage = np.einsum("ij,jk,ik->i", x0, self.design_inverse_[name], x0)
            means[name] = x0 @ self._beta[name]
            stds[name] = np.sqrt(self._sigma2[name] * (1.0 + leverage))
        index = X.index.rename("target_id")
        return pd.DataFrame(means, index=index), pd.DataFrame(stds, index=index)

    def predict(self, X: pd.DataFrame) -> pd.DataFrame:
        """Parameter estimates at targets: the back-transformed regression prediction.

        For a log parameter this is exp of the predicted log value, i.e. the median (not the
        mean) of the predictive distribution in parameter units.

        Returns
        -------
        pandas.DataFrame
            Indexed by ``target_id``, one column per parameter, in parameter units.
        """
        mean, _ = self.predict_transformed(X)
        return pd.DataFrame(
            {name: inverse(mean[name].to_numpy(), self.transforms_[name]) for name in mean},
            index=mean.index,
        )

    def donate(self, X: pd.DataFrame) -> Donation:
        """One synthetic parameter set per target (weight 1) with its prediction interval.

        Returns
        -------
        Donation
            ``sets`` with ``donor_id`` ``"<regression>"``; ``intervals`` with
            ``<param>_low``/``<param>_high`` at :attr:`level`, in parameter units.
        """
        mean, std = self.predict_transformed(X)
        level = check_level(self.level, method=METHOD)
        intervals = {}
        sets = pd.DataFrame(
            {
                "target_id": mean.index.to_numpy(dtype=object),
                "donor_id": DONOR_LABEL,
                "rank": 1,
                "distance": np.nan,
                "weight": 1.0,
            }
        )
        for name in self.parameters_:
            transform = self.transforms_[name]
            # the Student-t quantile (scipy.stats.t.ppf computes it with the same function)
            quantile = special.stdtrit(self.dof_resid_[name], 0.5 + level / 2.0)
            centre, half = mean[name].to_numpy(), quantile * std[name].to_numpy()
            sets[name] = inverse(centre, transform)
            intervals[f"{name}_low"] = inverse(centre - half, transform)
            intervals[f"{name}_high"] = inverse(centre + half, transform)
        intervals = pd.DataFrame(intervals, index=mean.index)
        return Donation(
            method=METHOD,
            sets=sets,
            intervals=intervals,
            parameters=self.parameters_,
            transforms=dict(self.transforms_),
            combine="output",
            level=level,
            distance_unit="",
        )


# --------------------------------------------------------------------------------------------
# Numerical steps


def _check_max_terms(max_terms: object) -> int | None:
    if max_terms is None:
        return None
    if isinstance(max_terms, bool) or not isinstance(max_terms, int | np.integer) or max_terms < 0:
        raise InputError(
            f"{METHOD} transfer: max_terms must be None or a whole number >= 0, got {max_terms!r}."
        )
    return int(max_terms)


def _check_enough_basins(n_train: int, n_terms: int) -> None:
    """At least terms (intercept included) + 2 training basins are needed."""
    needed = n_terms + MIN_RESIDUAL_DOF
    if n_train < needed:
        raise InputError(
            f"{METHOD} transfer: {n_train} training basin(s) for {n_terms} regression term(s) "
            f"(intercept included); at least terms + {MIN_RESIDUAL_DOF} = {needed} basins are "
            "needed. Use fewer attributes, select=True, or more gauged basins."
        )


def _check_rank(design: np.ndarray, terms: Sequence[str]) -> None:
    rank = np.linalg.matrix_rank(design)
    if rank < design.shape[1]:
        raise InputError(
            f"{METHOD} transfer: the attributes {', '.join(map(repr, terms))} are exactly "
            f"collinear over the {len(design)} training basins (design rank {rank} < "
            f"{design.shape[1]} terms); drop one of the collinear attributes."
        )


def _standardise(X: pd.DataFrame, mean: pd.Series, scale: pd.Series) -> pd.DataFrame:
    return (X.astype(float) - mean) / scale


def _design_of(values: np.ndarray, columns: Sequence[int]) -> np.ndarray:
    """Design matrix: a column of ones then the standardised attribute ``columns`` of
    ``values`` (basins x attributes)."""
    return np.column_stack([np.ones(len(values)), values[:, list(columns)]])


def press(design: np.ndarray, target: np.ndarray) -> float:
    """Leave-one-out prediction error sum of squares of an OLS fit (Allen 1974).

    PRESS = sum_i (e_i / (1 - h_ii))^2 with e the OLS residuals and h_ii the leverages (hat
    matrix diagonal). Infinite when a basin has leverage 1 (its left-out prediction is undefined)
    or the design is rank deficient.
    """
    q, r = np.linalg.qr(design)
    diagonal = np.abs(np.diag(r))
    if diagonal.min() <= 1e-10 * max(diagonal.max(), 1.0):
        return float("inf")
    beta = np.linalg.solve(r, q.T @ target)
    residuals = target - design @ beta
    leverage = np.sum(q * q, axis=1)
    if np.any(leverage >= 1.0 - 1e-10):
        return float("inf")
    return float(np.sum((residuals / (1.0 - leverage)) ** 2))


def _forward_selection(
    Z: pd.DataFrame, target: np.ndarray, *, max_terms: int | None
) -> tuple[list[str], list[dict]]:
    """Greedy forward selection minimising PRESS; ties broken by attribute order."""
    n = len(Z)
    limit = n - MIN_RESIDUAL_DOF - 1  # attributes allowed with the intercept
    if max_terms is not None:
        limit = min(limit, max_terms)
    names = [str(c) for c in Z.columns]
    values = np.column_stack([np.ones(n), Z.to_numpy(dtype=float)])
    position = {name: i + 1 for i, name in enumerate(names)}
    chosen: list[str] = []
    best = press(values[:, [0]], target)
    path = [{"step": 0, "term": INTERCEPT, "press": best}]
    while len(chosen) < limit:
        used = [0, *(position[a] for a in chosen)]
        scores = {
            a: press(values[:, [*used, position[a]]], target) for a in names if a not in chosen
        }
        if not scores:
            break
        attribute = min(scores, key=scores.get)
        if not scores[attribute] < best:
            break
        chosen.append(attribute)
        best = scores[attribute]
        path.append({"step": len(chosen), "term": attribute, "press": best})
    return chosen, path


def _ols(design: np.ndarray, target: np.ndarray) -> dict:
    """OLS estimates, standard errors, t, p, R2, adjusted R2, VIF and PRESS."""
    n, p = design.shape
    q, r = np.linalg.qr(design)
    beta = np.linalg.solve(r, q.T @ target)
    r_inv = np.linalg.solve(r, np.eye(p))
    xtx_inv = r_inv @ r_inv.T
    residuals = target - design @ beta
    dof = n - p
    rss = float(residuals @ residuals)
    sigma2 = rss / dof
    cov = sigma2 * xtx_inv
    se = np.sqrt(np.diag(cov))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = beta / se
    tss = float(np.sum((target - target.mean()) ** 2))
    r2 = 1.0 - rss / tss if tss > 0 else np.nan
    return {
        "beta": beta,
        "xtx_inv": xtx_inv,
        "cov": cov,
        "se": se,
        "t": t,
        "p": 2.0 * special.stdtr(dof, -np.abs(t)),  # two-sided Student-t
        "sigma2": sigma2,
        "dof": dof,
        "r2": r2,
        "adj_r2": 1.0 - (1.0 - r2) * (n - 1) / dof if tss > 0 else np.nan,
        "vif": _vif(design),
        "press": press(design, target),
    }


def _vif(design: np.ndarray) -> np.ndarray:
    """Variance inflation factor of each attribute column: 1 / (1 - R2_j), R2_j from the OLS of
    column j on the other columns (intercept included). NaN for the intercept."""
    p = design.shape[1]
    vif = np.full(p, np.nan)
    for j in range(1, p):
        others = np.delete(design, j, axis=1)
        column = design[:, j]
        coef, *_ = np.linalg.lstsq(others, column, rcond=None)
        rss = float(np.sum((column - others @ coef) ** 2))
        tss = float(np.sum((column - column.mean()) ** 2))
        vif[j] = tss / rss if rss > 0 else np.inf
    return vif


def _raw_units(
    beta: np.ndarray, cov: np.ndarray, mean: pd.Series, scale: pd.Series
) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients and standard errors of the same fit in attribute units.

    With z_j = (x_j - m_j) / s_j: slope_raw_j = b_j / s_j and
    intercept_raw = b_0 - sum_j b_j m_j / s_j; covariance A cov A' for the linear map A.
    """
    m, s = mean.to_numpy(dtype=float), scale.to_numpy(dtype=float)
    p = len(beta)
    a = np.eye(p)
    a[1:, 1:] = np.diag(1.0 / s)
    a[0, 1:] = -m / s
    raw = a @ beta
    raw_cov = a @ cov @ a.T
    return raw, np.sqrt(np.diag(raw_cov))
