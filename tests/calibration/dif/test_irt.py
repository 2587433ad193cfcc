"""IRT DIF and multiple-group estimation against direct integration, statsmodels and full refits."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats
from statsmodels.stats.multitest import multipletests

from calibration.dif.anchored_lr import anchored_lr_tests
from calibration.dif.effect_size import effect_size
from calibration.dif.irt import run_irt_dif
from calibration.dif.multiplicity import benjamini_hochberg
from calibration.dif.settings import DifSettings
from calibration.estimation import EMSettings, calibrate_groups
from calibration.irt.models import ItemParameters, log_category_probabilities
from tests.helpers import simulate_responses


def _groups_data(
    rng: np.random.Generator,
    a: np.ndarray,
    b: np.ndarray,
    n: int,
    shifts: dict,
    means: tuple[float, ...],
    sds: tuple[float, ...],
) -> tuple[np.ndarray, np.ndarray]:
    """Responses of len(means) groups; ``shifts[(item, group)]`` = ('uniform', logits) or ('slope', factor)."""
    blocks, labels = [], []
    for g, (mean, sd) in enumerate(zip(means, sds, strict=True)):
        ag, bg = a.copy(), b.copy()
        for (j, gg), (kind, size) in shifts.items():
            if gg == g:
                if kind == "uniform":
                    bg[j] = b[j] + size / a[j]
                else:
                    ag[j] = a[j] * size
        blocks.append(simulate_responses(ag, bg[:, None], rng.normal(mean, sd, n), rng))
        labels.append(np.full(n, g))
    return np.vstack(blocks), np.concatenate(labels)


def test_multigroup_log_likelihood_equals_direct_integration() -> None:
    # Independent route: scipy.integrate.quad of every distinct pattern's marginal probability under its
    # group's N(mean, sd). The focal SD comes out near 2 with 4 items and 150 respondents, so the grid must
    # reach +-14 (241 points) to hold its tails; then agreement to 1e-4 in the total.
    from calibration.irt.likelihood import QuadratureGrid

    rng = np.random.default_rng(6)
    a, b = np.array([1.2, 0.8, 1.5, 1.0]), np.array([-0.5, 0.3, 0.0, 1.0])
    x, groups = _groups_data(rng, a, b, 150, {}, (0.0, 0.6), (1.0, 1.3))
    x[rng.random(x.shape) < 0.1] = np.nan
    settings = EMSettings(standard_errors=False, quadrature=QuadratureGrid(241, -14, 14))
    fit = calibrate_groups(x, np.full(4, 2), groups, 2, settings=settings)
    coded = np.column_stack([np.where(np.isnan(x), -1, x), groups])
    patterns, counts = np.unique(coded, axis=0, return_counts=True)
    total = 0.0
    for pattern, count in zip(patterns, counts, strict=True):
        g = int(pattern[-1])
        params = fit.group_params(g)

        def density(t: float, row: np.ndarray = pattern[:-1], params: ItemParameters = params, g: int = g) -> float:
            log_p = log_category_probabilities(params, np.array([t]))[:, :, 0]
            ll = sum(log_p[j, int(v)] for j, v in enumerate(row) if v >= 0)
            return float(np.exp(ll) * stats.norm.pdf(t, fit.latent_mean[g], fit.latent_sd[g]))

        total += count * np.log(integrate.quad(density, -20, 20, epsabs=1e-13, limit=200)[0])
    assert fit.log_likelihood == pytest.approx(total, abs=1e-4)
    assert fit.latent_mean[1] == pytest.approx(0.6, abs=0.25)


def test_benjamini_hochberg_matches_statsmodels() -> None:
    p = np.random.default_rng(1).random(37) ** 3
    np.testing.assert_allclose(benjamini_hochberg(p), multipletests(p, method="fdr_bh")[1], rtol=1e-12)


def test_effect_size_is_the_threshold_shift_for_uniform_dif() -> None:
    # By construction (see calibration.dif.irt): for a pure location shift the effect is close to |b_g - b_R|.
    ref = ItemParameters.from_thresholds([1.3], [0.2])
    shifted = ItemParameters.from_thresholds([1.3], [0.6])
    unsigned, signed = effect_size(ref, shifted, 0.0, 1.0)
    assert unsigned == pytest.approx(0.4, rel=0.1)
    assert signed < 0  # harder for the focal group
    assert effect_size(ref, ref, 0.0, 1.0) == (0.0, 0.0)
    # Non-uniform DIF with no average shift still has a clear unsigned effect.
    flatter = ItemParameters.from_thresholds([0.5], [0.2])
    unsigned, signed = effect_size(ref, flatter, 0.0, 1.0)
    assert unsigned > 0.2 and abs(signed) < unsigned / 4


def test_held_others_lr_is_close_to_and_not_above_the_full_refit() -> None:
    # Independent route: the full LR by refitting every parameter (scalar model vs the model with the
    # studied item free for the focal group). Holding the other items can only lower the free model's
    # likelihood, so the held statistic is at most the full one; it should be close.
    rng = np.random.default_rng(12)
    a, b = rng.uniform(0.8, 1.8, 8), rng.normal(0, 1, 8)
    x, groups = _groups_data(rng, a, b, 1200, {(0, 1): ("uniform", 0.5)}, (0.0, -0.3), (1.0, 1.0))
    k = np.full(8, 2)
    settings = EMSettings(standard_errors=False, tolerance=1e-7)
    scalar = calibrate_groups(x, k, groups, 2, settings=settings)
    free = np.zeros((2, 8, 2), dtype=bool)
    free[1, 0, :] = True
    refit = calibrate_groups(x, k, groups, 2, settings=settings, group_free=free, start=scalar.tables)
    full = 2 * (refit.log_likelihood - scalar.log_likelihood)
    held = anchored_lr_tests(scalar, x, groups, [0], tolerance=1e-7, omnibus_only=True)[(0, 1)].g2_omnibus
    assert held <= full + 1e-4
    assert held == pytest.approx(full, rel=0.1)


@pytest.fixture(scope="module")
def known_dif() -> dict:
    # Seeded simulation with known DIF: uniform and non-uniform, two focal groups, 10% missing cells.
    rng = np.random.default_rng(2026)
    n_items = 16
    a, b = rng.uniform(0.9, 1.9, n_items), rng.normal(0, 0.9, n_items)
    shifts = {(3, 1): ("uniform", 0.8), (9, 2): ("uniform", -0.8), (12, 1): ("slope", 0.35)}
    x, groups = _groups_data(rng, a, b, 1500, shifts, (0.0, 0.4, -0.3), (1.0, 1.1, 0.9))
    x[rng.random(x.shape) < 0.10] = np.nan
    k = np.full(n_items, 2)
    scalar = calibrate_groups(x, k, groups, 3, settings=EMSettings(standard_errors=False))
    outcome = run_irt_dif(
        x,
        k,
        groups,
        3,
        scalar,
        item_ids=tuple(f"Q{j}" for j in range(n_items)),
        models=("2pl",) * n_items,
        settings=DifSettings(),
        em_settings=EMSettings(),
    )
    return {"outcome": outcome, "shifts": shifts}


def test_every_dif_cell_is_found_and_false_flags_are_rare(known_dif: dict) -> None:
    outcome, shifts = known_dif["outcome"], known_dif["shifts"]
    flagged = {key for key, t in outcome.tests.items() if t.flagged(outcome.settings)}
    assert set(shifts) <= flagged
    assert len(flagged - set(shifts)) <= 1
    assert not set(outcome.anchors) & {j for j, _ in shifts}


def test_group_means_are_recovered(known_dif: dict) -> None:
    fit = known_dif["outcome"].anchor_fit
    np.testing.assert_allclose(fit.latent_mean, [0.0, 0.4, -0.3], atol=0.1)
    np.testing.assert_allclose(fit.latent_sd, [1.0, 1.1, 0.9], atol=0.1)


def test_non_uniform_dif_shows_in_the_slope_test(known_dif: dict) -> None:
    test = known_dif["outcome"].tests[(12, 1)]
    assert test.p_nonuniform < 1e-4
    assert test.focal_table[0] < test.reference_table[0]


def test_user_named_anchors_are_used() -> None:
    rng = np.random.default_rng(5)
    a, b = rng.uniform(0.9, 1.6, 8), rng.normal(0, 1, 8)
    x, groups = _groups_data(rng, a, b, 600, {}, (0.0, 0.2), (1.0, 1.0))
    k = np.full(8, 2)
    scalar = calibrate_groups(x, k, groups, 2, settings=EMSettings(standard_errors=False))
    ids = tuple(f"Q{j}" for j in range(8))
    outcome = run_irt_dif(
        x,
        k,
        groups,
        2,
        scalar,
        item_ids=ids,
        models=("2pl",) * 8,
        settings=DifSettings(anchors=("Q1", "Q4", "Q6", "Q7")),
        em_settings=EMSettings(),
    )
    assert outcome.anchors == [1, 4, 6, 7] and outcome.anchor_method == "named by the user"
    assert set(j for j, _ in outcome.tests) == {0, 2, 3, 5}
    with pytest.raises(ValueError, match="anchor items not in the data: Q9"):
        run_irt_dif(
            x,
            k,
            groups,
            2,
            scalar,
            item_ids=ids,
            models=("2pl",) * 8,
            settings=DifSettings(anchors=("Q9",)),
            em_settings=EMSettings(),
        )
