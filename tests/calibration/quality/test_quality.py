"""quality/ against independent routes: alpha by its textbook formula, RMSD by a person-by-person loop."""

from __future__ import annotations

import math

import numpy as np
import pytest

from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import ItemParameters
from calibration.quality.classical import classical_statistics, cronbach_alpha
from calibration.quality.model_fit import item_fit

SMALL = np.array(
    [
        [1, 1, 0, 2],
        [0, 1, 0, 1],
        [1, 1, 1, 2],
        [0, 0, 0, 0],
        [1, 0, 1, 1],
        [1, 1, 1, 1],
    ],
    dtype=float,
)


def _textbook_alpha(rows: list[list[float]]) -> float:
    # Cronbach (1951): k / (k - 1) * (1 - sum of item variances / variance of the total), sample variances.
    k = len(rows[0])

    def var(values: list[float]) -> float:
        mean = sum(values) / len(values)
        return sum((v - mean) ** 2 for v in values) / (len(values) - 1)

    items = [var([r[j] for r in rows]) for j in range(k)]
    return k / (k - 1) * (1 - sum(items) / var([sum(r) for r in rows]))


# classical_statistics needs MIN_COMPLETE_ROWS_FOR_ALPHA complete rows: twelve, rows in two orders.
TWELVE = np.vstack([SMALL, SMALL[::-1, ::-1]])


def test_alpha_equals_the_textbook_formula() -> None:
    assert cronbach_alpha(SMALL) == pytest.approx(_textbook_alpha(SMALL.tolist()), rel=1e-12)
    assert classical_statistics(TWELVE).alpha == pytest.approx(_textbook_alpha(TWELVE.tolist()), rel=1e-12)


def test_alpha_if_deleted_is_alpha_of_the_other_items() -> None:
    stats = classical_statistics(TWELVE)
    for j in range(TWELVE.shape[1]):
        rest = np.delete(TWELVE, j, axis=1).tolist()
        assert stats.alpha_if_deleted[j] == pytest.approx(_textbook_alpha(rest), rel=1e-12)


def test_rmsd_equals_a_person_by_person_computation() -> None:
    # Three right/wrong items and one 3-category item; every posterior built with math.exp, point by point.
    slopes = [1.2, 0.8, 1.5, 1.0]
    intercepts = [[0.3], [-0.4], [0.1], [1.0, -0.8]]
    params = ItemParameters(
        slopes=np.array(slopes),
        intercepts=np.array([[0.3, np.nan], [-0.4, np.nan], [0.1, np.nan], [1.0, -0.8]]),
        n_categories=np.array([2, 2, 2, 3]),
        models=("2pl", "2pl", "2pl", "grm"),
    )
    x = SMALL.copy()
    x[1, 2] = np.nan  # one missing answer
    grid = QuadratureGrid(21, -4.0, 4.0)
    points = [float(p) for p in grid.points]
    mean, sd = 0.2, 1.1

    def p_category(j: int, k: int, theta: float) -> float:
        star = [1.0] + [1 / (1 + math.exp(-(slopes[j] * theta + c))) for c in intercepts[j]] + [0.0]
        return star[k] - star[k + 1]

    prior = [math.exp(-0.5 * ((t - mean) / sd) ** 2) for t in points]
    prior = [w / sum(prior) for w in prior]
    posts = []
    for row in x:
        joint = [
            w * math.prod(p_category(j, int(v), t) for j, v in enumerate(row) if not math.isnan(v))
            for t, w in zip(points, prior, strict=True)
        ]
        posts.append([v / sum(joint) for v in joint])
    expected = []
    for j in range(4):
        top = len(intercepts[j])
        total = 0.0
        for q, t in enumerate(points):
            mass = sum(posts[i][q] for i in range(len(x)) if not math.isnan(x[i, j]))
            observed = sum(posts[i][q] * x[i, j] for i in range(len(x)) if not math.isnan(x[i, j])) / mass
            model = sum(k * p_category(j, k, t) for k in range(top + 1))
            total += prior[q] * (observed - model) ** 2
        expected.append(math.sqrt(total) / top)
    got = item_fit(params, x, latent_mean=mean, latent_sd=sd, grid=grid).rmsd
    np.testing.assert_allclose(got, expected, rtol=1e-10)


def test_s_x2_equals_brute_force_enumeration_of_patterns() -> None:
    # Five right/wrong items: the expected proportions P(X_j = k | S = s) come from enumerating all 32 patterns
    # (independent of the Lord-Wingersky recursion); with 4000 rows every expected cell is above 1, so no score
    # groups merge and S-X2 = sum over s and k of (O - E)^2 / E with df = 4 score groups x 1 - 2 parameters.
    import itertools

    from calibration.irt.simulate import simulate_responses

    slopes = [1.0, 1.4, 0.7, 1.2, 0.9]
    intercepts = [0.5, -0.2, 0.0, 0.8, -0.6]
    params = ItemParameters(
        slopes=np.array(slopes),
        intercepts=np.array(intercepts)[:, None],
        n_categories=np.full(5, 2),
        models=("2pl",) * 5,
    )
    rng = np.random.default_rng(21)
    x = simulate_responses(params.slopes, params.thresholds()[:, 0], rng.normal(size=4000), rng)
    grid = QuadratureGrid(31, -5.0, 5.0)
    points = [float(p) for p in grid.points]
    weights = [math.exp(-0.5 * t * t) for t in points]
    weights = [w / sum(weights) for w in weights]

    def p_right(j: int, t: float) -> float:
        return 1 / (1 + math.exp(-(slopes[j] * t + intercepts[j])))

    pattern_prob = {}
    for pattern in itertools.product((0, 1), repeat=5):
        pattern_prob[pattern] = sum(
            w * math.prod(p_right(j, t) if v else 1 - p_right(j, t) for j, v in enumerate(pattern))
            for t, w in zip(points, weights, strict=True)
        )
    totals = x.sum(axis=1)
    got = item_fit(params, x, grid=grid)
    for j in range(5):
        stat = 0.0
        for s in range(1, 5):
            at_s = {p: v for p, v in pattern_prob.items() if sum(p) == s}
            n_s = float(np.sum(totals == s))
            for k in (0, 1):
                expected = n_s * sum(v for p, v in at_s.items() if p[j] == k) / sum(at_s.values())
                observed = float(np.sum((totals == s) & (x[:, j] == k)))
                assert expected >= 1.0
                stat += (observed - expected) ** 2 / expected
        assert got.s_x2_df[j] == 2
        assert got.s_x2[j] == pytest.approx(stat, rel=1e-9)
