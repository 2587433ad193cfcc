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


def _right_wrong_curves(
    params: ItemParameters, codes: IntArray, answered: np.ndarray, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Right/wrong items: ``d log L / d theta = sum a (x - P)`` and ``sum a^2 P (1 - P)``, which is both
    minus the second derivative and the expected information (answered items only)."""
    a = params.slopes
    with np.errstate(over="ignore"):
        p = 1.0 / (1.0 + np.exp(-(theta[:, None] * a + params.intercepts[:, 0])))
    if answered.all():
        return (codes - p) @ a, (p * (1.0 - p)) @ (a * a)
    gradient = np.where(answered, a * (codes - p), 0.0).sum(axis=1)
    information = np.where(answered, a * a * p * (1.0 - p), 0.0).sum(axis=1)
    return gradient, information


def _answer_bounds(params: ItemParameters, codes: IntArray) -> tuple[FloatArray, FloatArray]:
    """Intercepts of each answer's two boundaries, ``c_x`` and ``c_{x+1}`` (``+inf`` below category 1,
    ``-inf`` above the top): (n, J) each, built once per batch."""
    padded = np.full((params.n_items, params.max_categories + 1), -np.inf)
    padded[:, 0] = np.inf
    for j, k in enumerate(params.n_categories):
        padded[j, 1:k] = params.intercepts[j, : k - 1]
    items = np.arange(params.n_items)
    return padded[items, codes], padded[items, codes + 1]


def _answer_curves(
    params: ItemParameters, lower: FloatArray, upper: FloatArray, answered: np.ndarray, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """d log P(answer) / d theta and minus its second derivative, summed over the answered items.

    Only the answered category's two boundaries are evaluated, ``P_x = P*_x - P*_{x+1}`` with
    ``P*_0 = 1`` and ``P*_K = 0``: (n, J) arrays, not (n, J, K).
    """
    a = params.slopes
    eta = theta[:, None] * a
    with np.errstate(over="ignore", invalid="ignore"):
        star_lo = 1.0 / (1.0 + np.exp(-(eta + lower)))
        star_hi = 1.0 / (1.0 + np.exp(-(eta + upper)))
    w_lo, w_hi = star_lo * (1.0 - star_lo), star_hi * (1.0 - star_hi)
    p_answer = np.maximum(star_lo - star_hi, PROBABILITY_FLOOR)
    first = a * (w_lo - w_hi) / p_answer
    second = a * a * (w_lo * (1.0 - 2.0 * star_lo) - w_hi * (1.0 - 2.0 * star_hi)) / p_answer
    gradient = np.where(answered, first, 0.0).sum(axis=1)
    return gradient, np.where(answered, first * first - second, 0.0).sum(axis=1)


def _expected_information(params: ItemParameters, answered: np.ndarray, theta: FloatArray) -> FloatArray:
    """Test information ``sum_j sum_k (dP_jk/dtheta)^2 / P_jk`` over the answered items, category by category.

    (n, J) arrays per boundary, not (J, K, n): ``P_k = P*_k - P*_{k+1}``, ``P'_k = a (W_k - W_{k+1})``.
    """
    a = params.slopes
    eta = theta[:, None] * a
    total = np.zeros_like(eta)
    upper_star, upper_w = np.ones_like(eta), np.zeros_like(eta)  # boundary 0: P* = 1, W = 0
    for m in range(1, params.max_categories + 1):
        if m < params.max_categories:
            c = params.intercepts[:, m - 1]
            with np.errstate(over="ignore"):
                star = np.where(np.isnan(c), 0.0, 1.0 / (1.0 + np.exp(-(eta + np.nan_to_num(c)))))
        else:
            star = np.zeros_like(eta)
        w = star * (1.0 - star)
        prob = upper_star - star
        deriv = a * (upper_w - w)
        positive = prob > PROBABILITY_FLOOR
        total += np.where(positive, deriv * deriv / np.where(positive, prob, 1.0), 0.0)
        upper_star, upper_w = star, w
    return np.where(answered, total, 0.0).sum(axis=1)


def _newton_theta(
    params: ItemParameters,
    x: FloatArray,
    start: FloatArray,
    *,
    prior: NormalPrior | None,
    bound: float,
    max_iter: int = 50,
    tolerance: float = 1e-6,
) -> tuple[FloatArray, FloatArray]:
    """Newton-Raphson for the mode of the (penalised) likelihood, vectorised over persons.

    The steps use the observed curvature (the expected information where that is not positive), so
    convergence is quadratic: a row stops once its step is below ``tolerance`` (1e-6), which leaves
    it within about 1e-12 of the mode. The SE is from the expected information at the mode.
    """
    answered = ~np.isnan(x)
    codes = np.where(answered, x, 0).astype(np.int64)
    theta = np.clip(start.copy(), -bound, bound)
    active = np.ones(theta.shape[0], dtype=bool)
    prior_curvature = 0.0 if prior is None else 1.0 / prior.sd**2
    dichotomous = params.max_categories == 2
    lower, upper = (None, None) if dichotomous else _answer_bounds(params, codes)
    # Right/wrong items: the curvature of the last step is the expected information, so a row whose
    # last step was below SE_REUSE_STEP keeps it for its SE (it changes by far less than 1e-6 there).
    last_info = np.full(theta.shape[0], np.nan)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        if lower is None or upper is None:
            gradient, curvature = _right_wrong_curves(params, codes[idx], answered[idx], theta[idx])
        else:
            gradient, curvature = _answer_curves(params, lower[idx], upper[idx], answered[idx], theta[idx])
        if prior is not None:
            gradient = gradient - (theta[idx] - prior.mean) / prior.sd**2
        curvature = curvature + prior_curvature
        bent = np.flatnonzero(curvature <= 1e-12)
        if bent.size:
            rows = idx[bent]
            curvature[bent] = _expected_information(params, answered[rows], theta[rows]) + prior_curvature
        step = np.clip(gradient / np.maximum(curvature, 1e-12), -1.0, 1.0)
        theta[idx] = np.clip(theta[idx] + step, -bound, bound)
        active[idx] = np.abs(step) > tolerance
        if dichotomous:
            last_info[idx] = np.where(np.abs(step) < SE_REUSE_STEP, curvature, np.nan)
    info = last_info
    again = np.flatnonzero(~np.isfinite(info))
    if again.size:
        info[again] = _expected_information(params, answered[again], theta[again]) + prior_curvature
    with np.errstate(divide="ignore"):
        se = np.where(info > 0, 1.0 / np.sqrt(info), np.inf)
    return theta, se


SE_REUSE_STEP = 1e-7
"""A right/wrong Newton step below this lets the row keep that step's information for its SE."""


