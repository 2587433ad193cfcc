"""Person scoring: EAP, MAP and ML theta with SEs.

All functions are vectorised over respondents; large inputs are processed in
chunks of rows so memory stays bounded. Responses are validated category codes
(0 .. K_j - 1) with NaN for items not administered.
"""

from __future__ import annotations

import functools
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
    CUMULATIVE_MODELS,
    PROBABILITY_FLOOR,
    FloatArray,
    IntArray,
    ItemParameters,
    adjacent_moments,
    category_theta_derivatives,
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


def _extreme_low_high(params: ItemParameters, design: ResponseDesign) -> tuple[np.ndarray, np.ndarray]:
    """Every answered item at the end of its scale that low theta makes most likely / that high theta does
    (some answer given): there the likelihood keeps rising towards -inf / +inf and has no maximum.

    That end is the lowest category for an item with a positive slope and the highest for one with a
    negative slope (a reverse-keyed item left unreversed), so the sums count a negative-slope item's codes
    from its top down.
    """
    some = design.n_answered > 0
    summed = design.summed_score
    reversed_items = params.slopes < 0
    if reversed_items.any():
        top = (params.n_categories - 1).astype(np.float64)
        flipped = np.where(reversed_items[design.column_item], design.column_category, 0).astype(np.float64)
        reversed_sum = design.indicators @ flipped  # the codes given to negative-slope items
        reversed_top = (
            np.full(summed.shape, top[reversed_items].sum())
            if design.administered is None
            else design.administered @ np.where(reversed_items, top, 0.0)
        )
        summed = summed - 2.0 * reversed_sum + reversed_top
    return some & (summed == 0), some & (summed == design.max_score)


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
    log_prior, moments = _eap_weights(grid, prior)
    theta = np.empty(x.shape[0])
    psd = np.empty(x.shape[0])
    n_answered = np.empty(x.shape[0], dtype=np.int64)
    extreme = np.empty(x.shape[0], dtype=bool)
    if tables is None:
        tables = score_tables(params, grid)

    def block(rows: slice) -> None:
        design = build_design(x[rows], params.n_categories)
        low, high = _extreme_low_high(params, design)
        n_answered[rows], extreme[rows] = design.n_answered, low | high
        joint, _ = exp_by_rows(log_likelihood_grid(params, points, design, tables=tables, log_prior=log_prior))
        s0, s1, s2 = (joint @ moments).T
        mean = s1 / s0
        theta[rows] = mean
        psd[rows] = np.sqrt(np.maximum(s2 / s0 - mean * mean, 0.0))

    run_blocks(block, x.shape[0], chunk_size, workers=workers)
    return ThetaScores(theta=theta, se=psd, n_answered=n_answered, extreme=extreme, method=METHOD_EAP)


@functools.lru_cache(maxsize=64)
def _eap_weights(grid: QuadratureGrid, prior: NormalPrior) -> tuple[FloatArray, FloatArray]:
    """The prior's log weights (Q,) and the moment columns 1, theta, theta^2 (Q, 3) of a grid: once per grid and
    prior (a service scores one vector at a time with the same two)."""
    points = grid.points
    log_prior = normal_log_weights(points, prior.mean, prior.sd)
    moments = np.stack([np.ones_like(points), points, points * points], axis=1)
    log_prior.flags.writeable = moments.flags.writeable = False
    return log_prior, moments


def score_tables(params: ItemParameters, grid: QuadratureGrid) -> tuple[FloatArray, FloatArray]:
    """Log-probability tables (baseline, contrasts) of a test on a grid: build once, score many times."""
    probe = np.zeros((1, params.n_items))
    return split_log_table(params, grid.points, build_design(probe, params.n_categories))


EXPONENT_LIMIT = 700.0
"""``-a theta`` is clipped to +-700 before its exponential (finite, nonzero in double precision); beyond it
every curve is saturated (below 1e-217 from 0 or 1) whatever the intercept within a bundle's +-200."""


