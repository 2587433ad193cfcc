"""Anchored likelihood-ratio DIF tests (Thissen, Steinberg & Wainer 1988, 1993).

For a studied item j and focal group g, three nested models are fitted on the reference and
focal rows: M0, item j has the same parameters in both groups; M1, the same slope and
group-specific intercepts; M2, all of item j's parameters group-specific. Non-uniform DIF is
M2 vs M1 (1 df), uniform DIF is M1 vs M0 (K_j - 1 df) and the omnibus test M2 vs M0 (K_j df).
Every other item is held at its estimates in a base model (the scalar model while screening,
the anchor model while testing); their log-likelihood enters as a fixed offset
(:func:`calibration.estimation.fit_item_given_offsets`), and the focal group's latent mean and
SD are re-estimated in every model. This "anchored LR with the other items held" is a
documented approximation to refitting every parameter; the benchmark measures its Type I
error and power.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import stats

from calibration.dif.effect_size import effect_interval, effect_size
from calibration.dif.settings import DifSettings
from calibration.estimation import (
    EMSettings,
    HeldItemFit,
    HeldLikelihood,
    LatentSpec,
    MultiGroupFit,
    fit_item_given_offsets,
)
from calibration.irt.likelihood import QuadratureGrid, build_design, log_likelihood_grid, one_item_log_likelihood
from calibration.irt.models import GUESSING_SLOT, FloatArray, IntArray, ItemParameters

EFFECT_SE_STEP = 1e-5
"""Relative step of the central differences that give the effect's gradient (delta method)."""


@dataclass(frozen=True)
class ItemGroupTest:
    """LR tests and effect size for one item in one focal group."""

    item: int
    group: int
    g2_omnibus: float
    df_omnibus: int
    p_omnibus: float
    g2_nonuniform: float
    p_nonuniform: float
    g2_uniform: float
    df_uniform: int
    p_uniform: float
    effect_theta: float
    effect_signed: float
    reference_table: FloatArray  # item j's (slope, intercepts) for the reference group under M2
    focal_table: FloatArray  # ... for the focal group under M2
    p_adjusted: float = float("nan")
    effect_theta_se: float = float("nan")  # delta-method SE of effect_theta under M2
    focal_covariance: FloatArray | None = None  # the focal group's estimated own slots under M2
    focal_slots: IntArray | None = None  # which slots those are (a held slot, e.g. an asymptote, is left out)

    def effect_interval(self) -> tuple[float, float]:
        """95% interval of the unsigned effect, clipped at 0 (NaN bounds without an SE)."""
        return effect_interval(self.effect_theta, self.effect_theta_se)

    def level(self, settings: DifSettings) -> str:
        """The effect band that the whole 95% interval lies in, else ``uncertain``.

        Noise inflates an unsigned effect (its estimate is never below 0), most in small
        groups, so the point estimate alone overstates it; without an SE the point decides.
        """
        low, high = self.effect_interval()
        if not np.isfinite(high):
            low = high = self.effect_theta
        if low >= settings.effect_large:
            return "large"
        if low >= settings.effect_moderate and high < settings.effect_large:
            return "moderate"
        if high < settings.effect_moderate:
            return "negligible"
        return "uncertain"

    def flagged(self, settings: DifSettings) -> bool:
        """Significant after FDR control and at least a moderate effect."""
        return bool(self.p_adjusted < settings.fdr_level and self.effect_theta >= settings.effect_moderate)


@dataclass
class _GroupRows:
    rows: IntArray
    loglik: FloatArray  # (n_rows, n_points) all items at the base model's values


def _base_logliks(
    fit: MultiGroupFit, responses: FloatArray, group_index: IntArray, points: FloatArray
) -> list[_GroupRows]:
    out = []
    for g in range(fit.tables.shape[0]):
        rows = np.flatnonzero(group_index == g)
        design = build_design(responses[rows], fit.template.n_categories)
        out.append(_GroupRows(rows, log_likelihood_grid(fit.group_params(g), points, design)))
    return out


