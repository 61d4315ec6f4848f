"""Regression folds without a refit per fold: forward selection by PRESS and the fold's fit
derived from the pool's fit of each candidate model by the deletion identities.

For a pool design A (n x p, intercept first) with OLS residuals e and hat matrix H, leaving out
the rows D of a fold gives (the block form of Sherman-Morrison-Woodbury; Belsley, Kuh and
Welsch 1980, Regression Diagnostics, Wiley, ch. 2; Cook and Weisberg 1982, Residuals and
Influence in Regression, Chapman and Hall, ch. 3), with M = (I - H_DD)^-1:

- residual of row j:      e_j^(D) = e_j + H_jD M e_D
- leverage of row j:      h_jj^(D) = h_jj + H_jD M H_Dj
- coefficients:           b^(D) = b - (A'A)^-1 A_D' M e_D
- inverse Gram matrix:    (A'A)^-1 + (A'A)^-1 A_D' M A_D (A'A)^-1
- residual sum of squares: RSS - e_D' M e_D

For one dropped row, M = 1 / (1 - h_ii) and the first two read
e_j + h_ij e_i / (1 - h_ii) and h_jj + h_ij^2 / (1 - h_ii). The fold's PRESS is then
sum over the fold's rows of (e_j^(D) / (1 - h_jj^(D)))^2 (Allen 1974), so forward selection runs
per fold exactly as :class:`regional.transfer.RegressionTransfer` runs it on the fold's basins,
without refitting: each candidate model is fit once on the pool (a QR decomposition), and every
fold's PRESS of it costs O(n p) in a compiled loop. The whole stays O(n^2) flops for n folds on n
basins, with a compiled constant instead of a fit's checks and frames per fold.

OLS with an intercept gives the same predictions, residuals, leverages, PRESS and prediction
intervals whatever affine scaling of the attributes is used, so the pool's standardisation
serves every fold (the estimator standardises with the fold's own mean and standard deviation;
the results agree to round-off). Folds near a decision (two candidates' PRESS within 1e-9
relative, a PRESS within 1e-9 of the one it must beat), near a singular fit, with a variance
inflation factor near the warning limit, or with an attribute constant in the fold, are flagged
for the plain refit (:func:`regional.transfer.folds.fold_donations` does it).
"""

from __future__ import annotations

import numba
import numpy as np
import pandas as pd
from scipy import special

from regional.transfer.base import (
    check_complete,
    check_parameters,
    check_table,
    forward,
    inverse,
    select_attributes,
)
from regional.transfer.foldpool import (
    FoldPool,
    FoldSettings,
    Moments,
    fold_sizes,
    one_set_donation,
    target_values,
)
from regional.transfer.regression import (
    DONOR_LABEL,
    MIN_RESIDUAL_DOF,
    VIF_LIMIT,
)

CLOSE = 1e-9
"""Relative gap under which a selection decision is left to the plain refit."""
SINGULAR = 1e-8
"""Smallest 1 - leverage (and eigenvalue of I - H_DD) the fast route decides with."""
INFINITE = 0.5e-10
"""1 - leverage at or below which a PRESS is infinite for sure (the estimator's limit is 1e-10:
between the two the fold is refit)."""


