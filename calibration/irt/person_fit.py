"""Person fit: the standardized log-likelihood statistic, with Snijders' correction for an estimated theta."""

from __future__ import annotations

import numpy as np

from calibration.irt.likelihood import DEFAULT_CHUNK, checked_responses, run_blocks
from calibration.irt.models import (
    PROBABILITY_FLOOR,
    FloatArray,
    ItemParameters,
    category_probabilities,
    cumulative_probabilities,
    log_category_probabilities,
)
from calibration.irt.scoring import EXPONENT_LIMIT, NormalPrior

LOG_FLOOR = float(np.log(PROBABILITY_FLOOR))
"""Weights of categories an item lacks (probability 0) are held at this finite log."""
PRECISE_BELOW = 1e-6
"""Rows with a category probability below this take their logs computed in log space (error below 1e-10)."""


def person_fit_lz(
    params: ItemParameters,
    responses: FloatArray,
    theta: FloatArray,
    *,
    corrected: bool = False,
    prior: NormalPrior | None = None,
) -> FloatArray:
    """Standardized log-likelihood person fit at each respondent's theta.

    Uncorrected, ``l_z = (l0 - E[l0]) / sqrt(Var[l0])`` over the answered items (Drasgow, Levine &
    Williams 1985), with ``w_jk = log P_jk``. With ``corrected=True`` it is ``l_z*`` (Snijders 2001),
    which allows for theta being estimated: with ``r_jk = P'_jk / P_jk`` (the estimating equation's
    weights), ``c = sum P'_jk w_jk / sum P'_jk r_jk`` and ``w~_jk = w_jk - c r_jk``,
    ``l_z* = (sum_jk (x_jk - P_jk) w_jk + c r_0) / sqrt(sum_j Var_j(w~))``, where ``r_0`` is the prior's
    term of the estimating equation (0 for ML, ``-(theta - mean) / sd^2`` for MAP, used for EAP too).
    For right/wrong items this is Snijders' formula; the category form for graded items follows
    Sinharay (2016). Both recalled from memory and checked by simulation in the tests (mean near 0,
    SD near 1 under the model). NaN with no answers. Large negative values mean an unlikely pattern.
    """
    x = checked_responses(responses, params.n_categories)
    return checked_person_fit_lz(params, x, theta, corrected=corrected, prior=prior)