def _effect_se(fit: HeldItemFit, mean: float, sd: float, covariance: FloatArray | None) -> float:
    """Delta-method SE of the unsigned effect: its numerical gradient through the observed covariance."""
    if covariance is None:
        return float("nan")

    def effect_at(vec: FloatArray) -> float:
        return effect_size(fit.group_params(0, vec), fit.group_params(1, vec), mean, sd)[0]

    gradient = np.zeros(fit.vector.size)
    for p in range(fit.vector.size):
        h = EFFECT_SE_STEP * max(1.0, abs(fit.vector[p]))
        up, down = fit.vector.copy(), fit.vector.copy()
        up[p] += h
        down[p] -= h
        gradient[p] = (effect_at(up) - effect_at(down)) / (2 * h)
    variance = float(gradient @ covariance @ gradient)
    return float(np.sqrt(variance)) if variance >= 0 else float("nan")


def _held_rows(
    fit: MultiGroupFit, base: list[_GroupRows], responses: FloatArray, j: int, g: int, points: FloatArray
) -> HeldLikelihood:
    """Group g's rows with every item but j held at the base model's values, split by the answer to j."""
    rows = base[g]
    x = responses[rows.rows, j]
    k_j = int(fit.template.n_categories[j])
    return HeldLikelihood.from_offset(rows.loglik - one_item_log_likelihood(fit.group_params(g), j, x, points), x, k_j)


def _fitted_latent(latent: LatentSpec, vector: FloatArray) -> LatentSpec:
    """``latent`` with the focal mean and SD taken from a one-item fit's vector (its last two entries)."""
    mean, sd = latent.mean.copy(), latent.sd.copy()
    mean[1], sd[1] = vector[-2], vector[-1]
    return LatentSpec(mean, sd, latent.free_mean, latent.free_sd)


def _test_item(  # noqa: PLR0913 - the cell, the base model and its data
    j: int,
    g: int,
    fit: MultiGroupFit,
    base: list[_GroupRows],
    responses: FloatArray,
    settings: EMSettings,
    reference: HeldLikelihood,
    *,
    omnibus_only: bool = False,
) -> ItemGroupTest:
    points = settings.quadrature.points
    n_s = int(fit.template.n_slots[j])
    # The other items' likelihood, split by the studied item's answer once for all nested models
    # (the reference group's split once for every focal group).
    held = [reference, _held_rows(fit, base, responses, j, g, points)]
    start = np.stack([fit.tables[0, j : j + 1, :n_s], fit.tables[g, j : j + 1, :n_s]])
    latent = LatentSpec(
        mean=np.array([0.0, fit.latent_mean[g]]),
        sd=np.array([1.0, fit.latent_sd[g]]),
        free_mean=np.array([False, True]),
        free_sd=np.array([False, True]),
    )
    fixed = None
    if fit.settings.held_guessing and np.isfinite(fit.settings.held_guessing[j]) and fit.template.has_guessing[j]:
        fixed = np.zeros((2, 1, n_s), dtype=bool)
        fixed[:, 0, GUESSING_SLOT] = True  # an asymptote the item spec holds is held in every model
    return nested_item_tests(
        held, fit.template.subset([j]), start, latent, settings, item=j, group=g, fixed=fixed, omnibus_only=omnibus_only
    )