class RegressionFolds:
    """Regression prepared on the pool (checked attributes and parameters, the pool's
    standardisation and sums, each candidate model's QR fit made once, :class:`ModelFits`)."""

    def __init__(self, pool: FoldPool, settings: FoldSettings) -> None:
        X = check_table(pool.X, method="regression", role="the training attributes X")
        attributes = list(settings.attributes) if settings.attributes else None
        role = "the training attributes X"
        self.candidates = select_attributes(X, attributes, method="regression", role=role)
        y, self.transforms = check_parameters(
            pool.y, X.index, settings.transforms, method="regression"
        )
        check_complete(X, self.candidates, method="regression", role=role)
        raw = X[self.candidates].to_numpy(dtype=float)
        if not (np.ptp(raw, axis=0) > 0).all():
            raise ValueError("a constant attribute: every fold warns and is refit")
        self.pool, self.level = pool, float(settings.level)
        self.centre, self.scale = raw.mean(axis=0), raw.std(axis=0, ddof=1)
        W = (raw - self.centre) / self.scale
        self.raw_moments, self.moments = Moments.of(raw), Moments.of(W)
        self.fits = {
            str(name): ModelFits(W, forward(y[name].to_numpy(dtype=float), self.transforms[name]))
            for name in y.columns
        }

    def donations(self, targets: list[str], rows: np.ndarray, target_X: pd.DataFrame):
        """Every fold's donation that the fast route gives exactly (the others are left out,
        to be refit)."""
        m = fold_sizes(self.pool, rows)
        _, fold_std, safe = self.moments.of_folds(rows)
        tss = (m[:, None] - 1.0) * fold_std**2
        ok = safe & self.raw_moments.never_constant(rows) & (m >= MIN_RESIDUAL_DOF + 1)
        values = target_values(target_X.loc[targets], self.candidates)
        target_W = (values - self.centre) / self.scale
        ok &= np.isfinite(target_W).all(axis=1)
        limit = m - MIN_RESIDUAL_DOF - 1
        results = {}
        for name, fits in self.fits.items():
            chosen, fine = _select(fits, rows, limit, ok)
            ok &= fine
            mean, std, dof, vif_ok = _predict(fits, rows, chosen, target_W, tss, ok)
            ok &= vif_ok
            half = special.stdtrit(dof, 0.5 + self.level / 2.0) * std  # Student-t quantile
            transform = self.transforms[name]
            results[name] = tuple(inverse(v, transform) for v in (mean, mean - half, mean + half))
        return {
            targets[f]: one_set_donation(
                "regression",
                DONOR_LABEL,
                targets[f],
                {name: tuple(v[f] for v in values) for name, values in results.items()},
                transforms=self.transforms,
                level=self.level,
            )
            for f in np.flatnonzero(ok)
        }


class ModelFits:
    """The pool's OLS fits of one transformed parameter ``t`` on [1, W[:, subset]], each
    candidate subset fit once (QR) and kept: (Q, R, coefficients, residuals, leverages), or
    None when the pool design is near singular."""

    def __init__(self, W: np.ndarray, t: np.ndarray) -> None:
        self.W, self.t = W, t
        self._fits: dict[tuple[int, ...], tuple | None] = {}

    @property
    def n_candidates(self) -> int:
        return self.W.shape[1]

    def __call__(self, subset: tuple[int, ...]):
        if subset not in self._fits:
            self._fits[subset] = self._fit(subset)
        return self._fits[subset]

    def _fit(self, subset: tuple[int, ...]):
        design = np.column_stack([np.ones(len(self.W)), self.W[:, list(subset)]])
        q, r = np.linalg.qr(design)
        diagonal = np.abs(np.diag(r))
        if diagonal.min() <= 1e-8 * max(diagonal.max(), 1.0):
            return None
        beta = np.linalg.solve(r, q.T @ self.t)
        residuals = self.t - design @ beta
        return np.ascontiguousarray(q), r, beta, residuals, np.sum(q * q, axis=1)


# --------------------------------------------------------------------------------------------
# Forward selection per fold


def _select(fits: ModelFits, rows, limit, ok):
    """Forward selection of every fold: (chosen subsets, folds decided clearly)."""
    n_folds = len(rows)
    fine = ok.copy()
    chosen: list[tuple[int, ...]] = [()] * n_folds
    best = np.full(n_folds, np.inf)
    everyone = np.flatnonzero(fine)
    best[everyone], fine[everyone] = _press(fits, (), rows[everyone], fine[everyone])
    active = fine & (limit > 0)
    while active.any():
        groups: dict[tuple[int, ...], list[int]] = {}
        for f in np.flatnonzero(active):
            groups.setdefault(chosen[f], []).append(f)
        for subset, members in groups.items():
            members = np.asarray(members)
            remaining = [a for a in range(fits.n_candidates) if a not in subset]
            if not remaining:
                active[members] = False
                continue
            scores = np.empty((len(members), len(remaining)))
            clear = np.ones(len(members), dtype=bool)
            for c, a in enumerate(remaining):
                scores[:, c], good = _press(fits, (*subset, a), rows[members], clear)
                clear &= good
            pick = np.argmin(scores, axis=1)
            top = scores[np.arange(len(members)), pick]
            if len(remaining) > 1:
                runner = np.partition(scores, 1, axis=1)[:, 1]
                clear &= runner - top > CLOSE * np.abs(top)
            clear &= np.abs(top - best[members]) > CLOSE * np.abs(best[members])
            fine[members] &= clear
            better = clear & (top < best[members])
            for f, p, b in zip(members[better], pick[better], top[better], strict=True):
                chosen[f] = (*chosen[f], remaining[p])
                best[f] = b
            active[members[~better]] = False
        active &= fine & (np.array([len(c) for c in chosen]) < limit)
    return chosen, fine


