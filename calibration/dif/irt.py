"""IRT DIF: anchor selection, anchored likelihood-ratio tests, FDR control, effect sizes.

Likelihood-ratio DIF (Thissen, Steinberg & Wainer 1988, 1993). For a studied item
j and focal group g, three nested models are fitted on the reference and focal
rows:

- M0: item j has the same parameters in both groups;
- M1: the same slope, group-specific intercepts;
- M2: all of item j's parameters group-specific.

Non-uniform DIF is M2 vs M1 (1 df), uniform DIF is M1 vs M0 (K_j - 1 df) and the
omnibus test M2 vs M0 (K_j df). Every other item is held at its estimates in a
base model (the scalar model while screening, the anchor model while testing);
their log-likelihood enters as a fixed offset, and the focal group's latent mean
and SD are re-estimated in every model. This "anchored LR with the other items
held" is a documented approximation to refitting every parameter; the benchmark
measures its Type I error and power.

Anchors (after Woods 2009): screen every item with all other items as anchors, rank
the items by their largest over focal groups of (G2 - df) / sqrt(2 df) (ties: its sum
over groups, then the item id, so the column order never matters), then keep the first
k (default k = max(4, 20% of items)), or use the anchors a user names. Multiple testing: Benjamini & Hochberg (1995)
across items x focal groups.

Effect size on the theta scale, capturing non-uniform DIF too: the focal-density
weighted mean absolute difference between the group's and the reference expected
item score curves, divided by the weighted mean slope of the reference curve,
``sum_q w_q |E_g(theta_q) - E_R(theta_q)| / sum_q w_q E_R'(theta_q)`` with
``w ~ N(mu_g, sigma_g)``. For pure uniform DIF in a 2PL item it is close to the
threshold shift |b_g - b_R|. Levels (equitheta defaults, settings): negligible
< 0.20, moderate 0.20 - 0.40, large >= 0.40 theta units.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import stats

from calibration.dif.intervals import effect_interval
from calibration.estimation import (
    EMSettings,
    HeldItemFit,
    LatentSpec,
    MultiGroupFit,
    calibrate_groups,
    fit_item_given_offsets,
)
from calibration.irt.likelihood import (
    QuadratureGrid,
    build_design,
    log_likelihood_grid,
    normal_weights,
    split_log_table,
)
from calibration.irt.models import (
    FloatArray,
    IntArray,
    ItemParameters,
    category_probability_derivatives,
    expected_item_scores,
)


@dataclass(frozen=True)
class DifSettings:
    """Settings of the IRT DIF stage (all documented defaults)."""

    alpha: float = 0.05  # false discovery rate across items x focal groups
    effect_moderate: float = 0.20
    effect_large: float = 0.40
    anchor_fraction: float = 0.20
    min_anchors: int = 4
    anchors: tuple[str, ...] = ()  # user-named anchors (item ids); empty: select automatically
    sub_tolerance: float = 1e-3


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
        return bool(self.p_adjusted < settings.alpha and self.effect_theta >= settings.effect_moderate)


def benjamini_hochberg(p_values: FloatArray) -> FloatArray:
    """Adjusted p values (step-up, Benjamini & Hochberg 1995), by scipy's ``false_discovery_control``."""
    p = np.asarray(p_values, dtype=np.float64)
    return p if p.size == 0 else np.asarray(stats.false_discovery_control(p, method="bh"))


def effect_size(reference: ItemParameters, focal: ItemParameters, mean: float, sd: float) -> tuple[float, float]:
    """Theta-scale effect (unsigned, signed) of one item (see the module docstring)."""
    theta = np.linspace(mean - 5 * sd, mean + 5 * sd, 201)
    w = normal_weights(theta, mean, sd)
    e_ref = expected_item_scores(reference, theta)[0]
    e_foc = expected_item_scores(focal, theta)[0]
    k = np.arange(reference.max_categories, dtype=np.float64)
    slope = np.einsum("kq,k->q", category_probability_derivatives(reference, theta)[0], k)
    denominator = float(w @ np.abs(slope))
    if denominator <= 0:
        return float("nan"), float("nan")
    diff = e_foc - e_ref
    return float(w @ np.abs(diff)) / denominator, float(w @ diff) / denominator


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


