"""Public marginal ML estimators: many groups, one group, and one item given the others held.

Bock-Aitkin EM over a fixed quadrature grid (E-step :mod:`.estep`, M-step :mod:`.mstep`,
latent densities :mod:`.latent`), SQUAREM-accelerated (:mod:`.optimizer`), standard errors
from the analytic observed information (:mod:`.information`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from calibration.estimation.estep import (
    ExpectedCounts,
    HeldLikelihood,
    held_item_counts,
    prepare_groups,
)
from calibration.estimation.information import (
    HeldTerms,
    add_prior_information,
    held_item_terms,
    information_to_covariance,
)
from calibration.estimation.latent import LatentSpec, latent_update
from calibration.estimation.layout import GroupLayout, params_from_table, slot_table, valid_tables
from calibration.estimation.mstep import STEP_HALVINGS, m_step
from calibration.estimation.optimizer import run_em
from calibration.estimation.results import CalibrationFit, MultiGroupFit
from calibration.estimation.settings import EMSettings
from calibration.estimation.sources import GroupSource, LocalGroups
from calibration.estimation.start import starting_values
from calibration.irt.likelihood import (
    checked_responses,
    exp_by_rows,
    normal_log_weights,
    normal_weights,
    with_single_threaded_blas,
)
from calibration.irt.models import GUESSING_SLOT, FloatArray, IntArray, ItemParameters


@with_single_threaded_blas  # the E-step splits rows over threads itself; idle BLAS threads would spin
def calibrate_groups(  # noqa: PLR0913 - keyword-only options of the public estimator
    responses: FloatArray,
    n_categories: IntArray,
    group_index: IntArray,
    n_groups: int,
    *,
    models: tuple[str, ...] = (),
    settings: EMSettings | None = None,
    group_free: np.ndarray | None = None,
    fixed: np.ndarray | None = None,
    start: FloatArray | None = None,
    latent: LatentSpec | None = None,
    progress: Callable[[int, float], None] | None = None,
    warn: bool = True,
    source: GroupSource | None = None,
) -> MultiGroupFit:
    """Multiple-group marginal ML (Bock & Zimowski 1997) by EM over a fixed quadrature grid.

    Parameters
    ----------
    responses : array of shape (n_persons, n_items); codes or NaN (validated input)
    group_index : int array of shape (n_persons,), 0 .. n_groups - 1; group 0 is the reference
    group_free : bool array (n_groups, n_items, k_max); True gives group g its own value of a slot
        (default: every slot shared with the reference group)
    fixed : bool array (n_groups, n_items, k_max) or (n_items, k_max); True holds a slot at ``start``
    start : slot tables (n_groups, n_items, k_max); default from classical statistics
    latent : latent means/SDs and which are estimated (default: reference N(0,1), others free)
    warn : False leaves non-convergence to the caller (``converged`` in the result) instead of warning
    source : where the sums over respondents come from (default: ``responses``, prepared in this process);
        with a source held elsewhere ``responses`` may be an empty (0, n_items) table and ``start`` is needed
    """
    settings = settings or EMSettings()
    k = np.asarray(n_categories, dtype=np.int64)
    x = checked_responses(responses, k)
    gi = np.asarray(group_index, dtype=np.int64)
    if gi.shape != (x.shape[0],) or gi.min(initial=0) < 0 or gi.max(initial=0) >= n_groups:
        raise ValueError(f"group_index must hold one group 0..{n_groups - 1} per response row")
    models = models or tuple("2pl" if kk == 2 else "grm" for kk in k)
    if source is not None and start is None:
        raise ValueError("a calibration over a distributed source needs its starting tables")
    template = starting_values(x, k, models) if start is None else _template(k, models)
    if start is None:
        tables = np.broadcast_to(slot_table(template), (n_groups,) + slot_table(template).shape).copy()
    else:
        tables = np.array(start, dtype=np.float64)
        template = params_from_table(tables[0], template)
    latent = latent or LatentSpec.reference_fixed(n_groups)
    if settings.held_guessing:  # 3PL asymptotes held at known values (the item spec)
        template, fixed = _hold_guessing(settings.held_guessing, tables, template, fixed)
    layout = GroupLayout.build(template, n_groups, group_free=group_free, fixed=fixed)
    if source is None:
        source = LocalGroups(prepare_groups(x, k, gi, n_groups, compress=settings.compress_patterns))
    points = settings.quadrature.points
    prior = settings.slope_prior
    n_item_free = layout.n_free

    def pack(tabs: FloatArray, mean: FloatArray, sd: FloatArray) -> FloatArray:
        return np.concatenate([layout.to_vector(tabs), mean[latent.free_mean], sd[latent.free_sd]])

    def unpack(vec: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        tabs = layout.from_vector(vec[:n_item_free], tables)
        mean, sd = latent.mean.copy(), latent.sd.copy()
        n_mean = int(latent.free_mean.sum())
        mean[latent.free_mean] = vec[n_item_free : n_item_free + n_mean]
        sd[latent.free_sd] = vec[n_item_free + n_mean :]
        return tabs, mean, sd

    def e_step(vec: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, list[ExpectedCounts]]:
        tabs, mean, sd = unpack(vec)
        if not valid_tables(tabs, template).all() or np.any(sd <= 0) or not np.all(np.isfinite(mean)):
            raise ValueError("invalid parameters")
        results = source.expected(
            [params_from_table(tabs[g], template) for g in range(n_groups)],
            points,
            [normal_log_weights(points, mean[g], sd[g]) for g in range(n_groups)],
        )
        return tabs, mean, sd, np.stack([r.counts for r in results]), results

    def em_map(vec: FloatArray) -> tuple[FloatArray, float]:
        tabs, mean, sd, counts, results = e_step(vec)
        tabs = m_step(tabs, template, counts, points, layout, prior=prior, n_iter=settings.m_step_iter)
        for g, r in enumerate(results):
            mean[g], sd[g] = latent_update(
                r.point_mass,
                points,
                mean[g],
                sd[g],
                free_mean=bool(latent.free_mean[g]),
                free_sd=bool(latent.free_sd[g]),
            )
        return pack(tabs, mean, sd), float(sum(r.log_likelihood for r in results))

    try:
        vec, converged, n_iter, history = run_em(
            pack(tables, latent.mean, latent.sd), em_map, settings, progress=progress, warn=warn
        )
    except ValueError as exc:  # a parameter ran off: say why when the data show it
        raise _explained(exc, x, k, layout) from exc
    tabs, mean, sd, _, results = e_step(vec)
    group_ll = np.array([r.log_likelihood for r in results])

    covariance = None
    slot_se = np.full(tabs.shape, np.nan)
    mean_se = np.full(n_groups, np.nan)
    sd_se = np.full(n_groups, np.nan)
    if settings.standard_errors and vec.size > 0:
        fitted = LatentSpec(mean, sd, latent.free_mean, latent.free_sd)
        information = source.information(tabs, template, points, fitted, layout)
        add_prior_information(information, tabs, layout, prior, template)
        covariance = information_to_covariance(information)
        if covariance is not None:
            se = np.sqrt(np.clip(np.diag(covariance), 0.0, None))
            mask = layout.index >= 0
            slot_se[mask] = se[layout.index[mask]]
            n_mean = int(latent.free_mean.sum())
            mean_se[latent.free_mean] = se[n_item_free : n_item_free + n_mean]
            sd_se[latent.free_sd] = se[n_item_free + n_mean :]
    return MultiGroupFit(
        template=template,
        tables=tabs,
        slot_se=slot_se,
        latent_mean=mean,
        latent_sd=sd,
        latent_mean_se=mean_se,
        latent_sd_se=sd_se,
        log_likelihood=float(group_ll.sum()),
        group_log_likelihood=group_ll,
        n_parameters=int(vec.size),
        n_persons=int(source.n_persons),
        converged=converged,
        n_iter=n_iter,
        covariance=covariance,
        layout=layout,
        latent=latent,
        settings=settings,
        history=history,
    )


def _template(k: IntArray, models: tuple[str, ...]) -> ItemParameters:
    """A placeholder test of the right shape (categories, models) for starting tables given by the caller."""
    intercepts = np.full((k.size, int(k.max()) - 1), np.nan)
    for j, kj in enumerate(k):
        intercepts[j, : kj - 1] = -np.arange(kj - 1, dtype=np.float64)
    guessing = np.array([0.2 if m == "3pl" else 0.0 for m in models])
    return ItemParameters(np.ones(k.size), intercepts, k, models=models, guessing=guessing)


def _hold_guessing(
    values: tuple[float, ...], tables: FloatArray, template: ItemParameters, fixed: np.ndarray | None
) -> tuple[ItemParameters, np.ndarray | None]:
    """3PL asymptotes held at known values (NaN: estimated): set in ``tables`` (in place) and fixed."""
    given = np.asarray(values, dtype=np.float64)
    held_guessing = np.isfinite(given) & template.has_guessing
    if not held_guessing.any():
        return template, fixed
    tables[:, held_guessing, GUESSING_SLOT] = np.log(given[held_guessing]) - np.log1p(-given[held_guessing])
    template = params_from_table(tables[0], template)
    shape = (tables.shape[0], template.n_items, template.max_slots)
    held = np.zeros(shape, dtype=bool) if fixed is None else np.broadcast_to(fixed, shape).copy()
    held[:, held_guessing, GUESSING_SLOT] = True
    return template, held


def _explained(exc: ValueError, x: FloatArray, k: IntArray, layout: GroupLayout) -> ValueError:
    """The error to raise when the EM failed: the categories nobody chose, when the data show some."""
    unused = _unused_categories(x, k, (layout.index >= 0).any(axis=(0, 2))) if x.shape[0] else None
    return ValueError(unused) if unused else exc


def _unused_categories(x: FloatArray, k: IntArray, estimated: np.ndarray) -> str | None:
    """Items whose parameters are estimated with a category no respondent chose, in words (None: none)."""
    found = []
    for j in np.flatnonzero(estimated):
        column = x[:, j]
        counts = np.bincount(column[~np.isnan(column)].astype(np.int64), minlength=int(k[j]))
        empty = np.flatnonzero(counts == 0)
        if empty.size:
            found.append(f"item {j}: categor{'y' if empty.size == 1 else 'ies'} {', '.join(map(str, empty))}")
    if not found:
        return None
    return (
        "the estimates ran off because some categories have no responses ("
        + "; ".join(found[:10])
        + "): a category nobody chose cannot be estimated; merge it with a neighbouring category (or leave out an "
        "item nobody answered in more than one category)"
    )


def calibrate_single_group(
    responses: FloatArray,
    n_categories: IntArray,
    *,
    models: tuple[str, ...] = (),
    settings: EMSettings | None = None,
    start: ItemParameters | None = None,
    fixed: np.ndarray | None = None,
    progress: Callable[[int, float], None] | None = None,
) -> CalibrationFit:
    """Marginal ML item parameters with the latent distribution fixed at N(0, 1).

    The one-group case of :func:`calibrate_groups`.

    Parameters
    ----------
    responses : array of shape (n_persons, n_items)
        Category codes 0 .. K_j - 1, NaN for not administered (validated input).
    n_categories : int array of shape (n_items,)
    models : per-item model names; "1pl" items share one slope.
    start : starting parameters (default: classical starting values).
    fixed : bool array of shape (n_items, max_categories); True holds a slot at ``start``.
    progress : called as ``progress(iteration, log_likelihood)``.
    """
    x = np.asarray(responses, dtype=np.float64)
    k = np.asarray(n_categories, dtype=np.int64)
    if start is not None and not models:
        models = start.models
    fit = calibrate_groups(
        x,
        k,
        np.zeros(x.shape[0], dtype=np.int64),
        1,
        models=models,
        settings=settings,
        fixed=None if fixed is None else np.asarray(fixed, dtype=bool)[None],
        start=None if start is None else slot_table(start)[None],
        latent=LatentSpec.reference_fixed(1),
        progress=progress,
    )
    params = fit.group_params(0)
    return CalibrationFit(
        params=params,
        slope_se=fit.slot_se[0, :, 0],
        intercept_se=fit.slot_se[0, :, 1:],
        log_likelihood=fit.log_likelihood,
        n_parameters=fit.n_parameters,
        n_persons=fit.n_persons,
        converged=fit.converged,
        n_iter=fit.n_iter,
        covariance=fit.covariance,
        settings=fit.settings,
        layout=fit.layout,
        history=fit.history,
    )


@dataclass(frozen=True)
class HeldItemFit:
    """Marginal ML of one studied item in a reference and a focal group, every other item held.

    ``tables`` (2, 1, K) holds the reference and focal (slope, intercepts...); ``vector`` the
    free item slots, then the focal latent mean and SD; ``slot_index`` (2, 1, K) each slot's place in
    ``vector`` (-1: held).
    """

    log_likelihood: float
    tables: FloatArray
    vector: FloatArray
    template: ItemParameters
    slot_index: IntArray
    _unpack: Callable[[FloatArray], tuple[FloatArray, FloatArray, FloatArray]]
    _score: Callable[[FloatArray], FloatArray]
    _information: Callable[[], FloatArray]

    def group_params(self, h: int, vector: FloatArray | None = None) -> ItemParameters:
        """Group h's (0 reference, 1 focal) item parameters, at the estimate or at another ``vector``."""
        tables = self.tables if vector is None else self._unpack(vector)[0]
        return params_from_table(tables[h], self.template)

    def score(self, vector: FloatArray) -> FloatArray:
        """Gradient of the marginal log-likelihood at ``vector`` (Fisher's identity: the E-step's expected score)."""
        return self._score(vector)

    def covariance(self) -> FloatArray | None:
        """Observed-information covariance of ``vector`` (None when the information is singular)."""
        return information_to_covariance(self._information())


