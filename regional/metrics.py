"""Goodness-of-fit of simulated against observed flow: pure functions on arrays.

Every function takes ``obs`` shaped (time,) or (time, n) and ``sim`` of the same shape or with
one column shared by all; axis 0 is time. Days where ``obs`` is NaN are masked. A score is NaN
(with a :class:`DegenerateSeriesWarning`) when fewer than two days are observed or the observed
series is constant, never a crash.

References
----------
Nash, J. E., Sutcliffe, J. V. (1970): River flow forecasting through conceptual models part I,
J. Hydrol. 10, 282-290 (NSE).
Gupta, H. V., Kling, H., Yilmaz, K. K., Martinez, G. F. (2009): Decomposition of the mean squared
error and NSE performance criteria, J. Hydrol. 377, 80-91 (KGE and its parts r, alpha, beta).
Pushpalatha, R., Perrin, C., Le Moine, N., Andreassian, V. (2012): A review of efficiency criteria
suitable for evaluating low-flow simulations, J. Hydrol. 420-421, 171-182 (log-NSE, and the
constant added before the logarithm: one hundredth of the mean observed flow).
Chiew, F. H. S., Stewardson, M. J., McMahon, T. A. (1993): Comparison of six rainfall-runoff
modelling approaches, J. Hydrol. 147, 1-36 (NSE of square-root flow). Oudin, L., Andreassian,
V., Mathevet, T., Perrin, C., Michel, C. (2006): Dynamic averaging of rainfall-runoff model
simulations from complementary model parameterizations, Water Resour. Res. 42, W07410
(criteria on flow and on transformed flow combined).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import NamedTuple

import numpy as np

LOG_OFFSET_SHARE = 0.01
"""Constant added to flows before the logarithm in log-NSE, as a share of mean observed flow."""


class DegenerateSeriesWarning(UserWarning):
    """The observed series is constant or nearly empty: the score is undefined (NaN)."""


class KGEParts(NamedTuple):
    """KGE and its three parts (Gupta et al. 2009)."""

    kge: np.ndarray
    r: np.ndarray
    alpha: np.ndarray
    beta: np.ndarray


def _align(obs, sim) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    obs = np.asarray(obs, dtype=float)
    sim = np.asarray(sim, dtype=float)
    one_d = obs.ndim == 1 and sim.ndim == 1
    obs2 = obs[:, None] if obs.ndim == 1 else obs
    sim2 = sim[:, None] if sim.ndim == 1 else sim
    if obs2.shape[0] != sim2.shape[0]:
        raise ValueError(f"obs and sim differ in length: {obs2.shape[0]} and {sim2.shape[0]} days")
    obs2, sim2 = np.broadcast_arrays(obs2, sim2)
    mask = np.isfinite(obs2)
    return obs2, sim2, mask, one_d


def _finish(score: np.ndarray, one_d: bool):
    return float(score[0]) if one_d else score


def _masked_moments(obs, sim, mask):
    count = mask.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        obs0 = np.where(mask, obs, 0.0)
        sim0 = np.where(mask, sim, 0.0)
        mean_obs = obs0.sum(axis=0) / count
        mean_sim = sim0.sum(axis=0) / count
        dev_obs = np.where(mask, obs - mean_obs, 0.0)
        dev_sim = np.where(mask, sim - mean_sim, 0.0)
    return count, mean_obs, mean_sim, dev_obs, dev_sim


def _degenerate(count, dev_obs) -> np.ndarray:
    bad = (count < 2) | ~((dev_obs**2).sum(axis=0) > 0)
    if bad.any():
        warnings.warn(
            f"{int(bad.sum())} series have fewer than 2 observed days or constant observed "
            "flow; their score is NaN",
            DegenerateSeriesWarning,
            stacklevel=3,
        )
    return bad


def nse(obs, sim):
    """Nash-Sutcliffe efficiency, 1 - sum((sim - obs)^2) / sum((obs - mean(obs))^2).

    Parameters
    ----------
    obs, sim : array_like, shape (time,) or (time, n)
        Observed (NaN = missing) and simulated flow, any consistent unit.

    Returns
    -------
    float or ndarray (n,)
        NSE, dimensionless, in (-inf, 1]; NaN for a degenerate observed series.
    """
    obs, sim, mask, one_d = _align(obs, sim)
    count, _, _, dev_obs, _ = _masked_moments(obs, sim, mask)
    bad = _degenerate(count, dev_obs)
    sse = np.where(mask, (sim - obs) ** 2, 0.0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        score = 1.0 - sse / (dev_obs**2).sum(axis=0)
    return _finish(np.where(bad, np.nan, score), one_d)


def kge_parts(obs, sim) -> KGEParts:
    """Kling-Gupta efficiency with its parts (Gupta et al. 2009).

    KGE = 1 - sqrt((r - 1)^2 + (alpha - 1)^2 + (beta - 1)^2), with r the Pearson correlation,
    alpha = std(sim) / std(obs) and beta = mean(sim) / mean(obs), over the observed days.

    Returns
    -------
    KGEParts
        ``kge``, ``r``, ``alpha``, ``beta`` (floats for 1-D input, else (n,) arrays).
    """
    obs, sim, mask, one_d = _align(obs, sim)
    count, mean_obs, mean_sim, dev_obs, dev_sim = _masked_moments(obs, sim, mask)
    bad = _degenerate(count, dev_obs)
    with np.errstate(invalid="ignore", divide="ignore"):
        ss_obs = (dev_obs**2).sum(axis=0)
        ss_sim = (dev_sim**2).sum(axis=0)
        r = (dev_obs * dev_sim).sum(axis=0) / np.sqrt(ss_obs * ss_sim)
        alpha = np.sqrt(ss_sim / ss_obs)
        beta = mean_sim / mean_obs
        score = 1.0 - np.sqrt((r - 1.0) ** 2 + (alpha - 1.0) ** 2 + (beta - 1.0) ** 2)
    parts = [np.where(bad, np.nan, x) for x in (score, r, alpha, beta)]
    return KGEParts(*(_finish(x, one_d) for x in parts))


def kge(obs, sim):
    """Kling-Gupta efficiency (Gupta et al. 2009); see :func:`kge_parts`."""
    return kge_parts(obs, sim).kge


def log_nse(obs, sim):
    """NSE of log(flow + c), c = 0.01 x mean observed flow (Pushpalatha et al. 2012).

    The constant keeps zero flows finite and is the same for obs and sim; it is computed per
    series from the observed days. Negative simulated flows (round-off) are clipped to 0.
    """
    obs, sim, mask, one_d = _align(obs, sim)
    count = mask.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        offset = LOG_OFFSET_SHARE * np.where(mask, obs, 0.0).sum(axis=0) / count
        log_obs = np.log(np.where(mask, np.maximum(obs, 0.0), 0.0) + offset)
        log_sim = np.log(np.maximum(sim, 0.0) + offset)
    log_obs = np.where(mask, log_obs, np.nan)
    return nse(log_obs[:, 0] if one_d else log_obs, log_sim[:, 0] if one_d else log_sim)


def pbias(obs, sim):
    """Percent bias, 100 x sum(sim - obs) / sum(obs) over the observed days (positive = too wet).

    Returns
    -------
    float or ndarray (n,)
        Percent; NaN when the observed volume is zero or fewer than 2 days are observed.
    """
    obs, sim, mask, one_d = _align(obs, sim)
    count, _, _, dev_obs, _ = _masked_moments(obs, sim, mask)
    volume = np.where(mask, obs, 0.0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        score = 100.0 * np.where(mask, sim - obs, 0.0).sum(axis=0) / volume
    bad = (count < 2) | (volume == 0)
    return _finish(np.where(bad, np.nan, score), one_d)


def nse_blend(obs, sim):
    """Mean of the NSE of flow and the NSE of its square root: a compromise objective.

    NSE on flow weighs the peaks; on the square root of flow the errors are spread more evenly
    over high and low flows (Chiew, Stewardson and McMahon 1993; Oudin et al. 2006, who
    combine criteria on flow and transformed flow for complementary parameter sets; from
    memory). The mean of the two keeps the peaks without sacrificing the recessions, which
    ungauged estimates of low-flow statistics need. Negative simulated flows (round-off) are
    clipped to 0 before the root.

    Returns
    -------
    float or ndarray (n,)
        Dimensionless, in (-inf, 1]; NaN for a degenerate observed series.
    """
    obs = np.asarray(obs, dtype=float)
    sim = np.asarray(sim, dtype=float)
    with np.errstate(invalid="ignore"):
        root_obs = np.sqrt(np.maximum(obs, 0.0))
    root_obs = np.where(np.isfinite(obs), root_obs, np.nan)
    root_sim = np.sqrt(np.maximum(sim, 0.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegenerateSeriesWarning)
        root = nse(root_obs, root_sim)
    return 0.5 * (nse(obs, sim) + root)


OBJECTIVES = {"kge": kge, "nse": nse, "log_nse": log_nse, "nse_blend": nse_blend}
"""Calibration objectives by config name (higher is better for all)."""


def objective_scorer(
    objective: str, obs: np.ndarray
) -> Callable[[np.ndarray, np.ndarray | None], np.ndarray]:
    """The objective against fixed observed series, prepared for many simulations.

    ``score(sim, columns)[i]`` equals ``OBJECTIVES[objective](obs[:, columns[i]], sim[:, i])``
    (without its warning where that is NaN): the masks, means and spreads of the observations
    are computed once, as a search scores hundreds of simulations against the same series.

    Parameters
    ----------
    objective : str
        A key of :data:`OBJECTIVES`.
    obs : ndarray, shape (time,) or (time, n_series)
        Observed flow; NaN = not scored.

    Returns
    -------
    callable
        ``score(sim, columns=None)``: ``sim`` (time, m) on the same days, ``columns`` (m,) the
        observed series of each simulation (default: series 0 for all) -> (m,) scores, NaN for
        a series with fewer than 2 scored days or constant observations.
    """
    if objective not in OBJECTIVES:
        raise ValueError(f"unknown objective {objective!r}; choose one of {', '.join(OBJECTIVES)}")
    obs = np.asarray(obs, dtype=float)
    obs = obs[:, None] if obs.ndim == 1 else obs
    mask = np.isfinite(obs)
    count = mask.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(mask, obs, 0.0).sum(axis=0) / count
    if objective == "log_nse":
        offset = LOG_OFFSET_SHARE * mean
        with np.errstate(invalid="ignore", divide="ignore"):
            log_obs = np.log(np.where(mask, np.maximum(obs, 0.0), 1.0) + offset)
        score_log = _moments_scorer("nse", np.where(mask, log_obs, np.nan))

        def score(sim, columns=None):
            columns = _columns(columns, sim)
            with np.errstate(invalid="ignore", divide="ignore"):
                return score_log(np.log(np.maximum(sim, 0.0) + offset[columns]), columns)

        return score
    if objective == "nse_blend":
        score_flow = _moments_scorer("nse", obs)
        with np.errstate(invalid="ignore"):
            score_root = _moments_scorer("nse", np.sqrt(np.maximum(obs, 0.0)))

        def score(sim, columns=None):
            root = np.sqrt(np.maximum(sim, 0.0))
            return 0.5 * (score_flow(sim, columns) + score_root(root, columns))

        return score
    return _moments_scorer(objective, obs)


def _columns(columns, sim) -> np.ndarray:
    return np.zeros(sim.shape[1], dtype=np.int64) if columns is None else np.asarray(columns)


def _moments_scorer(objective: str, obs: np.ndarray):
    """NSE or KGE against masked observations (time, n_series), moments computed once."""
    mask = np.isfinite(obs)
    count = mask.sum(axis=0)
    weight = mask.astype(float)
    obs0 = np.where(mask, obs, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_obs = obs0.sum(axis=0) / count
        dev_obs = np.where(mask, obs - mean_obs, 0.0)
    ss_obs = (dev_obs**2).sum(axis=0)
    bad = (count < 2) | ~(ss_obs > 0)

    def score(sim: np.ndarray, columns=None) -> np.ndarray:
        columns = _columns(columns, sim)
        w = weight[:, columns]
        with np.errstate(invalid="ignore", divide="ignore"):
            if objective == "nse":
                sse = (w * (sim - obs0[:, columns]) ** 2).sum(axis=0)
                value = 1.0 - sse / ss_obs[columns]
            else:
                mean_sim = (w * sim).sum(axis=0) / count[columns]
                dev_sim = w * (sim - mean_sim)
                ss_sim = (dev_sim**2).sum(axis=0)
                d_obs = dev_obs[:, columns]
                r = (d_obs * dev_sim).sum(axis=0) / np.sqrt(ss_obs[columns] * ss_sim)
                alpha = np.sqrt(ss_sim / ss_obs[columns])
                beta = mean_sim / mean_obs[columns]
                value = 1.0 - np.sqrt((r - 1.0) ** 2 + (alpha - 1.0) ** 2 + (beta - 1.0) ** 2)
        return np.where(bad[columns], np.nan, value)

    return score


def all_scores(obs, sim) -> dict[str, np.ndarray]:
    """Every metric at once: nse, kge, kge_r, kge_alpha, kge_beta, log_nse, pbias, n_days."""
    parts = kge_parts(obs, sim)
    obs_array = np.asarray(obs, dtype=float)
    return {
        "nse": nse(obs, sim),
        "kge": parts.kge,
        "kge_r": parts.r,
        "kge_alpha": parts.alpha,
        "kge_beta": parts.beta,
        "log_nse": log_nse(obs, sim),
        "pbias": pbias(obs, sim),
        "n_days": np.isfinite(obs_array).sum(axis=0),
    }