def _grid_mode(log_values: FloatArray, points: FloatArray) -> FloatArray:
    """Each row's maximum over the grid, refined by the parabola through it and its two neighbours.

    A start for Newton within a small fraction of the grid spacing of the mode.
    """
    best = np.clip(np.argmax(log_values, axis=1), 1, points.size - 2)
    rows = np.arange(log_values.shape[0])
    left, mid, right = (log_values[rows, best + d] for d in (-1, 0, 1))
    curvature = left - 2.0 * mid + right
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = np.where(curvature < 0, 0.5 * (left - right) / curvature, 0.0)
    return points[best] + np.clip(shift, -1.0, 1.0) * (points[1] - points[0])


def _mode_scores(  # noqa: PLR0913 - the test, the data and the mode's options
    params: ItemParameters,
    x: FloatArray,
    *,
    prior: NormalPrior | None,
    grid: QuadratureGrid,
    bound: float,
    chunk_size: int,
) -> tuple[FloatArray, FloatArray, ResponseDesign]:
    """Mode of the likelihood (ML) or posterior (MAP) per row: the grid's maximum, then Newton steps."""
    points = grid.points
    inside = np.abs(points) <= bound
    points = points[inside] if inside.sum() >= 3 else points
    scoped = QuadratureGrid(points.size, float(points[0]), float(points[-1]))
    tables = score_tables(params, scoped)
    log_prior = None if prior is None else normal_log_weights(scoped.points, prior.mean, prior.sd)
    theta = np.empty(x.shape[0])
    se = np.empty(x.shape[0])
    design = build_design(x, params.n_categories)

    def block(rows: slice) -> None:
        part = design.rows(rows)
        log_values = log_likelihood_grid(params, scoped.points, part, tables=tables, log_prior=log_prior)
        start = _grid_mode(log_values, scoped.points)
        theta[rows], se[rows] = _newton_theta(params, x[rows], start, prior=prior, bound=bound)

    run_blocks(block, x.shape[0], chunk_size, workers=None)
    return theta, se, design


MAP_BOUND = 10.0
"""MAP estimates are kept within +-10 (the prior keeps every mode finite; the bound only guards Newton)."""


def map_scores(
    params: ItemParameters,
    responses: FloatArray,
    *,
    prior: NormalPrior | None = None,
    grid: QuadratureGrid | None = None,
    chunk_size: int = DEFAULT_CHUNK,
) -> ThetaScores:
    """Maximum a posteriori theta with ``SE = (I(theta) + 1/sigma^2)^(-1/2)``.

    Started from the posterior's maximum on the grid (refined by a parabola), then Newton steps to the
    mode (see :func:`_newton_theta`).
    """
    prior = prior or NormalPrior()
    x = checked_responses(responses, params.n_categories)
    theta, se, design = _mode_scores(
        params, x, prior=prior, grid=grid or QuadratureGrid(), bound=MAP_BOUND, chunk_size=chunk_size
    )
    low, high = _extreme_low_high(design)
    return ThetaScores(theta=theta, se=se, n_answered=design.n_answered, extreme=low | high, method=METHOD_MAP)


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
    gets NaN. Started from the likelihood's maximum on a grid within the bound.
    """
    x = checked_responses(responses, params.n_categories)
    theta, se, design = _mode_scores(params, x, prior=None, grid=QuadratureGrid(), bound=bound, chunk_size=chunk_size)
    low, high = _extreme_low_high(design)
    extreme = low | high
    n_answered = design.n_answered
    answered_any = n_answered > 0
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
