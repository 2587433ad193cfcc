"""Person scoring: EAP, MAP and ML theta with SEs.

All functions are vectorised over respondents; large inputs are processed in
chunks of rows so memory stays bounded. Responses are validated category codes
(0 .. K_j - 1) with NaN for items not administered.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.likelihood import (
    DEFAULT_CHUNK,
    QuadratureGrid,
    ResponseDesign,
    build_design,
    checked_responses,
    exp_by_rows,
    log_likelihood_grid,
    normal_log_weights,
    run_blocks,
    split_log_table,
)
from calibration.irt.models import (
    PROBABILITY_FLOOR,
    FloatArray,
    IntArray,
    ItemParameters,
    category_probabilities,
    category_probability_derivatives,
    information_from,
)
from calibration.vocabulary import SCORING_METHODS

METHOD_EAP = "eap"
METHOD_MAP = "map"
METHOD_ML = "ml"
METHODS = SCORING_METHODS


@dataclass(frozen=True)
class NormalPrior:
    """The latent density used for scoring: N(mean, sd^2)."""

    mean: float = 0.0
    sd: float = 1.0


@dataclass(frozen=True)
class ThetaScores:
    """Scores for a batch of respondents (arrays of shape (n_persons,)).

    ``extreme`` marks all-lowest / all-highest patterns; ``n_answered`` counts the
    items with an answer. For ML, ``theta`` of an extreme pattern follows the rule
    documented in :func:`ml_scores`.
    """

    theta: FloatArray
    se: FloatArray
    n_answered: IntArray
    extreme: np.ndarray
    method: str


def _extreme_low_high(design: ResponseDesign) -> tuple[np.ndarray, np.ndarray]:
    """All answered items in the lowest category / all in the highest (some answer given)."""
    some = design.n_answered > 0
    return some & (design.summed_score == 0), some & (design.summed_score == design.max_score)


def eap_scores(
    params: ItemParameters,
    responses: FloatArray,
    *,
    grid: QuadratureGrid | None = None,
    prior: NormalPrior | None = None,
    chunk_size: int = DEFAULT_CHUNK,
    workers: int | None = None,
    tables: tuple[FloatArray, FloatArray] | None = None,
) -> ThetaScores:
    """Expected a posteriori theta and posterior SD (Bock & Mislevy 1982).

    ``EAP = sum_q theta_q L(x|theta_q) w_q / sum_q L(x|theta_q) w_q`` on a rectangular
    grid with normal prior weights; ``PSD`` is the posterior standard deviation.
    A respondent with no answers gets the prior mean and SD. ``workers`` threads
    (default: the number of CPUs, at most 4) share the row blocks. ``tables`` are the
    log-probability tables of :func:`score_tables` for this grid, when the caller holds them.
    """
    grid = grid or QuadratureGrid()
    prior = prior or NormalPrior()
    x = checked_responses(responses, params.n_categories)
    points = grid.points
    log_prior = normal_log_weights(points, prior.mean, prior.sd)
    theta = np.empty(x.shape[0])
    psd = np.empty(x.shape[0])
    moments = np.stack([np.ones_like(points), points, points * points], axis=1)
    n_answered = np.empty(x.shape[0], dtype=np.int64)
    extreme = np.empty(x.shape[0], dtype=bool)
    if tables is None:
        tables = score_tables(params, grid)

    def block(rows: slice) -> None:
        design = build_design(x[rows], params.n_categories)
        low, high = _extreme_low_high(design)
        n_answered[rows], extreme[rows] = design.n_answered, low | high
        joint, _ = exp_by_rows(log_likelihood_grid(params, points, design, tables=tables, log_prior=log_prior))
        s0, s1, s2 = (joint @ moments).T
        mean = s1 / s0
        theta[rows] = mean
        psd[rows] = np.sqrt(np.maximum(s2 / s0 - mean * mean, 0.0))

    run_blocks(block, x.shape[0], chunk_size, workers=workers)
    return ThetaScores(theta=theta, se=psd, n_answered=n_answered, extreme=extreme, method=METHOD_EAP)


def score_tables(params: ItemParameters, grid: QuadratureGrid) -> tuple[FloatArray, FloatArray]:
    """Log-probability tables (baseline, contrasts) of a test on a grid: build once, score many times."""
    probe = np.zeros((1, params.n_items))
    return split_log_table(params, grid.points, build_design(probe, params.n_categories))


def _gradient_and_information(
    params: ItemParameters, codes: IntArray, answered: np.ndarray, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """d log L / d theta and test information at each respondent's theta (answered items only)."""
    prob = category_probabilities(params, theta)  # (n_items, K, n_persons)
    deriv = category_probability_derivatives(params, theta)
    picked = codes.T[:, None, :]
    p_answer = np.maximum(np.take_along_axis(prob, picked, axis=1)[:, 0, :], PROBABILITY_FLOOR)
    d_answer = np.take_along_axis(deriv, picked, axis=1)[:, 0, :]
    gradient = np.where(answered, (d_answer / p_answer).T, 0.0).sum(axis=1)
    information = np.where(answered, information_from(prob, deriv).T, 0.0).sum(axis=1)
    return gradient, information