def fit_item_given_offsets(  # noqa: PLR0913 - the held rows, the item and keyword-only options
    rows: Sequence[HeldLikelihood],
    template: ItemParameters,
    start: FloatArray,
    latent: LatentSpec,
    group_free: np.ndarray,
    settings: EMSettings,
    *,
    fixed: np.ndarray | None = None,
) -> HeldItemFit:
    """Fit one item's parameters (shared or group-specific) and the focal latent density.

    Every other item is held at fixed values: ``rows[h]`` holds their likelihood for the rows of
    group h (0 = reference, 1 = focal) split by the studied item's answer, built once from the
    offsets (their log-likelihood on ``settings.quadrature``) by :meth:`HeldLikelihood.from_offset`
    and shared by every model fitted to the same item. ``template`` is the one-item parameter
    template, ``start`` its (2, 1, K) starting tables, ``group_free`` (2, 1, K) marks the focal
    group's own slots and ``fixed`` (2, 1, K) the slots held at ``start`` (a reference "group" with
    no rows whose parameters are known: an earlier calibration cycle). The focal mean and SD are
    estimated; the reference group's latent density stays as ``latent`` gives it.
    """
    points = settings.quadrature.points
    layout = GroupLayout.build(template, 2, group_free=group_free, fixed=fixed)
    n_item = layout.n_free

    def unpack(vec: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        tables = layout.from_vector(vec[:n_item], start)
        mean, sd = latent.mean.copy(), latent.sd.copy()
        mean[1], sd[1] = vec[n_item], vec[n_item + 1]
        return tables, mean, sd

    def e_step(vec: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, float]:
        tables, mean, sd = unpack(vec)
        if sd[1] <= 0:
            raise ValueError("invalid parameters")
        params = [params_from_table(tables[h], template) for h in range(2)]
        return (tables, mean, sd, *held_item_counts(rows, params, mean, sd, points))

    def em_map(vec: FloatArray) -> tuple[FloatArray, float]:
        tables, mean, sd, counts, mass, log_lik = e_step(vec)
        tables = m_step(tables, template, counts, points, layout, prior=None, n_iter=settings.m_step_iter)
        mean[1], sd[1] = latent_update(mass[1], points, float(mean[1]), float(sd[1]), free_mean=True, free_sd=True)
        return np.concatenate([layout.to_vector(tables), [mean[1], sd[1]]]), log_lik

    def terms(vec: FloatArray) -> HeldTerms | None:
        tables, mean, sd = unpack(vec)
        if sd[1] <= 0 or not valid_tables(tables, template).all():
            return None
        params = [params_from_table(tables[h], template) for h in range(2)]
        return held_item_terms(rows, params, mean, sd, points, layout)

    vec = np.concatenate([layout.to_vector(start), [latent.mean[1], latent.sd[1]]])
    vec, current = _newton(vec, terms)
    if current is None:
        # Newton could not go on (information not positive definite, or no step raised the
        # likelihood): EM, which always can, from where Newton stopped.
        vec, _, _, _ = run_em(vec, em_map, settings, warn=False)
        current = terms(vec)
        if current is None:
            raise ValueError("the one-item fit left the valid parameter region")
    tables = unpack(vec)[0]
    final = current

    def score(at: FloatArray) -> FloatArray:
        value = terms(at)
        if value is None:
            raise ValueError("invalid parameters")
        return value.gradient

    return HeldItemFit(
        final.log_likelihood, tables, vec, template, layout.index, unpack, score, lambda: final.information
    )


NEWTON_MAX_ITER = 30
"""Newton steps of a one-item fit before EM takes over."""
NEWTON_TOLERANCE = 1e-6
"""A Newton step whose largest component is below this ends the one-item fit (the next would be ~1e-12)."""


def _newton(vec: FloatArray, terms: Callable[[FloatArray], HeldTerms | None]) -> tuple[FloatArray, HeldTerms | None]:
    """Newton-Raphson with step halving on a one-item marginal likelihood (analytic gradient and Hessian).

    Returns the estimate and its terms, or the last point and None when Newton cannot go on.
    """
    current = terms(vec)
    if current is None:
        return vec, None
    for _ in range(NEWTON_MAX_ITER):
        try:
            chol = np.linalg.cholesky(current.information)
        except np.linalg.LinAlgError:
            return vec, None
        step = np.linalg.solve(chol.T, np.linalg.solve(chol, current.gradient))
        for _halving in range(STEP_HALVINGS):
            trial = terms(vec + step)
            if trial is not None and trial.log_likelihood >= current.log_likelihood - 1e-10:
                break
            step = step * 0.5
        else:
            return vec, None
        vec, current = vec + step, trial
        if np.max(np.abs(step)) < NEWTON_TOLERANCE:
            return vec, current
    return vec, None


@dataclass(frozen=True)
class CellDensities:
    """Normal latent densities of reporting cells with the items held (arrays of shape (n_cells,))."""

    mean: FloatArray
    sd: FloatArray
    log_likelihood: float
    converged: bool
    n_iter: int


def fit_cell_densities(
    log_likelihood: FloatArray,
    cells: IntArray,
    n_cells: int,
    points: FloatArray,
    *,
    settings: EMSettings | None = None,
) -> CellDensities:
    """Marginal ML of a normal latent density per cell, every item held (the population model of plausible values).

    ``log_likelihood`` (n, Q) is each respondent's ``log P(x_i | theta_q)`` on ``points`` under the held
    item parameters, ``cells`` (n,) each respondent's cell 0 .. n_cells - 1. Bock-Aitkin EM on the cells'
    means and SDs (the posterior moments of :func:`latent_update`), SQUAREM-accelerated; the densities
    are on the items' scale.
    """
    settings = settings or EMSettings(tolerance=1e-6)
    cells = np.asarray(cells, dtype=np.int64)
    members = [np.flatnonzero(cells == c) for c in range(n_cells)]
    scaled, peak = exp_by_rows(np.asarray(log_likelihood, dtype=np.float64).copy())  # held: exponentiate once

    def em_map(vec: FloatArray) -> tuple[FloatArray, float]:
        mean, sd = vec[:n_cells], vec[n_cells:]
        if np.any(sd <= 0) or not np.all(np.isfinite(vec)):
            raise ValueError("invalid parameters")
        new, log_lik = vec.copy(), 0.0
        for c, rows in enumerate(members):
            if rows.size == 0:
                continue
            w = normal_weights(points, float(mean[c]), float(sd[c]))
            joint = scaled[rows] * w
            total = joint.sum(axis=1)
            log_lik += float(np.log(total).sum() + peak[rows].sum())
            mass = (joint / total[:, None]).sum(axis=0)
            new[c], new[n_cells + c] = latent_update(
                mass, points, float(mean[c]), float(sd[c]), free_mean=True, free_sd=True
            )
        return new, log_lik

    start = np.concatenate([np.zeros(n_cells), np.ones(n_cells)])
    vec, converged, n_iter, history = run_em(start, em_map, settings, warn=False)
    return CellDensities(
        mean=vec[:n_cells],
        sd=vec[n_cells:],
        log_likelihood=history[-1] if history else float("nan"),
        converged=converged,
        n_iter=n_iter,
    )
