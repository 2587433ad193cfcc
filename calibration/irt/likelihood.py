"""Quadrature grids and the response-pattern log-likelihood over a grid.

The hot path of both calibration (E-step) and scoring is the matrix of
log-likelihoods ``L[i, q] = log P(x_i | theta_q)`` for every respondent ``i`` and
quadrature point ``q``. With one indicator column per (item, category >= 1) it is
two matrix products:

    L = administered @ log P_0  +  indicators @ (log P_k - log P_0)

where ``administered[i, j]`` is 1 when item j was presented to respondent i and
``indicators[i, (j, k)]`` is 1 when the answer was category k >= 1. Missing
answers (NaN) contribute nothing. For a dichotomous test with no missing answers
the first product is a constant row, so the work is one (N x J) by (J x Q) product.
"""

from __future__ import annotations

import contextlib
import functools
import os
import threading
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import ParamSpec, TypeVar

import numpy as np
from threadpoolctl import ThreadpoolController

from calibration.irt.models import FloatArray, IntArray, ItemParameters, log_category_probabilities

# Rows per block: small enough that the (rows x points) work arrays stay in cache.
DEFAULT_CHUNK = 4_096

T = TypeVar("T")
P = ParamSpec("P")


def chunks(n: int, size: int) -> list[slice]:
    """Consecutive row slices of at most ``size`` rows (one empty slice for n = 0)."""
    return [slice(i, min(i + size, n)) for i in range(0, n, size)] or [slice(0, 0)]


_DEFAULT_WORKERS = min(os.cpu_count() or 1, 4)
_POOL: ThreadPoolExecutor | None = None
_BLAS: ThreadpoolController | None = None
_POOL_LOCK = threading.Lock()


def _pool_and_blas() -> tuple[ThreadPoolExecutor, ThreadpoolController]:
    """One process-wide worker pool and BLAS controller (creating them costs milliseconds)."""
    global _POOL, _BLAS
    with _POOL_LOCK:
        if _POOL is None or _BLAS is None:
            _POOL = ThreadPoolExecutor(max_workers=_DEFAULT_WORKERS, thread_name_prefix="equitheta")
            _BLAS = ThreadpoolController()
        return _POOL, _BLAS


_BLAS_HOLDS = 0
_BLAS_LOCK = threading.Lock()


@contextlib.contextmanager
def single_threaded_blas() -> Iterator[None]:
    """BLAS held to one thread inside the block (equitheta splits its large work into row blocks itself).

    Small products gain nothing from BLAS threads, and idle BLAS threads spin on the other core.
    BLAS's thread count is one setting for the whole process, so only the outermost of nested (or
    concurrent) holds sets and restores it; the rest cost a counter (the scoring service holds BLAS
    for its whole life, so a request's scoring calls do not set it again and again).
    """
    global _BLAS_HOLDS
    with _BLAS_LOCK:
        limiter = _pool_and_blas()[1].limit(limits=1, user_api="blas") if _BLAS_HOLDS == 0 else None
        _BLAS_HOLDS += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _BLAS_HOLDS -= 1
            if limiter is not None:
                limiter.restore_original_limits()


def with_single_threaded_blas(function: Callable[P, T]) -> Callable[P, T]:
    """``function`` with BLAS held to one thread while it runs (see :func:`single_threaded_blas`)."""

    @functools.wraps(function)
    def held(*args: P.args, **kwargs: P.kwargs) -> T:
        with single_threaded_blas():
            return function(*args, **kwargs)

    return held


def run_blocks(block: Callable[[slice], T], n_rows: int, chunk_size: int, *, workers: int | None) -> list[T]:
    """Call ``block`` on every row slice (several threads for large inputs); results in order.

    numpy releases the GIL in its kernels, so threads scale; BLAS is held to one thread
    (on the single-block path too) so the two levels of parallelism do not oversubscribe the
    cores. Calls from inside a worker run serially (no nested pools).
    """
    slices = chunks(n_rows, chunk_size)
    n_workers = min(workers or _DEFAULT_WORKERS, len(slices))
    if threading.current_thread().name.startswith("equitheta"):
        return [block(rows) for rows in slices]
    with single_threaded_blas():
        if n_workers <= 1:
            return [block(rows) for rows in slices]
        return list(_pool_and_blas()[0].map(block, slices))


@dataclass(frozen=True)
class QuadratureGrid:
    """Equally spaced points on ``[lower, upper]``.

    A rectangular grid reaching about +-6 is needed so that posterior SDs are not
    understated (De Ayala, Koch & Dodd 1995 report the effect of too few points).
    """

    n_points: int = 61
    lower: float = -6.0
    upper: float = 6.0

    def __post_init__(self) -> None:
        if self.n_points < 5:
            raise ValueError("a quadrature grid needs at least 5 points")
        if not self.lower < self.upper:
            raise ValueError("quadrature lower bound must be below the upper bound")

    @functools.cached_property
    def points(self) -> FloatArray:
        """The equally spaced grid points (computed once per grid; read-only)."""
        points = np.linspace(self.lower, self.upper, self.n_points)
        points.flags.writeable = False
        return points