def _newton_theta(
    params: ItemParameters,
    x: FloatArray,
    start: FloatArray,
    *,
    prior: NormalPrior | None,
    bound: float,
    max_iter: int = 50,
    tolerance: float = 1e-8,
) -> tuple[FloatArray, FloatArray]:
    """Fisher scoring for the mode of the (penalised) likelihood, vectorised over persons."""
    answered = ~np.isnan(x)
    codes = np.where(answered, x, 0).astype(np.int64)
    theta = np.clip(start.copy(), -bound, bound)
    active = np.ones(theta.shape[0], dtype=bool)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        gradient, info = _gradient_and_information(params, codes[idx], answered[idx], theta[idx])
        if prior is not None:
            gradient = gradient - (theta[idx] - prior.mean) / prior.sd**2
            info = info + 1.0 / prior.sd**2
        step = np.clip(gradient / np.maximum(info, 1e-12), -1.0, 1.0)
        theta[idx] = np.clip(theta[idx] + step, -bound, bound)
        active[idx] = np.abs(step) > tolerance
    _, info = _gradient_and_information(params, codes, answered, theta)
    if prior is not None:
        info = info + 1.0 / prior.sd**2
    with np.errstate(divide="ignore"):
        se = np.where(info > 0, 1.0 / np.sqrt(info), np.inf)
    return theta, se


def map_scores(
    params: ItemParameters,
    responses: FloatArray,
    *,
    prior: NormalPrior | None = None,
    grid: QuadratureGrid | None = None,
    chunk_size: int = DEFAULT_CHUNK,
) -> ThetaScores:
    """Maximum a posteriori theta with ``SE = (I(theta) + 1/sigma^2)^(-1/2)``.

    Started from the EAP, then Fisher scoring (expected information) to the mode.
    """
    prior = prior or NormalPrior()
    x = checked_responses(responses, params.n_categories)
    eap = eap_scores(params, x, grid=grid, prior=prior, chunk_size=chunk_size)
    theta = np.empty(x.shape[0])
    se = np.empty(x.shape[0])

    def block(rows: slice) -> None:
        theta[rows], se[rows] = _newton_theta(params, x[rows], eap.theta[rows], prior=prior, bound=10.0)

    run_blocks(block, x.shape[0], chunk_size, workers=None)
    return ThetaScores(theta=theta, se=se, n_answered=eap.n_answered, extreme=eap.extreme, method=METHOD_MAP)


def ml_scores(
    params: ItemParameters,
    responses: FloatArray,
    *,
    bound: float = 4.0,
    chunk_size: int = DEFAULT_CHUNK,
) -> ThetaScores:
    """Maximum likelihood theta with ``SE = I(theta)^(-1/2)``.

    Rule for extreme patterns (all answered items in the lowest category, or all in
    the highest): the ML estimate does not exist (the likelihood rises without
    limit), so theta is set to ``-bound`` / ``+bound`` (default +-4) with the SE
    from the information at that point, and ``extreme`` is True. Every other
    estimate is also kept within ``[-bound, bound]``. A respondent with no answers
    gets NaN.
    """
    x = checked_responses(responses, params.n_categories)
    design = build_design(x, params.n_categories)
    low, high = _extreme_low_high(design)
    extreme = low | high
    n_answered = design.n_answered
    theta = np.full(x.shape[0], np.nan)
    se = np.full(x.shape[0], np.nan)
    answered_any = n_answered > 0
    # Start from the proportion of the maximum score, stretched to the theta range.
    fraction = design.summed_score / np.maximum(design.max_score, 1.0)
    start = np.clip((fraction - 0.5) * 4.0, -bound, bound)

    def block(rows: slice) -> None:
        theta[rows], se[rows] = _newton_theta(params, x[rows], start[rows], prior=None, bound=bound)

    run_blocks(block, x.shape[0], chunk_size, workers=None)
    theta[extreme] = np.where(low[extreme], -bound, bound)
    if extreme.any():
        ext_rows = np.flatnonzero(extreme)
        _, se_ext = _newton_theta(params, x[ext_rows], theta[ext_rows], prior=None, bound=bound, max_iter=0)
        se[ext_rows] = se_ext
    theta[~answered_any] = np.nan
    se[~answered_any] = np.nan
    return ThetaScores(theta=theta, se=se, n_answered=n_answered, extreme=extreme, method=METHOD_ML)


def score(
    params: ItemParameters,
    responses: FloatArray,
    *,
    method: str = METHOD_EAP,
    grid: QuadratureGrid | None = None,
    prior: NormalPrior | None = None,
    ml_bound: float = 4.0,
    tables: tuple[FloatArray, FloatArray] | None = None,
) -> ThetaScores:
    """Dispatch to :func:`eap_scores`, :func:`map_scores` or :func:`ml_scores` (``tables``: EAP only)."""
    if method == METHOD_EAP:
        return eap_scores(params, responses, grid=grid, prior=prior, tables=tables)
    if method == METHOD_MAP:
        return map_scores(params, responses, grid=grid, prior=prior)
    if method == METHOD_ML:
        return ml_scores(params, responses, bound=ml_bound)
    raise ValueError(f"unknown scoring method {method!r}; use one of {', '.join(METHODS)}")