def _press(fits: ModelFits, subset, rows, wanted):
    """Each fold's PRESS of the model [1, W[:, subset]] and whether it is decided clearly
    (:func:`regional.transfer.regression.press` gives inf where a leverage reaches
    1 - 1e-10; a fold whose leverage lies near that limit is not decided here)."""
    n_folds = len(rows)
    fit = fits(subset)
    if fit is None or not wanted.any():
        return np.full(n_folds, np.inf), np.zeros(n_folds, dtype=bool)
    q, _, _, residuals, leverage = fit
    press, clear = _fold_press(q, residuals, leverage, np.ascontiguousarray(rows))
    return press, wanted & clear


@numba.njit(cache=True, nogil=True)
def _dropped(row):  # pragma: no cover - compiled
    """The pool rows a fold leaves out: the leading entries >= 0 of its padded row."""
    d = 0
    while d < len(row) and row[d] >= 0:
        d += 1
    return row[:d]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _fold_press(q, e, h, rows):  # pragma: no cover - compiled
    """PRESS of every fold (pool rows ``rows[f]`` >= 0 left out) from the pool fit's Q,
    residuals e and leverages h, inf where a fold's leverage is 1 to within 1e-10 (as
    :func:`regional.transfer.regression.press`); and whether each fold stays clear of that
    limit (1 - leverage below INFINITE or above SINGULAR, I - H_DD well conditioned)."""
    n, p = q.shape
    n_folds = rows.shape[0]
    press = np.zeros(n_folds)
    clear = np.ones(n_folds, dtype=np.bool_)
    for f in range(n_folds):
        drop = _dropped(rows[f])
        d = len(drop)
        m_inv = np.eye(d)
        if d > 0:
            hdd = np.eye(d)
            for a in range(d):
                for b in range(d):
                    s = 0.0
                    for c in range(p):
                        s += q[drop[a], c] * q[drop[b], c]
                    hdd[a, b] -= s
            if np.linalg.eigvalsh(hdd).min() <= SINGULAR:
                clear[f] = False
                continue
            m_inv = np.linalg.inv(hdd)
        u = np.zeros(d)
        for a in range(d):
            for b in range(d):
                u[a] += m_inv[a, b] * e[drop[b]]
        if d == 1:  # one dropped row: the scalar identities, the common case
            press[f], clear[f] = _one_row_press(q, e, h, drop[0], u[0], m_inv[0, 0])
            continue
        hjd = np.zeros(d)
        total = 0.0
        for j in range(n):
            skip = False
            for a in range(d):
                if drop[a] == j:
                    skip = True
            if skip:
                continue
            num = e[j]
            quad = 0.0
            for a in range(d):
                s = 0.0
                for c in range(p):
                    s += q[j, c] * q[drop[a], c]
                hjd[a] = s
                num += s * u[a]
            for a in range(d):
                for b in range(d):
                    quad += hjd[a] * m_inv[a, b] * hjd[b]
            den = 1.0 - h[j] - quad
            if den <= INFINITE:
                total = np.inf
            elif den <= SINGULAR:
                clear[f] = False
            total += (num / den) ** 2
        press[f] = total
    return press, clear


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _one_row_press(q, e, h, i, u, c):  # pragma: no cover - compiled
    """PRESS of the fold without pool row i (c = 1 / (1 - h_ii), u = c e_i) and whether it is
    clear of the leverage limit."""
    n, p = q.shape
    total = 0.0
    clear = True
    for j in range(n):
        if j == i:
            continue
        s = 0.0
        for k in range(p):
            s += q[j, k] * q[i, k]
        den = 1.0 - h[j] - s * s * c
        if den <= INFINITE:
            total = np.inf
        elif den <= SINGULAR:
            clear = False
        total += ((e[j] + s * u) / den) ** 2
    return total, clear