def _item_loglik(params: ItemParameters, j: int, x: FloatArray, points: FloatArray) -> FloatArray:
    one = params.subset([j])
    design = build_design(x[:, None], one.n_categories)
    return log_likelihood_grid(one, points, design, tables=split_log_table(one, points, design))


def _effect_se(fit: HeldItemFit, mean: float, sd: float) -> float:
    """Delta-method SE of the unsigned effect: its numerical gradient through the observed covariance."""
    covariance = fit.covariance()
    if covariance is None:
        return float("nan")

    def effect_at(vec: FloatArray) -> float:
        return effect_size(fit.group_params(0, vec), fit.group_params(1, vec), mean, sd)[0]

    gradient = np.zeros(fit.vector.size)
    for p in range(fit.vector.size):
        h = 1e-5 * max(1.0, abs(fit.vector[p]))
        up, down = fit.vector.copy(), fit.vector.copy()
        up[p] += h
        down[p] -= h
        gradient[p] = (effect_at(up) - effect_at(down)) / (2 * h)
    variance = float(gradient @ covariance @ gradient)
    return float(np.sqrt(variance)) if variance >= 0 else float("nan")


def _test_item(
    j: int,
    g: int,
    fit: MultiGroupFit,
    base: list[_GroupRows],
    responses: FloatArray,
    settings: EMSettings,
    *,
    omnibus_only: bool = False,
) -> ItemGroupTest:
    points = settings.quadrature.points
    template = fit.template
    k_j = int(template.n_categories[j])
    ref, foc = base[0], base[g]
    x_ref, x_foc = responses[ref.rows, j], responses[foc.rows, j]
    answers = [x_ref, x_foc]
    offsets = [
        ref.loglik - _item_loglik(fit.group_params(0), j, x_ref, points),
        foc.loglik - _item_loglik(fit.group_params(g), j, x_foc, points),
    ]
    one = template.subset([j])
    start = np.stack([fit.tables[0, j : j + 1, :k_j], fit.tables[g, j : j + 1, :k_j]])
    latent = LatentSpec(
        mean=np.array([0.0, fit.latent_mean[g]]),
        sd=np.array([1.0, fit.latent_sd[g]]),
        free_mean=np.array([False, True]),
        free_sd=np.array([False, True]),
    )
    designs = [np.zeros(k_j, dtype=bool), np.arange(k_j) > 0, np.ones(k_j, dtype=bool)]
    if omnibus_only:
        designs = [designs[0], designs[2]]
    fits = []
    for free_slots in designs:
        group_free = np.zeros((2, 1, k_j), dtype=bool)
        group_free[1, 0] = free_slots
        fits.append(fit_item_given_offsets(answers, offsets, one, start, latent, group_free, settings))
    log_liks = [f.log_likelihood for f in fits]
    ll0, ll2 = log_liks[0], log_liks[-1]
    ll1 = log_liks[1] if not omnibus_only else float("nan")
    g2_all = max(2 * (ll2 - ll0), 0.0)
    g2_non = max(2 * (ll2 - ll1), 0.0) if not omnibus_only else float("nan")
    g2_uni = max(2 * (ll1 - ll0), 0.0) if not omnibus_only else float("nan")
    final = fits[-1].tables
    ref_params, foc_params = fits[-1].group_params(0), fits[-1].group_params(1)
    focal_mean, focal_sd = float(fit.latent_mean[g]), float(fit.latent_sd[g])
    effect, signed = effect_size(ref_params, foc_params, focal_mean, focal_sd)
    return ItemGroupTest(
        item=j,
        group=g,
        g2_omnibus=g2_all,
        df_omnibus=k_j,
        p_omnibus=float(stats.chi2.sf(g2_all, k_j)),
        g2_nonuniform=g2_non,
        p_nonuniform=float(stats.chi2.sf(g2_non, 1)) if not omnibus_only else float("nan"),
        g2_uniform=g2_uni,
        df_uniform=k_j - 1,
        p_uniform=float(stats.chi2.sf(g2_uni, k_j - 1)) if not omnibus_only else float("nan"),
        effect_theta=effect,
        effect_signed=signed,
        reference_table=final[0, 0].copy(),
        focal_table=final[1, 0].copy(),
        effect_theta_se=_effect_se(fits[-1], focal_mean, focal_sd),
    )


