"""Logistic-regression DIF (Swaminathan & Rogers 1990) for right/wrong and graded items.

One fitter serves both: the cumulative (proportional-odds) logit
``P(Y >= k | x) = logistic(alpha_k + x @ beta)``, k = 1 .. K-1, which for K = 2 is
ordinary logistic regression. Three nested models on the matching score X and the
group indicator G: M1 = X, M2 = X + G, M3 = X + G + X*G. M1 vs M3 is the 2-df
omnibus test, M1 vs M2 uniform DIF, M2 vs M3 non-uniform DIF. The effect size is
the change in Nagelkerke's (1991) R-squared.

Flag levels (Jodoin & Gierl 2001, recalled from memory): with omnibus p <= .01,
delta R^2 < .035 negligible, .035 - .070 moderate, >= .070 large.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from calibration.irt.models import PROBABILITY_FLOOR, FloatArray, boundary_jacobian, log_boundary_difference

NAGELKERKE_MODERATE = 0.035
NAGELKERKE_LARGE = 0.070
LOGISTIC_ALPHA = 0.01


def cumulative_logit_loglik(
    y: FloatArray, x: FloatArray, thresholds: FloatArray, beta: FloatArray, weights: FloatArray | None = None
) -> float:
    """Log-likelihood of the cumulative logit at the given parameters (categories 0 .. K-1)."""
    eta = x @ beta if x.shape[1] else np.zeros(y.shape[0])
    z = eta[:, None] + thresholds[None, :]  # (n, K-1)
    padded = np.concatenate([np.full((y.size, 1), np.inf), z, np.full((y.size, 1), -np.inf)], axis=1)
    rows, yi = np.arange(y.size), y.astype(np.int64)
    terms = log_boundary_difference(padded[rows, yi], padded[rows, yi + 1])
    return float(terms.sum() if weights is None else weights @ terms)


@dataclass(frozen=True)
class CumulativeLogitFit:
    """Estimates of a cumulative logit: thresholds (intercepts), covariate coefficients, log-likelihood."""

    thresholds: FloatArray
    beta: FloatArray
    log_likelihood: float
    converged: bool


def fit_cumulative_logit(
    y: FloatArray, x: FloatArray, n_categories: int, *, weights: FloatArray | None = None, max_iter: int = 100
) -> CumulativeLogitFit:
    """Maximum likelihood by Fisher scoring with step halving.

    Parameters
    ----------
    y : array of shape (n,), codes 0 .. n_categories - 1 (each used at least once)
    x : array of shape (n, p) of covariates (no constant column: the thresholds are the intercepts)
    weights : array of shape (n,), frequency weights (rows standing for several identical rows)
    """
    n, p = x.shape
    m = n_categories - 1
    w_rows = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    cum = np.array([w_rows @ (y >= k) / w_rows.sum() for k in range(1, n_categories)])
    cum = np.clip(cum, 1e-4, 1 - 1e-4)
    thresholds = np.log(cum / (1 - cum))
    beta = np.zeros(p)
    ll = cumulative_logit_loglik(y, x, thresholds, beta, w_rows)
    yi = y.astype(np.int64)
    converged = False
    for _ in range(max_iter):
        eta = x @ beta if p else np.zeros(n)
        star = np.ones((n, m + 2))
        star[:, m + 1] = 0.0
        star[:, 1 : m + 1] = 1.0 / (1.0 + np.exp(-(eta[:, None] + thresholds[None, :])))
        prob = np.maximum(star[:, :-1] - star[:, 1:], PROBABILITY_FLOOR)  # (n, K)
        # Jacobian of P(Y = k) over (thresholds, beta): (n, K, m + p)
        d_thresholds, d_eta = boundary_jacobian(star * (1 - star))
        jac = np.concatenate([d_thresholds, d_eta[:, :, None] * x[:, None, :]], axis=2)
        observed = jac[np.arange(n), yi, :] / prob[np.arange(n), yi][:, None]
        gradient = w_rows @ observed
        information = np.einsum("nk,nkp,nkr->pr", w_rows[:, None] / prob, jac, jac)
        step = np.linalg.solve(information + 1e-10 * np.eye(m + p), gradient)
        scale = 1.0
        for _halving in range(30):
            new_t = thresholds + scale * step[:m]
            new_b = beta + scale * step[m:]
            if m == 1 or np.all(np.diff(new_t) < 0):
                new_ll = cumulative_logit_loglik(y, x, new_t, new_b, w_rows)
                if new_ll >= ll - 1e-12:
                    break
            scale *= 0.5
        else:
            break
        thresholds, beta = new_t, new_b
        change = new_ll - ll
        ll = new_ll
        if np.max(np.abs(scale * step)) < 1e-9 or abs(change) < 1e-12:
            converged = True
            break
    return CumulativeLogitFit(thresholds=thresholds, beta=beta, log_likelihood=ll, converged=converged)


def nagelkerke_r2(log_lik: float, log_lik_null: float, n: int) -> float:
    """``(1 - exp(2 (LL0 - LL) / n)) / (1 - exp(2 LL0 / n))`` (Nagelkerke 1991)."""
    denominator = 1.0 - math.exp(2.0 * log_lik_null / n)
    return (1.0 - math.exp(2.0 * (log_lik_null - log_lik) / n)) / denominator if denominator > 0 else 0.0


@dataclass(frozen=True)
class LogisticDifResult:
    """Logistic-regression DIF of one item in one focal group: tests, delta R-squared and its level."""

    chi_square_omnibus: float
    p_omnibus: float
    chi_square_uniform: float
    p_uniform: float
    chi_square_nonuniform: float
    p_nonuniform: float
    delta_r2: float
    delta_r2_uniform: float
    level: str  # negligible / moderate / large
    log_likelihoods: tuple[float, float, float, float]  # null, M1, M2, M3


def logistic_dif(y: FloatArray, matching: FloatArray, is_focal: np.ndarray, n_categories: int) -> LogisticDifResult:
    """The three nested models for one item and one focal group (rows already selected).

    Rows are collapsed to distinct (matching score, group, answer) cells with frequency
    weights first: the likelihood is the same and the fits are a hundred times smaller.
    """
    n = y.size
    z_all = (matching - matching.mean()) / (matching.std() or 1.0)
    cells, counts = np.unique(np.column_stack([z_all, is_focal.astype(np.float64), y]), axis=0, return_counts=True)
    z, g, y_cells = cells[:, 0], cells[:, 1], cells[:, 2]
    w = counts.astype(np.float64)
    x3 = np.column_stack([z, g, z * g])
    null = fit_cumulative_logit(y_cells, x3[:, :0], n_categories, weights=w).log_likelihood
    m1 = fit_cumulative_logit(y_cells, x3[:, :1], n_categories, weights=w).log_likelihood
    m2 = fit_cumulative_logit(y_cells, x3[:, :2], n_categories, weights=w).log_likelihood
    m3 = fit_cumulative_logit(y_cells, x3, n_categories, weights=w).log_likelihood
    omnibus = max(2 * (m3 - m1), 0.0)
    uniform = max(2 * (m2 - m1), 0.0)
    nonuniform = max(2 * (m3 - m2), 0.0)
    r1, r2, r3 = (nagelkerke_r2(ll, null, n) for ll in (m1, m2, m3))
    p_omnibus = float(stats.chi2.sf(omnibus, 2))
    delta = r3 - r1
    level = "negligible"
    if p_omnibus <= LOGISTIC_ALPHA and delta >= NAGELKERKE_LARGE:
        level = "large"
    elif p_omnibus <= LOGISTIC_ALPHA and delta >= NAGELKERKE_MODERATE:
        level = "moderate"
    return LogisticDifResult(
        chi_square_omnibus=omnibus,
        p_omnibus=p_omnibus,
        chi_square_uniform=uniform,
        p_uniform=float(stats.chi2.sf(uniform, 1)),
        chi_square_nonuniform=nonuniform,
        p_nonuniform=float(stats.chi2.sf(nonuniform, 1)),
        delta_r2=delta,
        delta_r2_uniform=r2 - r1,
        level=level,
        log_likelihoods=(null, m1, m2, m3),
    )