# --------------------------------------------------------------------------------------------
# The fold's fit and its prediction at the target


def _predict(fits: ModelFits, rows, chosen, target_W, tss, ok):
    """Per fold: predicted transformed parameter at its target, its prediction standard
    error, residual degrees of freedom, and whether the fit is safe with every VIF clear of
    the warning limit."""
    n_folds = len(rows)
    mean, std = np.full(n_folds, np.nan), np.full(n_folds, np.nan)
    dof = np.full(n_folds, np.nan)
    fine = ok.copy()
    groups: dict[tuple[int, ...], list[int]] = {}
    for f in np.flatnonzero(ok):
        groups.setdefault(chosen[f], []).append(f)
    for subset, members in groups.items():
        members = np.asarray(members)
        fit = fits(subset)
        if fit is None:
            fine[members] = False
            continue
        q, r, beta, residuals, _ = fit
        r_inv = np.linalg.solve(r, np.eye(r.shape[0]))
        ginv = r_inv @ r_inv.T
        at = np.column_stack([np.ones(len(members)), target_W[members][:, list(subset)]])
        out = _fold_fit(
            q,
            np.ascontiguousarray(r),
            ginv,
            beta,
            residuals,
            np.ascontiguousarray(rows[members]),
            np.ascontiguousarray(at),
        )
        centre, leverage, rss, diagonal, margin = out
        n_kept = len(fits.W) - (rows[members] >= 0).sum(axis=1)
        resid_dof = n_kept - r.shape[0]
        total_rss = float(residuals @ residuals)
        sigma2 = rss / resid_dof
        vif = tss[members][:, list(subset)] * diagonal[:, 1:]
        safe = (margin > SINGULAR) & (rss > 1e-6 * total_rss) & (resid_dof > 0)
        safe &= (vif < VIF_LIMIT * (1.0 - 1e-6)).all(axis=1)
        fine[members] &= safe
        mean[members] = centre
        std[members] = np.sqrt(sigma2 * (1.0 + leverage))
        dof[members] = resid_dof
    dof = np.where(fine, dof, 1.0)
    return mean, std, dof, fine


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _fold_fit(q, r, ginv, beta, e, rows, at):  # pragma: no cover - compiled
    """Per fold (pool rows ``rows[f]`` left out): x_t' b^(D), x_t' (A'A)^-1(D) x_t, RSS^(D),
    the diagonal of (A'A)^-1(D), and the smallest eigenvalue of I - H_DD."""
    n_folds = rows.shape[0]
    p = r.shape[0]
    centre = np.zeros(n_folds)
    leverage = np.zeros(n_folds)
    rss = np.full(n_folds, e @ e)
    diagonal = np.zeros((n_folds, p))
    margin = np.full(n_folds, np.inf)
    for f in range(n_folds):
        drop = _dropped(rows[f])
        d = len(drop)
        b = beta.copy()
        g = ginv.copy()
        if d > 0:
            ad = q[drop] @ r  # the dropped rows of the design, (d, p)
            bd = ad @ ginv  # (d, p)
            hdd = np.eye(d) - bd @ np.ascontiguousarray(ad.T)
            margin[f] = np.linalg.eigvalsh(hdd).min()
            if margin[f] <= 0.0:
                continue
            m_inv = np.linalg.inv(hdd)
            ed = e[drop]
            u = m_inv @ ed
            bt = np.ascontiguousarray(bd.T)
            b = beta - bt @ u
            g = ginv + bt @ (m_inv @ bd)
            rss[f] -= ed @ u
        x = at[f]
        centre[f] = x @ b
        leverage[f] = x @ g @ x
        for c in range(p):
            diagonal[f, c] = g[c, c]
    return centre, leverage, rss, diagonal, margin
