"""Person fit: the standardized log-likelihood statistic, with Snijders' correction for an estimated theta."""

from __future__ import annotations

import numpy as np

from calibration.irt.likelihood import DEFAULT_CHUNK, checked_responses, run_blocks
from calibration.irt.models import (
    PROBABILITY_FLOOR,
    FloatArray,
    ItemParameters,
    category_probabilities,
    category_probability_derivatives,
)
from calibration.irt.scoring import NormalPrior


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
    answered = ~np.isnan(x)
    codes = np.where(answered, x, 0).astype(np.int64)
    theta = np.asarray(theta, dtype=np.float64)
    out = np.full(x.shape[0], np.nan)
    k = np.arange(params.max_categories)

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

        p1 = params.intercepts[:, 0] + theta[rows, None] * a
        np.negative(p1, out=p1)
        with np.errstate(over="ignore"):
            np.exp(p1, out=p1)
        p1 += 1.0
        np.reciprocal(p1, out=p1)
        p0 = 1.0 - p1
        d = p1 * p0
        log_ratio = np.log(np.maximum(p1, PROBABILITY_FLOOR))
        log_ratio -= np.log(np.maximum(p0, PROBABILITY_FLOOR))  # w1 - w0 before the correction
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
        # Plain probabilities suffice here (no far-tail precision needed); floor them before the log.
        prob = np.moveaxis(category_probabilities(params, theta[rows]), 2, 0)  # (n, J, K)
        log_p = np.log(np.maximum(prob, PROBABILITY_FLOOR))
        ok = answered[rows]
        observed = (codes[rows][:, :, None] == k[None, None, :]).astype(np.float64)  # one-hot x_jk
        residual = np.where(ok[:, :, None], observed - prob, 0.0)
        statistic = np.sum(residual * log_p, axis=(1, 2))  # l0 - E[l0]
        weights = log_p
        if corrected:
            deriv = np.moveaxis(category_probability_derivatives(params, theta[rows]), 2, 0)
            r = np.where(prob > PROBABILITY_FLOOR, deriv / np.maximum(prob, PROBABILITY_FLOOR), 0.0)
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