def checked_person_fit_lz(
    params: ItemParameters,
    x: FloatArray,
    theta: FloatArray,
    *,
    corrected: bool = False,
    prior: NormalPrior | None = None,
) -> FloatArray:
    """:func:`person_fit_lz` of answers that have already passed :func:`checked_responses` (float64 codes or
    NaN); the bundle scorer's, checked by the scoring call just before, so a single vector is not checked twice."""
    answered = ~np.isnan(x)
    codes = np.where(answered, x, 0).astype(np.int64)
    theta = np.asarray(theta, dtype=np.float64)
    out = np.full(x.shape[0], np.nan)
    k = np.arange(params.max_categories)
    exists = (k[None, :] < params.n_categories[:, None])[None]  # (1, J, K)

    def dichotomous(rows: slice) -> None:
        # The same statistic with every item right/wrong: (n, J) arrays instead of (n, J, K). With
        # d = P1 P0 the derivatives are dP1/dtheta = a d and r1 - r0 = a, so every weighted sum is a
        # product of an (n, J) array with a, a^2 or ones (over the answered items only).
        ok = answered[rows]
        some = ok.sum(axis=1) > 0
        mask = None if ok.all() else ok
        a = params.slopes

        def total(terms: FloatArray, weights: FloatArray) -> FloatArray:
            return (terms if mask is None else np.where(mask, terms, 0.0)) @ weights

        # w1 - w0 = log P1 - log P0 is the logit itself: exact however far out, where 1 - P1 computed from P1
        # would round to 0 (logit above about 37) and a floored log would stand in for it.
        log_ratio = params.intercepts[:, 0] + theta[rows, None] * a
        np.clip(log_ratio, -EXPONENT_LIMIT, EXPONENT_LIMIT, out=log_ratio)  # a finite exponential below
        odds_against = np.exp(-log_ratio)
        p1 = odds_against + 1.0
        np.reciprocal(p1, out=p1)
        p0 = odds_against * p1  # P0 = exp(-z) / (1 + exp(-z)), with its own precision in the upper tail
        d = p1 * p0
        statistic = total((codes[rows] - p1) * log_ratio, np.ones_like(a))
        if corrected:
            slope_w, slope_r = total(d * log_ratio, a), total(d, a * a)
            c = np.where(slope_r > 0, slope_w / np.maximum(slope_r, PROBABILITY_FLOOR), 0.0)
            log_ratio -= c[:, None] * a  # w~1 - w~0 = (w1 - w0) - c (r1 - r0)
            if prior is not None:
                statistic = statistic + c * (-(theta[rows] - prior.mean) / prior.sd**2)
        log_ratio *= log_ratio
        var = total(d * log_ratio, np.ones_like(a))
        with np.errstate(invalid="ignore", divide="ignore"):
            out[rows] = np.where(some & (var > 0), statistic / np.sqrt(var), np.nan)

    def block(rows: slice) -> None:
        prob = np.moveaxis(category_probabilities(params, theta[rows]), 2, 0)  # (n, J, K)
        log_p = np.log(np.maximum(prob, PROBABILITY_FLOOR))
        # A probability computed as a difference keeps about 1e-16 absolute precision, so its log loses
        # precision as it shrinks (and far out it rounds to 0, a floor's log standing in for the weight of an
        # answer there): rows with a category below PRECISE_BELOW take their logs computed in log space.
        tiny = np.flatnonzero(((prob < PRECISE_BELOW) & exists).any(axis=(1, 2)))
        if tiny.size:
            precise = np.moveaxis(log_category_probabilities(params, theta[rows][tiny]), 2, 0)
            log_p[tiny] = np.maximum(precise, LOG_FLOOR)  # categories an item lacks keep a finite weight
        ok = answered[rows]
        observed = (codes[rows][:, :, None] == k[None, None, :]).astype(np.float64)  # one-hot x_jk
        residual = np.where(ok[:, :, None], observed - prob, 0.0)
        statistic = np.sum(residual * log_p, axis=(1, 2))  # l0 - E[l0]
        weights = log_p
        if corrected:
            r = _log_derivatives(params, theta[rows], prob)
            r *= exists
            deriv = prob * r
            slope_w = np.sum(np.where(ok[:, :, None], deriv * log_p, 0.0), axis=(1, 2))
            slope_r = np.sum(np.where(ok[:, :, None], deriv * r, 0.0), axis=(1, 2))
            c = np.where(slope_r > 0, slope_w / np.maximum(slope_r, PROBABILITY_FLOOR), 0.0)
            weights = log_p - c[:, None, None] * r
            if prior is not None:
                statistic = statistic + c * (-(theta[rows] - prior.mean) / prior.sd**2)
        mean_j = np.sum(prob * weights, axis=2)
        var_j = np.sum(prob * weights * weights, axis=2) - mean_j**2
        var = np.where(ok, var_j, 0.0).sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[rows] = np.where((ok.sum(axis=1) > 0) & (var > 0), statistic / np.sqrt(var), np.nan)

    run_blocks(
        dichotomous if params.max_categories == 2 and params.cumulative_only else block,
        x.shape[0],
        DEFAULT_CHUNK,
        workers=None,
    )
    return out


def _log_derivatives(params: ItemParameters, theta: FloatArray, prob: FloatArray) -> FloatArray:
    """``r_jk = d log P_jk / d theta`` at each theta, (n, J, K), without dividing by a category's probability
    (which far into the tails rounds to 0 or to noise; ``prob`` (n, J, K) serves where it is safe).

    Cumulative items: ``P_k = P*_k - P*_{k+1}`` and ``dP_k / d theta = a P_k (1 - P*_k - P*_{k+1})``, so
    ``r_k = a (1 - P*_k - P*_{k+1})``. A 3PL item's wrong answer is its 2PL part's, ``-a s``; its right
    answer ``a (1 - s) (1 - g) s / P_1`` (``P_1 >= g``). Partial-credit items: ``a (k - mean)``.
    """
    star = np.moveaxis(cumulative_probabilities(params, theta), 2, 0)  # (n, J, K + 1)
    r = 1.0 - star[:, :, :-1]
    r -= star[:, :, 1:]
    r *= params.slopes[None, :, None]
    guessed = np.flatnonzero(params.has_guessing & (params.guessing > 0))
    if guessed.size:
        g = params.guessing[guessed]
        r[:, guessed, 1] *= (1.0 - g) * star[:, guessed, 1] / prob[:, guessed, 1]
    steps = np.flatnonzero(params.adjacent)
    if steps.size:
        k = np.arange(params.max_categories)
        mean = (prob[:, steps] * k).sum(axis=2, keepdims=True)
        r[:, steps] = params.slopes[steps][None, :, None] * (k - mean)
    return r