# The calibration's grid: 49 equally spaced points on -6..6 (equitheta's own default; scoring uses 61).
CALIBRATION_GRID = QuadratureGrid(49, -6.0, 6.0)


def normal_log_weights(points: FloatArray, mean: float = 0.0, sd: float = 1.0) -> FloatArray:
    """Log prior weights of a normal latent density at the points, normalised to sum to 1."""
    z = (points - mean) / sd
    log_w = -0.5 * z * z
    return log_w - np.logaddexp.reduce(log_w)


def normal_weights(points: FloatArray, mean: float = 0.0, sd: float = 1.0) -> FloatArray:
    """Prior weights of a normal latent density at the points, normalised to sum to 1."""
    return np.exp(normal_log_weights(points, mean, sd))


def exp_by_rows(log_values: FloatArray) -> tuple[FloatArray, FloatArray]:
    """``exp(log_values - row max)``, computed in place, and the row maxima.

    The stable half of a log-sum-exp over each row: ``log(scaled.sum(axis=1)) + peak`` is
    the log of each row's sum, and ``scaled / scaled.sum(axis=1)`` its normalised weights.
    """
    peak = log_values.max(axis=1)
    log_values -= peak[:, None]
    np.exp(log_values, out=log_values)
    return log_values, peak


def posterior_weights(log_joint: FloatArray) -> FloatArray:
    """Each row's posterior over the grid (rows sum to 1), from its log joint density; in place."""
    scaled, _ = exp_by_rows(log_joint)
    scaled /= scaled.sum(axis=1, keepdims=True)
    return scaled


CHECK_ROWS = 65_536
"""Rows per block of the code check (its temporaries stay a few MB)."""


def checked_responses(responses: FloatArray, n_categories: IntArray) -> FloatArray:
    """The responses as float64, refused with a ValueError naming the first bad row, item and value.

    The public boundary of the numerical packages: every code must be a whole number in
    ``0 .. K_j - 1`` (NaN: not administered), and there must be one column per item. Private
    helpers downstream assume this.
    """
    x = np.asarray(responses, dtype=np.float64)
    k = np.asarray(n_categories, dtype=np.int64)
    if x.ndim != 2 or x.shape[1] != k.size:
        raise ValueError(f"responses must be (respondents, {k.size} items); got shape {x.shape}")
    if x.shape[0] == 0:
        return x
    # Cheap passes first (column minima and maxima ignore NaN; NaN - floor(NaN) > 0 is False); only
    # a table that fails one is searched cell by cell for the first bad code. The range comes first:
    # once it holds there is no infinity, so the fractional pass raises no floating-point warning.
    low, high = np.fmin.reduce(x, axis=0), np.fmax.reduce(x, axis=0)
    bad = bool((low < 0).any() or (high >= k).any())
    for start in range(0, x.shape[0], CHECK_ROWS):  # in blocks: no full-size temporary
        if bad:
            break
        block = x[start : start + CHECK_ROWS]
        bad = bool((block - np.floor(block) > 0).any())
    if bad:
        answered = ~np.isnan(x)
        cells = answered & ((x < 0) | (x >= k[None, :]) | (x != np.floor(x)))
        row, item = (int(v[0]) for v in np.nonzero(cells))
        raise ValueError(
            f"responses row {row}, item {item}: code {x[row, item]:g} is not a category of the item (0..{k[item] - 1})"
        )
    return x


@dataclass(frozen=True)
class ResponseDesign:
    """Indicator matrices for a response table (validated input assumed).

    Attributes
    ----------
    indicators : float array of shape (n_persons, n_columns)
        One column per (item, category >= 1): 1.0 when that category was given.
    column_item : int array of shape (n_columns,)
        The item of each indicator column.
    column_category : int array of shape (n_columns,)
        The category (>= 1) of each indicator column.
    administered : float array of shape (n_persons, n_items), or None
        1.0 where the item has an answer, 0.0 where it is missing; None when no
        answer is missing (the baseline term is then a constant row).
    summed_score : float array of shape (n_persons,)
        Sum of the answered category codes.
    max_score : float array of shape (n_persons,)
        Largest summed score possible on the answered items.
    n_answered : int array of shape (n_persons,)
    """

    indicators: FloatArray
    column_item: IntArray
    column_category: IntArray
    administered: FloatArray | None
    summed_score: FloatArray
    max_score: FloatArray
    n_answered: IntArray

    @property
    def n_persons(self) -> int:
        """Number of response rows."""
        return int(self.indicators.shape[0])

    def rows(self, selection: slice | IntArray) -> ResponseDesign:
        """The design of a block of rows (views for a slice; copies, in that order, for listed rows)."""
        return ResponseDesign(
            indicators=self.indicators[selection],
            column_item=self.column_item,
            column_category=self.column_category,
            administered=None if self.administered is None else self.administered[selection],
            summed_score=self.summed_score[selection],
            max_score=self.max_score[selection],
            n_answered=self.n_answered[selection],
        )