def test_items(
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
    for j in items:
        for g in range(1, n_groups):
            if skip and (j, g) in skip:
                continue
            out[(j, g)] = _test_item(j, g, fit, base, responses, settings, omnibus_only=omnibus_only)
            if progress is not None:
                progress(len(out), total)
    return out


test_items.__test__ = False  # type: ignore[attr-defined]


@dataclass(frozen=True)
class AnchorCandidate:
    """One item's standing in the anchor ranking (see :func:`rank_anchor_candidates`)."""

    item: int
    statistic: float  # largest over focal groups of (G2 - df) / sqrt(2 df); +inf when never tested
    total: float  # the same, summed over the focal groups (first tie-break)
    worst_group: int  # -1 when never tested
    p_adjusted: float  # smallest FDR-adjusted screening p value over the focal groups


def rank_anchor_candidates(
    screening: dict[tuple[int, int], ItemGroupTest], item_ids: tuple[str, ...]
) -> list[AnchorCandidate]:
    """Every item, cleanest first, by a rule that does not depend on the order of the columns.

    The statistic is ``(G2 - df) / sqrt(2 df)``, approximately z under no DIF, so right/wrong and
    graded items compare; an item's value is its largest over focal groups (the group where it
    looks worst). Ties (e.g. several G2 of exactly 0) are broken by the sum over groups, then
    by item id in text order. An item with no screening test in any group ranks last.
    """
    by_item: dict[int, list[ItemGroupTest]] = {}
    for (j, _g), test in screening.items():
        by_item.setdefault(j, []).append(test)
    out = []
    for j in range(len(item_ids)):
        tests = by_item.get(j, [])
        if not tests:
            out.append(AnchorCandidate(j, float("inf"), float("inf"), -1, float("nan")))
            continue
        z = [(t.g2_omnibus - t.df_omnibus) / np.sqrt(2 * t.df_omnibus) for t in tests]
        worst = int(np.argmax(z))
        out.append(
            AnchorCandidate(
                j,
                float(z[worst]),
                float(np.sum(z)),
                tests[worst].group,
                float(np.nanmin([t.p_adjusted for t in tests])),
            )
        )
    return sorted(out, key=lambda c: (c.statistic, c.total, item_ids[c.item]))


def n_anchors(n_items: int, settings: DifSettings) -> int:
    """How many anchors the rule asks for: max(min_anchors, anchor_fraction of the items), at most all."""
    return min(max(settings.min_anchors, int(np.ceil(settings.anchor_fraction * n_items))), n_items)


def anchor_warnings(
    ranking: list[AnchorCandidate], anchors: list[int], item_ids: tuple[str, ...], settings: DifSettings
) -> list[str]:
    """Say when the anchors include items the screening itself found significant."""
    clean = [c for c in ranking if np.isfinite(c.statistic) and not c.p_adjusted < settings.alpha]
    chosen = {c.item: c for c in ranking if c.item in anchors}
    dirty = [c for c in chosen.values() if c.p_adjusted < settings.alpha]
    out = []
    if len(clean) < len(anchors):
        out.append(
            f"only {len(clean)} of {len(ranking)} items are clean in the all-other-items screening (FDR-adjusted "
            f"p >= {settings.alpha:g} in every group), but the anchor rule asks for {len(anchors)}: the anchor set "
            "may be contaminated; consider naming anchors chosen on content grounds (--anchors)"
        )
    if dirty:
        out.append(
            "anchor items that the screening found significant: "
            + ", ".join(f"{item_ids[c.item]} (adjusted p = {c.p_adjusted:.2g})" for c in dirty)
            + "; DIF in an anchor biases every other item's test"
        )
    return out


def adjust(tests: dict[tuple[int, int], ItemGroupTest]) -> dict[tuple[int, int], ItemGroupTest]:
    """Fill ``p_adjusted`` by Benjamini-Hochberg across all the given tests."""
    keys = list(tests)
    adjusted = benjamini_hochberg(np.array([tests[k].p_omnibus for k in keys]))
    return {k: _with_adjusted(tests[k], float(a)) for k, a in zip(keys, adjusted, strict=True)}


def _with_adjusted(test: ItemGroupTest, p: float) -> ItemGroupTest:
    return replace(test, p_adjusted=p)


@dataclass(frozen=True)
class DifOutcome:
    """Everything the IRT DIF stage decided and why."""

    screening: dict[tuple[int, int], ItemGroupTest]
    anchors: list[int]
    anchor_method: str
    anchor_fit: MultiGroupFit
    tests: dict[tuple[int, int], ItemGroupTest]
    settings: DifSettings = field(default_factory=DifSettings)
    ranking: list[AnchorCandidate] = field(default_factory=list)  # empty when the user named the anchors
    warnings: tuple[str, ...] = ()


def run_irt_dif(
    responses: FloatArray,
    n_categories: IntArray,
    group_index: IntArray,
    n_groups: int,
    scalar_fit: MultiGroupFit,
    *,
    item_ids: tuple[str, ...],
    models: tuple[str, ...],
    settings: DifSettings,
    em_settings: EMSettings,
    skip: set[tuple[int, int]] | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> DifOutcome:
    """Anchor selection (or user anchors), the anchor-model fit, and the tests of every other item.

    ``skip`` names (item, group) cells with no data to test (e.g. no variance in that group).
    """
    n_items = responses.shape[1]

    def report(stage: str) -> Callable[[int, int], None]:
        return lambda done, total: progress(stage, done, total) if progress is not None else None

    screening: dict[tuple[int, int], ItemGroupTest] = {}
    ranking: list[AnchorCandidate] = []
    warnings: list[str] = []
    if settings.anchors:
        unknown = [a for a in settings.anchors if a not in item_ids]
        if unknown:
            raise ValueError(f"anchor items not in the data: {', '.join(unknown)}")
        anchors = sorted(item_ids.index(a) for a in settings.anchors)
        method = "named by the user"
    else:
        screening = adjust(
            test_items(
                scalar_fit,
                responses,
                group_index,
                list(range(n_items)),
                tolerance=settings.sub_tolerance,
                omnibus_only=True,
                skip=skip,
                progress=report("screen"),
            )
        )
        ranking = rank_anchor_candidates(screening, item_ids)
        k = n_anchors(n_items, settings)
        anchors = sorted(c.item for c in ranking[:k])
        warnings = anchor_warnings(ranking, anchors, item_ids, settings)
        method = (
            "all-other-items screening: an omnibus anchored LR test of every item in every focal group, every "
            "other item held at the scalar-model estimates; items ranked by the largest over focal groups of "
            "(G2 - df) / sqrt(2 df), ties broken by its sum over groups and then by item id; the first "
            f"k = max({settings.min_anchors}, {settings.anchor_fraction:.0%} of {n_items} items) = {k} are the anchors"
        )
    k_max = int(n_categories.max())
    group_free = np.zeros((n_groups, n_items, k_max), dtype=bool)
    others = [j for j in range(n_items) if j not in anchors]
    group_free[1:, others, :] = True
    for j, g in skip or ():
        group_free[g, j, :] = False  # no data to free the cell with
    anchor_fit = calibrate_groups(
        responses,
        n_categories,
        group_index,
        n_groups,
        models=models,
        settings=replace(em_settings, standard_errors=False),
        group_free=group_free,
        start=scalar_fit.tables,
        warn=False,
    )
    tests = test_items(
        anchor_fit, responses, group_index, others, tolerance=settings.sub_tolerance, skip=skip, progress=report("test")
    )
    return DifOutcome(
        screening=screening,
        anchors=anchors,
        anchor_method=method,
        anchor_fit=anchor_fit,
        tests=adjust(tests),
        settings=settings,
        ranking=ranking,
        warnings=tuple(warnings),
    )