def _odds_against_slope(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``exp(-a_j theta_i)`` of shape (n, J), clipped (see EXPONENT_LIMIT).

    Every boundary's ``exp(-(a theta + c))`` is this times ``exp(-c)``: one exponential per
    respondent and item serves all of the item's boundaries.
    """
    odds = np.multiply(theta[:, None], -params.slopes)
    np.clip(odds, -EXPONENT_LIMIT, EXPONENT_LIMIT, out=odds)
    return np.exp(odds, out=odds)


def _boundary_curve(odds: FloatArray, factor: FloatArray, out: FloatArray | None = None) -> FloatArray:
    """``P* = 1 / (1 + odds * factor)`` with ``factor = exp(-c)``: 0 gives 1 (no lower boundary), inf gives 0."""
    with np.errstate(over="ignore"):  # inf: the curve is 0 there
        star = np.multiply(odds, factor, out=out)
    star += 1.0
    return np.reciprocal(star, out=star)


def _answered_sum(terms: FloatArray, answered: np.ndarray | None, weights: FloatArray) -> FloatArray:
    """``sum_j weights_j terms[:, j]`` over the answered items (``answered`` None: every item)."""
    if answered is None:
        return terms @ weights
    return np.where(answered, terms, 0.0) @ weights  # where, not a product: an unanswered term may be inf


def _right_wrong_curves(
    params: ItemParameters, codes: IntArray, answered: np.ndarray | None, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Right/wrong items: ``d log L / d theta = sum a (x - P)`` and ``sum a^2 P (1 - P)``, which is both
    minus the second derivative and the expected information (answered items only; None: all)."""
    a = params.slopes
    p = _boundary_curve(_odds_against_slope(params, theta), np.exp(-params.intercepts[:, 0]))
    residual = codes - p
    spread = p - p * p
    return _answered_sum(residual, answered, a), _answered_sum(spread, answered, a * a)


def _answer_factors(params: ItemParameters, codes: IntArray) -> tuple[FloatArray, FloatArray]:
    """``exp(-c)`` of each answer's two boundaries, ``c_x`` and ``c_{x+1}`` (0 below category 1, ``inf``
    above the top): (n, J) each, built once per batch."""
    padded = np.full((params.n_items, params.max_categories + 1), np.inf)
    padded[:, 0] = 0.0
    for j, k in enumerate(params.n_categories):
        padded[j, 1:k] = np.exp(-params.intercepts[j, : k - 1])
    items = np.arange(params.n_items)
    return padded[items, codes], padded[items, codes + 1]


def _answer_curves(
    params: ItemParameters, lower: FloatArray, upper: FloatArray, answered: np.ndarray | None, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """d log P(answer) / d theta and minus its second derivative, summed over the answered items.

    Only the answered category's two boundaries are evaluated (``lower`` and ``upper`` hold their
    ``exp(-c)``), ``P_x = P*_x - P*_{x+1}`` with ``P*_0 = 1`` and ``P*_K = 0``: (n, J) arrays, not
    (n, J, K). With ``W = P* (1 - P*)`` the first derivative is ``a (W_x - W_{x+1}) / P_x`` and the
    second ``a^2 (W_x (1 - 2 P*_x) - W_{x+1} (1 - 2 P*_{x+1})) / P_x`` minus the first squared.
    """
    a = params.slopes
    odds = _odds_against_slope(params, theta)
    star_lo = _boundary_curve(odds, lower)
    star_hi = _boundary_curve(odds, upper, out=odds)
    w_lo = star_lo - star_lo * star_lo
    w_hi = star_hi - star_hi * star_hi
    p_answer = np.subtract(star_lo, star_hi)
    np.maximum(p_answer, PROBABILITY_FLOOR, out=p_answer)
    # W (1 - 2 P*) = W - 2 W P*, so the second derivative's bracket is (W_lo - W_hi) - 2 (W_lo P*_lo - W_hi P*_hi).
    star_lo *= w_lo
    star_hi *= w_hi
    bracket = np.subtract(star_lo, star_hi, out=star_lo)
    first = np.subtract(w_lo, w_hi, out=w_lo)  # (W_lo - W_hi): the first derivative over a, before / P
    bracket *= -2.0
    bracket += first
    first /= p_answer
    bracket /= p_answer
    curvature = np.multiply(first, first, out=star_hi)
    curvature -= bracket  # minus the second derivative, over a^2
    return _answered_sum(first, answered, a), _answered_sum(curvature, answered, a * a)


def _expected_information(params: ItemParameters, answered: np.ndarray | None, theta: FloatArray) -> FloatArray:
    """Test information ``sum_j sum_k (dP_jk/dtheta)^2 / P_jk`` over the answered items (None: all),
    category by category.

    (n, J) arrays per boundary, not (J, K, n): ``P_k = P*_k - P*_{k+1}``, ``P'_k = a (W_k - W_{k+1})``.
    """
    a = params.slopes
    odds = _odds_against_slope(params, theta)
    # exp(-c) per boundary; inf where an item with fewer categories has no boundary m (P* = 0 there).
    factors = np.exp(-np.where(np.isnan(params.intercepts), -np.inf, params.intercepts))
    total = np.zeros_like(odds)
    prob, deriv = np.empty_like(odds), np.empty_like(odds)
    upper_star, upper_w = np.ones_like(odds), np.zeros_like(odds)  # boundary 0: P* = 1, W = 0
    for m in range(1, params.max_categories + 1):
        if m < params.max_categories:
            star = _boundary_curve(odds, factors[:, m - 1])
            w = star - star * star
        else:
            star, w = np.zeros_like(odds), np.zeros_like(odds)
        np.subtract(upper_star, star, out=prob)
        np.subtract(upper_w, w, out=deriv)
        deriv *= deriv
        # W_up - W = (P*_up - P*)(1 - P*_up - P*) is never larger than the category's probability, so a
        # category at or below the floor (beyond double precision) adds at most its own tiny probability.
        np.maximum(prob, PROBABILITY_FLOOR, out=prob)
        deriv /= prob
        total += deriv
        upper_star, upper_w = star, w
    return _answered_sum(total, answered, a * a)


def _any_model_curves(
    params: ItemParameters, codes: IntArray, answered: np.ndarray | None, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """d log L / d theta and minus its second derivative for any item models (3PL, partial credit...):
    ``sum_j P'_jx / P_jx`` and ``sum_j ((P'_jx / P_jx)^2 - P''_jx / P_jx)`` over the answered items,
    from (J, K, n) tables at each respondent's theta (the cumulative-only paths avoid them)."""
    prob, first, second = category_theta_derivatives(params, theta)
    assert second is not None
    at = codes.T[:, None, :]  # (J, 1, n)
    p = np.maximum(np.take_along_axis(prob, at, axis=1)[:, 0], PROBABILITY_FLOOR)
    ratio = np.take_along_axis(first, at, axis=1)[:, 0] / p
    bend = np.take_along_axis(second, at, axis=1)[:, 0] / p
    ones = np.ones(params.n_items)
    return _answered_sum(ratio.T, answered, ones), _answered_sum((ratio * ratio - bend).T, answered, ones)


def _any_model_information(params: ItemParameters, answered: np.ndarray | None, theta: FloatArray) -> FloatArray:
    """Test information at each respondent's theta over the answered items, for any item models."""
    prob, first, _ = category_theta_derivatives(params, theta, second=False)
    return _answered_sum(information_from(prob, first).T, answered, np.ones(params.n_items))


def _partial_credit_curves(
    params: ItemParameters, codes: IntArray, answered: np.ndarray | None, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Partial-credit items (exponential family in theta): ``d log P_x / d theta = a (x - mean)`` and minus its
    derivative ``a^2 var`` (the observed curvature equals the information), summed over the answered items;
    the category moments on (n, J) arrays (:func:`adjacent_moments`), no derivative tables."""
    mean, var = adjacent_moments(params, theta)  # (n, J)
    a = params.slopes
    np.subtract(codes, mean, out=mean)
    return _answered_sum(mean, answered, a), _answered_sum(var, answered, a * a)


def _partial_credit_information(params: ItemParameters, answered: np.ndarray | None, theta: FloatArray) -> FloatArray:
    """Partial-credit items' test information ``sum a^2 var`` over the answered items."""
    _, var = adjacent_moments(params, theta)
    return _answered_sum(var, answered, params.slopes**2)


def _guessing_parts(params: ItemParameters, theta: FloatArray) -> tuple[FloatArray, FloatArray]:
    """The 2PL part ``s`` of 3PL items and ``r = (1 - g) s / P_1``, the share of a right answer's probability
    that is not a guess, each (n, J): ``r = 1 / (1 + (1 + e) g / (1 - g))`` with ``e = exp(-(a theta + c))``."""
    e = np.multiply(theta[:, None], -params.slopes)
    e -= params.intercepts[:, 0]
    np.clip(e, -EXPONENT_LIMIT, EXPONENT_LIMIT, out=e)  # finite: 0 * e below is 0 without an asymptote, not NaN
    np.exp(e, out=e)
    e += 1.0
    s = np.reciprocal(e)
    e *= params.guessing / (1.0 - params.guessing)
    e += 1.0
    return s, np.reciprocal(e, out=e)


def _guessing_curves(
    params: ItemParameters, codes: IntArray, answered: np.ndarray | None, theta: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """3PL items on (n, J) arrays, ``P_1 = g + (1 - g) s``: ``d log P_0 / d theta = -a s`` and
    ``d log P_1 / d theta = a r (1 - s)`` (``r`` from :func:`_guessing_parts`), one expression
    ``a rho (x - s)`` with ``rho = r`` for a right answer and 1 for a wrong one; minus its derivative is
    ``a^2 rho (s (1 - s) - (1 - rho) (x - s)^2)`` (``dr / d theta = a r (1 - r)(1 - s)``). No division by a
    probability, so nothing to floor. Summed over the answered items."""
    s, r = _guessing_parts(params, theta)
    right = codes == 1
    rho = np.where(right, r, 1.0)
    residual = np.subtract(right, s, out=r)
    spread = s - s * s
    gradient = residual * rho
    residual *= residual
    residual *= np.subtract(1.0, rho, out=s)
    spread -= residual
    spread *= rho
    a = params.slopes
    return _answered_sum(gradient, answered, a), _answered_sum(spread, answered, a * a)


def _guessing_information(params: ItemParameters, answered: np.ndarray | None, theta: FloatArray) -> FloatArray:
    """3PL items' test information ``sum (a (1 - g) W)^2 / (P_1 (1 - P_1))``, which is ``sum a^2 s (1 - s) r``
    (``W = s (1 - s)``, ``1 - P_1 = (1 - g)(1 - s)``), over the answered items."""
    s, r = _guessing_parts(params, theta)
    r *= s
    r -= r * s
    return _answered_sum(r, answered, params.slopes**2)


class _ModelParts:
    """A test's items split by model family for Newton's per-respondent terms, each family on its cheapest path:
    every family on (n, J) arrays (partial-credit items with any other non-cumulative model: (J, K, n) tables)."""

    def __init__(self, params: ItemParameters, codes: IntArray) -> None:
        kinds = np.array(
            ["3pl" if m == "3pl" else ("other" if m not in CUMULATIVE_MODELS else "cumulative") for m in params.models]
        )
        self.parts = []
        for kind in ("cumulative", "3pl", "other"):
            columns = np.flatnonzero(kinds == kind)
            if columns.size == 0:
                continue
            sub = params.subset(columns)
            mine = np.ascontiguousarray(codes[:, columns])  # once per batch, not per Newton step
            factors = None
            if kind == "cumulative" and sub.max_categories > 2:
                factors = _answer_factors(sub, mine)
            self.parts.append((kind, columns, sub, mine, factors))

    def curves(
        self, rows: slice | IntArray, answered: np.ndarray | None, theta: FloatArray
    ) -> tuple[FloatArray, FloatArray]:
        """Gradient and minus the second derivative of the log-likelihood, summed over the families."""
        gradient, curvature = np.zeros(theta.shape[0]), np.zeros(theta.shape[0])
        for kind, columns, sub, part_codes, factors in self.parts:
            on = None if answered is None else answered[:, columns]
            mine = part_codes[rows]
            if kind == "3pl":
                g, c = _guessing_curves(sub, mine, on, theta)
            elif kind == "other":
                curves = _partial_credit_curves if sub.adjacent.all() else _any_model_curves
                g, c = curves(sub, mine, on, theta)
            elif factors is None:
                g, c = _right_wrong_curves(sub, mine, on, theta)
            else:
                g, c = _answer_curves(sub, factors[0][rows], factors[1][rows], on, theta)
            gradient += g
            curvature += c
        return gradient, curvature

    def information(self, answered: np.ndarray | None, theta: FloatArray) -> FloatArray:
        """Test information summed over the families."""
        total = np.zeros(theta.shape[0])
        for kind, columns, sub, _, _ in self.parts:
            on = None if answered is None else answered[:, columns]
            if kind == "3pl":
                total += _guessing_information(sub, on, theta)
            elif kind == "other":
                information = _partial_credit_information if sub.adjacent.all() else _any_model_information
                total += information(sub, on, theta)
            else:
                total += _expected_information(sub, on, theta)
        return total


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
    convergence is quadratic: each step is about ``K`` times the previous one squared, and the step after
    this one about ``K`` times this one squared. A row stops once its step is below ``tolerance`` (1e-6),
    or once the rate seen over its last two Newton steps (``K ~ step / previous^2``) puts the next step
    below ``PREDICTED_STEP`` (1e-9, this step at most 1e-3): the row is then within about 1e-9 of the mode,
    one iteration earlier. A step that was clipped, hit the bound or used the expected information is no
    Newton step and gives no rate. The SE is from the expected information at the mode.
    """
    answered_cells = ~np.isnan(x)
    answered = None if answered_cells.all() else answered_cells
    codes = np.where(answered_cells, x, 0).astype(np.int64)
    theta = np.clip(start.copy(), -bound, bound)
    n_rows = theta.shape[0]
    active = np.ones(n_rows, dtype=bool)
    prior_curvature = 0.0 if prior is None else 1.0 / prior.sd**2
    general = not params.cumulative_only  # 3PL or partial-credit items: each model family on its own path
    parts = _ModelParts(params, codes) if general else None

    def information(p: ItemParameters, on: np.ndarray | None, at: FloatArray) -> FloatArray:
        return parts.information(on, at) if parts is not None else _expected_information(p, on, at)

    dichotomous = params.max_categories == 2 and not general
    lower, upper = (None, None) if dichotomous or general else _answer_factors(params, codes)
    # Right/wrong items: the curvature of the last step is the expected information, so a row whose
    # last step was below SE_REUSE_STEP keeps it for its SE (it changes by far less than 1e-6 there).
    last_info = np.full(n_rows, np.nan)
    previous = np.full(n_rows, np.nan)  # each row's last Newton step (NaN: none, or not a Newton step)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        rows: slice | IntArray = slice(None) if idx.size == n_rows else idx  # a view while every row is active
        on = None if answered is None else answered[rows]
        if parts is not None:
            gradient, curvature = parts.curves(rows, on, theta[rows])
        elif lower is None or upper is None:
            gradient, curvature = _right_wrong_curves(params, codes[rows], on, theta[rows])
        else:
            gradient, curvature = _answer_curves(params, lower[rows], upper[rows], on, theta[rows])
        if prior is not None:
            gradient = gradient - (theta[rows] - prior.mean) / prior.sd**2
        curvature = curvature + prior_curvature
        bent = np.flatnonzero(curvature <= 1e-12)
        if bent.size:
            flat = idx[bent]
            curvature[bent] = (
                information(params, None if answered is None else answered[flat], theta[flat]) + prior_curvature
            )
        newton = gradient / np.maximum(curvature, 1e-12)
        step = np.clip(newton, -1.0, 1.0)
        before = theta[rows]
        # Already at the bound and pushed further out: the (log-concave) likelihood's maximum within the
        # bound is the bound itself, so the row stops there (all-lowest and all-highest ML patterns).
        pinned = (np.abs(before) == bound) & (step * before > 0)
        after = before + step
        plain = (step == newton) & (np.abs(after) <= bound)  # a whole Newton step, within the bound
        if bent.size:
            plain[bent] = False
        theta[rows] = np.clip(after, -bound, bound)
        size = np.abs(step)
        with np.errstate(invalid="ignore"):
            settled = (size <= PREDICTED_RATE_STEP) & (size**3 <= PREDICTED_STEP * previous[rows] ** 2)
        active[rows] = (size > tolerance) & ~pinned & ~settled
        previous[rows] = np.where(plain, size, np.nan)
        if dichotomous:
            last_info[rows] = np.where(np.abs(step) < SE_REUSE_STEP, curvature, np.nan)
    info = last_info
    again = np.flatnonzero(~np.isfinite(info))
    if again.size:
        on = None if answered is None else answered[again]
        info[again] = information(params, on, theta[again]) + prior_curvature
    with np.errstate(divide="ignore"):
        se = np.where(info > 0, 1.0 / np.sqrt(info), np.inf)
    return theta, se


PREDICTED_STEP = 1e-9
"""Newton stops a row once the quadratic rate of its last two steps puts the next step below this."""

PREDICTED_RATE_STEP = 1e-3
"""... and only once its step is below this (within the quadratic regime)."""

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


@dataclass(frozen=True)
class _Modes:
    """Modes and SEs of a batch, with the counts the callers report (arrays of shape (n_persons,))."""

    theta: FloatArray
    se: FloatArray
    n_answered: IntArray
    lowest: np.ndarray
    highest: np.ndarray


def _mode_scores(  # noqa: PLR0913 - the test, the data and the mode's options
    params: ItemParameters,
    x: FloatArray,
    *,
    prior: NormalPrior | None,
    grid: QuadratureGrid,
    bound: float,
    chunk_size: int,
) -> _Modes:
    """Mode of the likelihood (ML) or posterior (MAP) per row: the grid's maximum, then Newton steps."""
    points = grid.points
    inside = np.abs(points) <= bound
    points = points[inside] if inside.sum() >= 3 else points
    scoped = QuadratureGrid(points.size, float(points[0]), float(points[-1]))
    tables = score_tables(params, scoped)
    log_prior = None if prior is None else normal_log_weights(scoped.points, prior.mean, prior.sd)
    n = x.shape[0]
    flags = (np.empty(n, dtype=bool), np.empty(n, dtype=bool))
    out = _Modes(np.empty(n), np.empty(n), np.empty(n, dtype=np.int64), *flags)

    def block(rows: slice) -> None:
        design = build_design(x[rows], params.n_categories)  # per block, as EAP: no full-size indicators
        out.n_answered[rows] = design.n_answered
        out.lowest[rows], out.highest[rows] = _extreme_low_high(params, design)
        log_values = log_likelihood_grid(params, scoped.points, design, tables=tables, log_prior=log_prior)
        start = _grid_mode(log_values, scoped.points)
        out.theta[rows], out.se[rows] = _newton_theta(params, x[rows], start, prior=prior, bound=bound)

    run_blocks(block, n, chunk_size, workers=None)
    return out


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
    modes = _mode_scores(params, x, prior=prior, grid=grid or QuadratureGrid(), bound=MAP_BOUND, chunk_size=chunk_size)
    extreme = modes.lowest | modes.highest
    return ThetaScores(theta=modes.theta, se=modes.se, n_answered=modes.n_answered, extreme=extreme, method=METHOD_MAP)


def ml_scores(
    params: ItemParameters,
    responses: FloatArray,
    *,
    bound: float = 4.0,
    chunk_size: int = DEFAULT_CHUNK,
) -> ThetaScores:
    """Maximum likelihood theta with ``SE = I(theta)^(-1/2)``.

    Rule for extreme patterns (all answered items in the lowest category, or all in
    the highest; for an item with a negative slope the ends swap): the ML estimate does not
    exist (the likelihood rises without limit), so theta is set to ``-bound`` / ``+bound`` (default +-4) with the SE
    from the information at that point, and ``extreme`` is True. Every other
    estimate is also kept within ``[-bound, bound]``. A respondent with no answers
    gets NaN. Started from the likelihood's maximum on a grid within the bound.
    """
    x = checked_responses(responses, params.n_categories)
    modes = _mode_scores(params, x, prior=None, grid=QuadratureGrid(), bound=bound, chunk_size=chunk_size)
    theta, se, n_answered, low = modes.theta, modes.se, modes.n_answered, modes.lowest
    extreme = low | modes.highest
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