@functools.lru_cache(maxsize=256)
def design_columns(n_categories: tuple[int, ...]) -> tuple[IntArray, IntArray]:
    """Item and category (>= 1) of every indicator column; cached per test layout (read-only arrays)."""
    column_item = np.repeat(np.arange(len(n_categories)), np.asarray(n_categories) - 1)
    column_category = np.concatenate([np.arange(1, k) for k in n_categories]).astype(np.int64)
    column_item.flags.writeable = False
    column_category.flags.writeable = False
    return column_item, column_category


def build_design(responses: FloatArray, n_categories: IntArray) -> ResponseDesign:
    """Indicator matrices for ``responses`` of shape (n_persons, n_items).

    Assumes valid input: integer category codes ``0 .. K_j - 1`` or NaN for missing.
    """
    responses = np.asarray(responses, dtype=np.float64)
    n_categories = np.asarray(n_categories, dtype=np.int64)
    missing = np.isnan(responses)
    complete = not missing.any()
    column_item, column_category = design_columns(tuple(n_categories.tolist()))
    filled = responses if complete else np.where(missing, 0.0, responses)
    if (n_categories == 2).all():
        # Dichotomous test: the indicator of category 1 is the (filled) response itself.
        indicators = filled
    else:
        coded = filled if complete else np.where(missing, -1.0, responses)
        indicators = (coded.take(column_item, axis=1) == column_category[None, :]).astype(np.float64)  # C order
    top = (n_categories - 1).astype(np.float64)
    if complete:
        administered = None
        max_score = np.full(responses.shape[0], top.sum())
        n_answered = np.full(responses.shape[0], responses.shape[1], dtype=np.int64)
    else:
        administered = (~missing).astype(np.float64)
        max_score = administered @ top
        n_answered = responses.shape[1] - missing.sum(axis=1)
    return ResponseDesign(
        indicators=indicators,
        column_item=column_item,
        column_category=column_category,
        administered=administered,
        summed_score=filled.sum(axis=1),
        max_score=max_score,
        n_answered=n_answered,
    )


def split_log_table(
    params: ItemParameters, points: FloatArray, design: ResponseDesign
) -> tuple[FloatArray, FloatArray]:
    """Baseline ``log P_j0`` (n_items, Q) and contrasts ``log P_jk - log P_j0`` (n_columns, Q)."""
    log_p = log_category_probabilities(params, points)
    base = log_p[:, 0, :]
    contrast = log_p[design.column_item, design.column_category, :] - base[design.column_item, :]
    return base, contrast


def log_likelihood_grid(
    params: ItemParameters,
    points: FloatArray,
    design: ResponseDesign,
    *,
    tables: tuple[FloatArray, FloatArray] | None = None,
    log_prior: FloatArray | None = None,
) -> FloatArray:
    """``log P(x_i | theta_q)`` of shape (n_persons, n_points).

    ``tables`` lets a caller pass the output of :func:`split_log_table` it already holds
    (the service builds them once per bundle). A ``log_prior`` of shape (n_points,)
    is added in the same pass, giving the log joint density instead.
    """
    base, contrast = tables if tables is not None else split_log_table(params, points, design)
    loglik = design.indicators @ contrast
    row = np.zeros(points.shape[0]) if log_prior is None else log_prior.copy()
    if design.administered is None:
        row += base.sum(axis=0)
    else:
        loglik += design.administered @ base
    loglik += row[None, :]
    return loglik


def one_item_log_likelihood(params: ItemParameters, item: int, answers: FloatArray, points: FloatArray) -> FloatArray:
    """``log P(x_i | theta_q)`` of one item (n_rows, n_points); a row without an answer (NaN) contributes 0."""
    one = params.subset([item])
    design = build_design(np.asarray(answers, dtype=np.float64)[:, None], one.n_categories)
    return log_likelihood_grid(one, points, design)


def marginal_log_likelihood(
    params: ItemParameters,
    responses: FloatArray,
    *,
    grid: QuadratureGrid | None = None,
    mean: float = 0.0,
    sd: float = 1.0,
) -> float:
    """``sum_i log integral P(x_i | theta) N(theta; mean, sd) dtheta`` on a quadrature grid.

    Lets any parameter set (ours, or another estimator's) be judged on one footing; the
    default grid is the calibration's.
    """
    points = (grid or CALIBRATION_GRID).points
    design = build_design(checked_responses(responses, params.n_categories), params.n_categories)
    joint = log_likelihood_grid(params, points, design, log_prior=normal_log_weights(points, mean, sd))
    scaled, peak = exp_by_rows(joint)
    return float(np.sum(peak + np.log(scaled.sum(axis=1))))