def nested_item_tests(  # noqa: PLR0913 - the held rows, the item and keyword-only options
    held: list[HeldLikelihood],
    one: ItemParameters,
    start: FloatArray,
    latent: LatentSpec,
    settings: EMSettings,
    *,
    item: int,
    group: int,
    fixed: np.ndarray | None = None,
    omnibus_only: bool = False,
) -> ItemGroupTest:
    """The nested one-item models M0, M1, M2 of one item in a reference (``held[0]``) and a focal group.

    ``one`` is the item's one-item template, ``start`` its (2, 1, K) tables, ``latent`` the two
    groups' latent densities (the focal mean and SD are re-estimated in every model; the effect is
    weighted by the focal density given). ``fixed`` (2, 1, K) holds slots at ``start``: a reference
    with no rows and known parameters (an earlier calibration cycle) is a drift test between cycles.

    The focal group's own slots: none (M0), every slot but the slope (M1) and all (M2); so the omnibus
    test has one df per slot, the uniform part (M1 against M0) one fewer and the non-uniform part (the
    slope) one. A 3PL item's asymptote is one of its slots: the omnibus test frees slope, intercept and
    asymptote (3 df), the uniform part intercept and asymptote (2 df: a difference in the lower part of
    the curve counts as uniform), and every estimated asymptote carries the asymptote prior in both
    models, so the statistic is a difference of penalized log-likelihoods.
    """
    k_j = int(one.n_slots[0])  # slots: K categories' slope and intercepts, a 3PL item's asymptote
    focal_mean, focal_sd = float(latent.mean[1]), float(latent.sd[1])  # the given density weights the effect
    designs = [np.zeros(k_j, dtype=bool), np.arange(k_j) > 0, np.ones(k_j, dtype=bool)]
    if omnibus_only:
        designs = [designs[0], designs[2]]
    fits: list[HeldItemFit] = []
    held_focal = np.zeros(k_j, dtype=bool) if fixed is None else np.asarray(fixed, dtype=bool)[1, 0]
    for free_slots in designs:
        group_free = np.zeros((2, 1, k_j), dtype=bool)
        group_free[1, 0] = free_slots
        if fits:  # each model nests the one before it: start from that one's estimates
            start, latent = fits[-1].tables, _fitted_latent(latent, fits[-1].vector)
        fits.append(fit_item_given_offsets(held, one, start, latent, group_free, settings, fixed=fixed))
    log_liks = [f.log_likelihood for f in fits]
    ll0, ll2 = log_liks[0], log_liks[-1]
    ll1 = log_liks[1] if not omnibus_only else float("nan")
    g2_all = max(2 * (ll2 - ll0), 0.0)
    g2_non = max(2 * (ll2 - ll1), 0.0) if not omnibus_only else float("nan")
    g2_uni = max(2 * (ll1 - ll0), 0.0) if not omnibus_only else float("nan")
    final = fits[-1].tables
    ref_params, foc_params = fits[-1].group_params(0), fits[-1].group_params(1)
    effect, signed = effect_size(ref_params, foc_params, focal_mean, focal_sd)
    covariance = fits[-1].covariance()
    own = fits[-1].slot_index[1, 0]
    focal_slots = np.flatnonzero(own >= 0)
    focal_covariance = None if covariance is None else covariance[np.ix_(own[focal_slots], own[focal_slots])]
    df_all = int(np.sum(designs[-1] & ~held_focal))
    df_uniform = int(np.sum(np.arange(k_j) > 0) - np.sum(held_focal[1:]))
    return ItemGroupTest(
        item=item,
        group=group,
        g2_omnibus=g2_all,
        df_omnibus=df_all,
        p_omnibus=float(stats.chi2.sf(g2_all, df_all)),
        g2_nonuniform=g2_non,
        p_nonuniform=float(stats.chi2.sf(g2_non, 1)) if not omnibus_only else float("nan"),
        g2_uniform=g2_uni,
        df_uniform=df_uniform,
        p_uniform=float(stats.chi2.sf(g2_uni, df_uniform)) if not omnibus_only else float("nan"),
        effect_theta=effect,
        effect_signed=signed,
        reference_table=final[0, 0].copy(),
        focal_table=final[1, 0].copy(),
        effect_theta_se=_effect_se(fits[-1], focal_mean, focal_sd, covariance),
        focal_covariance=focal_covariance,
        focal_slots=focal_slots,
    )


def anchored_lr_tests(  # noqa: PLR0913 - the base fit, the data and keyword-only options
    fit: MultiGroupFit,
    responses: FloatArray,
    group_index: IntArray,
    items: list[int],
    *,
    tolerance: float = 1e-3,
    quadrature: QuadratureGrid | None = None,
    omnibus_only: bool = False,
    skip: set[tuple[int, int]] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> dict[tuple[int, int], ItemGroupTest]:
    """Anchored LR tests of ``items`` in every focal group against the base ``fit`` (``skip``: cells left out)."""
    settings = EMSettings(
        tolerance=tolerance,
        standard_errors=False,
        quadrature=quadrature or fit.settings.quadrature,
        compress_patterns=False,
    )
    base = _base_logliks(fit, responses, group_index, settings.quadrature.points)
    out: dict[tuple[int, int], ItemGroupTest] = {}
    n_groups = fit.tables.shape[0]
    total = len(items) * (n_groups - 1)
    points = settings.quadrature.points
    for j in items:
        focal = [g for g in range(1, n_groups) if not (skip and (j, g) in skip)]
        if not focal:
            continue
        reference = _held_rows(fit, base, responses, j, 0, points)
        for g in focal:
            out[(j, g)] = _test_item(j, g, fit, base, responses, settings, reference, omnibus_only=omnibus_only)
            if progress is not None:
                progress(len(out), total)
    return out
