"""Scoring against direct numerical integration, brute-force enumeration and scipy optimisers."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import integrate, optimize, stats

from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import ItemParameters, log_category_probabilities
from calibration.irt.reliability import marginal_reliability
from calibration.irt.reporting_scale import ReportingScale
from calibration.irt.scoring import NormalPrior, eap_scores, map_scores, ml_scores
from calibration.irt.summed_scores import summed_score_likelihoods, summed_score_table
from tests.helpers import simulate_responses


@pytest.fixture
def items() -> ItemParameters:
    # Three 2PL items and two graded items (3 and 4 categories).
    return ItemParameters.from_thresholds(
        [1.1, 0.7, 1.8, 1.3, 0.9],
        [[-0.4, np.nan, np.nan], [0.9, np.nan, np.nan], [0.2, np.nan, np.nan], [-1.0, 0.6, np.nan], [-1.2, 0.1, 1.4]],
    )


PATTERNS = np.array(
    [
        [1, 0, 1, 2, 1],
        [0, 0, 0, 0, 0],
        [1, 1, 1, 2, 3],
        [np.nan, 1, 0, np.nan, 2],
        [0, np.nan, np.nan, 1, np.nan],
    ],
    dtype=np.float64,
)


def _log_likelihood(params: ItemParameters, pattern: np.ndarray, theta: float) -> float:
    log_p = log_category_probabilities(params, np.array([theta]))[:, :, 0]
    return float(sum(log_p[j, int(x)] for j, x in enumerate(pattern) if not np.isnan(x)))


def _quad_moments(params: ItemParameters, pattern: np.ndarray, mean: float, sd: float) -> tuple[float, float]:
    def density(t: float, power: int) -> float:
        return t**power * np.exp(_log_likelihood(params, pattern, t)) * stats.norm.pdf(t, mean, sd)

    bounds = (mean - 12 * sd, mean + 12 * sd)
    m0 = integrate.quad(density, *bounds, args=(0,), epsabs=1e-14, epsrel=1e-12, limit=200)[0]
    m1 = integrate.quad(density, *bounds, args=(1,), epsabs=1e-14, epsrel=1e-12, limit=200)[0]
    m2 = integrate.quad(density, *bounds, args=(2,), epsabs=1e-14, epsrel=1e-12, limit=200)[0]
    eap = m1 / m0
    return eap, float(np.sqrt(m2 / m0 - eap**2))


@pytest.mark.parametrize("prior", [NormalPrior(0.0, 1.0), NormalPrior(-0.4, 1.3)])
def test_eap_and_psd_match_adaptive_quadrature(items: ItemParameters, prior: NormalPrior) -> None:
    # Independent route: scipy.integrate.quad of the posterior moments (tolerance 1e-6 per the spec;
    # a 121-point grid on +-8 puts the rectangular-rule error well below it).
    scores = eap_scores(items, PATTERNS, grid=QuadratureGrid(121, -8, 8), prior=prior)
    for i, pattern in enumerate(PATTERNS):
        eap, psd = _quad_moments(items, pattern, prior.mean, prior.sd)
        assert scores.theta[i] == pytest.approx(eap, abs=1e-6)
        assert scores.se[i] == pytest.approx(psd, abs=1e-6)


def test_default_grid_is_accurate_to_1e6(items: ItemParameters) -> None:
    # The default scoring grid (61 points on +-6) must also meet the 1e-6 target.
    scores = eap_scores(items, PATTERNS)
    for i, pattern in enumerate(PATTERNS):
        eap, psd = _quad_moments(items, pattern, 0.0, 1.0)
        assert scores.theta[i] == pytest.approx(eap, abs=1e-6)
        assert scores.se[i] == pytest.approx(psd, abs=1e-6)


def test_no_answers_gives_the_prior(items: ItemParameters) -> None:
    scores = eap_scores(items, np.full((1, 5), np.nan), prior=NormalPrior(0.3, 0.8))
    assert scores.theta[0] == pytest.approx(0.3, abs=1e-9)
    assert scores.se[0] == pytest.approx(0.8, abs=1e-6)
    assert scores.n_answered[0] == 0


def test_blocked_and_threaded_scoring_equals_one_block(items: ItemParameters) -> None:
    rng = np.random.default_rng(5)
    x = simulate_responses(items.slopes, items.thresholds(), rng.normal(size=3000), rng)
    x[rng.random(x.shape) < 0.1] = np.nan
    one = eap_scores(items, x, chunk_size=10_000, workers=1)
    many = eap_scores(items, x, chunk_size=128, workers=2)
    np.testing.assert_array_equal(one.theta, many.theta)
    np.testing.assert_array_equal(one.se, many.se)
    np.testing.assert_array_equal(one.extreme, many.extreme)


def test_map_matches_scipy_optimiser(items: ItemParameters) -> None:
    # Independent route: scipy.optimize.minimize_scalar on the log posterior; the SE formula
    # (I(theta) + 1/sigma^2)^(-1/2) is the one in REFERENCES.md (Bock & Mislevy 1982 context).
    prior = NormalPrior(0.2, 1.1)
    scores = map_scores(items, PATTERNS, prior=prior)
    for i, pattern in enumerate(PATTERNS):
        res = optimize.minimize_scalar(
            lambda t, p=pattern: -_log_likelihood(items, p, t) - stats.norm.logpdf(t, prior.mean, prior.sd),
            bounds=(-8, 8),
            method="bounded",
            options={"xatol": 1e-10},
        )
        assert scores.theta[i] == pytest.approx(res.x, abs=1e-6)
    assert np.all(scores.se < prior.sd)


def test_ml_matches_scipy_and_applies_the_extreme_rule(items: ItemParameters) -> None:
    scores = ml_scores(items, PATTERNS, bound=4.0)
    for i in (0, 3, 4):
        pattern = PATTERNS[i]
        res = optimize.minimize_scalar(
            lambda t, p=pattern: -_log_likelihood(items, p, t),
            bounds=(-4, 4),
            method="bounded",
            options={"xatol": 1e-10},
        )
        assert scores.theta[i] == pytest.approx(res.x, abs=1e-5)
    # All-lowest and all-highest: documented rule, theta at -bound / +bound and flagged.
    assert scores.theta[1] == -4.0 and scores.extreme[1]
    assert scores.theta[2] == 4.0 and scores.extreme[2]
    assert not scores.extreme[0]
    assert np.all(np.isfinite(scores.se))


def test_ml_se_is_inverse_root_information(items: ItemParameters) -> None:
    # SE = I(theta)^(-1/2); information checked independently as minus the second derivative
    # of the log-likelihood at the estimate (observed = expected at the 2PL/GRM mode only
    # approximately, so use a pattern long enough that both agree to 5%: common practice).
    x = np.tile(PATTERNS[0], 6)[None, :]
    long = ItemParameters(
        slopes=np.tile(items.slopes, 6),
        intercepts=np.tile(items.intercepts, (6, 1)),
        n_categories=np.tile(items.n_categories, 6),
    )
    scores = ml_scores(long, x)
    t, h = scores.theta[0], 1e-4
    second = (
        _log_likelihood(long, x[0], t + h) - 2 * _log_likelihood(long, x[0], t) + _log_likelihood(long, x[0], t - h)
    ) / h**2
    assert scores.se[0] == pytest.approx((-second) ** -0.5, rel=0.05)


def _expected_information_by_differences(params: ItemParameters, pattern: np.ndarray, theta: float) -> float:
    """``sum_j sum_k P_jk (d log P_jk / d theta)^2`` over the answered items, the derivative by central differences.

    The definition of the expected (Fisher) information, written out; no closed form of ours is used.
    """
    h = 1e-5
    grid = np.array([theta - h, theta, theta + h])
    log_p = log_category_probabilities(params, grid)  # (J, K, 3); -inf for categories an item lacks
    with np.errstate(invalid="ignore"):
        slope = (log_p[:, :, 2] - log_p[:, :, 0]) / (2 * h)
    prob = np.exp(log_p[:, :, 1])
    terms = np.where(prob > 0, prob * np.nan_to_num(slope) ** 2, 0.0).sum(axis=1)
    return float(terms[~np.isnan(pattern)].sum())


def test_map_and_ml_ses_equal_the_expected_information_written_out(items: ItemParameters) -> None:
    # SE = (I(theta) + 1/sigma^2)^(-1/2) for MAP and I(theta)^(-1/2) for ML, I the expected information at the
    # estimate (REFERENCES.md, scoring). Central differences of log P carry about 1e-10 relative error: 1e-7.
    prior = NormalPrior(0.2, 1.1)
    map_ = map_scores(items, PATTERNS, prior=prior)
    ml = ml_scores(items, PATTERNS, bound=4.0)
    for i, pattern in enumerate(PATTERNS):
        info = _expected_information_by_differences(items, pattern, map_.theta[i])
        assert map_.se[i] == pytest.approx((info + 1 / prior.sd**2) ** -0.5, rel=1e-7)
        info = _expected_information_by_differences(items, pattern, ml.theta[i])
        assert ml.se[i] == pytest.approx(info**-0.5, rel=1e-7)


def test_steep_items_far_out_give_finite_modes_and_the_bound() -> None:
    # Slopes of 20 (the bundle's limit) with an ML bound of 50 take a * theta to 1,000: the exponentials are
    # clipped at +-700, where every curve is saturated. Modes inside the bound still equal scipy's optimiser,
    # extreme patterns sit at the bound, and nothing is NaN.
    steep = ItemParameters.from_thresholds(
        [20.0, 20.0, 1.0, 0.8, 1.4], [[-1.0, np.nan], [1.0, np.nan], [0.0, np.nan], [-0.5, 0.7], [0.3, np.nan]]
    )
    patterns = np.array([[1, 0, 1, 1, 0], [1, 0, 0, 2, 1], [0, 0, 0, 0, 0], [1, 1, 1, 2, 1]], dtype=np.float64)
    scores = ml_scores(steep, patterns, bound=50.0)
    for i in (0, 1):
        res = optimize.minimize_scalar(
            lambda t, p=patterns[i]: -_log_likelihood(steep, p, t),
            bounds=(-1.0, 1.0),
            method="bounded",
            options={"xatol": 1e-10},
        )
        assert scores.theta[i] == pytest.approx(res.x, abs=1e-6)
    assert scores.theta[2] == -50.0 and scores.theta[3] == 50.0
    assert not np.isnan(scores.se).any()
    assert np.all(np.isfinite(map_scores(steep, patterns).theta))


def test_lord_wingersky_matches_brute_force(items: ItemParameters) -> None:
    # Independent route: enumerate all 2*2*2*3*4 = 96 patterns and add up their probabilities.
    points = np.linspace(-3, 3, 7)
    log_p = log_category_probabilities(items, points)
    brute = np.zeros((int(np.sum(items.n_categories - 1)) + 1, points.size))
    for pattern in itertools.product(*(range(k) for k in items.n_categories)):
        prob = np.exp(sum(log_p[j, k] for j, k in enumerate(pattern)))
        brute[sum(pattern)] += prob
    np.testing.assert_allclose(summed_score_likelihoods(items, points), brute, atol=1e-14)


def test_summed_score_eap_matches_brute_force_integration(items: ItemParameters) -> None:
    # EAP[theta | summed score s] by adaptive quadrature over the brute-force P(s | theta).
    table = summed_score_table(items, grid=QuadratureGrid(121, -8, 8))
    patterns_by_score: dict[int, list[tuple[int, ...]]] = {}
    for pattern in itertools.product(*(range(k) for k in items.n_categories)):
        patterns_by_score.setdefault(sum(pattern), []).append(pattern)

    def p_score(t: float, s: int) -> float:
        log_p = log_category_probabilities(items, np.array([t]))[:, :, 0]
        return sum(np.exp(sum(log_p[j, k] for j, k in enumerate(p))) for p in patterns_by_score[s])

    for s in (0, 4, 8):
        m0 = integrate.quad(lambda t, s=s: p_score(t, s) * stats.norm.pdf(t), -10, 10, epsabs=1e-13)[0]
        m1 = integrate.quad(lambda t, s=s: t * p_score(t, s) * stats.norm.pdf(t), -10, 10, epsabs=1e-13)[0]
        assert table.theta[s] == pytest.approx(m1 / m0, abs=1e-6)
        assert table.probability[s] == pytest.approx(m0, abs=1e-7)
    assert table.probability.sum() == pytest.approx(1.0, abs=1e-10)


def test_marginal_reliability_tracks_squared_correlation_with_true_theta() -> None:
    # Simulation (seeded): for EAP scores, var(EAP)/var(theta) equals the reliability, and
    # corr(EAP, theta)^2 estimates it too (Green et al. 1984); agreement within 0.02 at N = 20,000.
    rng = np.random.default_rng(11)
    a = rng.uniform(0.8, 2.0, 20)
    b = rng.normal(0, 1, 20)
    params = ItemParameters.from_thresholds(a, b)
    theta = rng.normal(size=20_000)
    x = simulate_responses(a, b[:, None], theta, rng)
    scores = eap_scores(params, x)
    rel = marginal_reliability(scores.theta, scores.se)
    assert rel == pytest.approx(np.corrcoef(scores.theta, theta)[0, 1] ** 2, abs=0.02)


def test_reporting_scale_rounds_and_bounds() -> None:
    scale = ReportingScale(location=500, scale=100, decimals=0, minimum=200, maximum=800)
    scores, ses = scale.transform(np.array([0.123, -4.0, 3.5, 0.005]), np.array([0.3, 0.5, 0.5, 0.25]))
    np.testing.assert_array_equal(scores, [512, 200, 800, 500])
    np.testing.assert_allclose(ses, [30.0, 50.0, 50.0, 25.0])
    with pytest.raises(ValueError, match="minimum must be below"):
        ReportingScale(minimum=5, maximum=1)


def test_person_fit_lz_matches_the_formula_written_out(items: ItemParameters) -> None:
    # Independent route: l_z by explicit loops over items and categories (Drasgow et al. 1985 formula).
    from calibration.irt.person_fit import person_fit_lz

    theta = np.array([0.3, -1.0, 0.8, 0.0, 1.2])
    lz = person_fit_lz(items, PATTERNS, theta)
    for i, pattern in enumerate(PATTERNS):
        log_p = log_category_probabilities(items, np.array([theta[i]]))[:, :, 0]
        l0 = mean = var = 0.0
        for j, x in enumerate(pattern):
            if np.isnan(x):
                continue
            cats = range(int(items.n_categories[j]))
            l0 += log_p[j, int(x)]
            m = sum(np.exp(log_p[j, k]) * log_p[j, k] for k in cats)
            mean += m
            var += sum(np.exp(log_p[j, k]) * log_p[j, k] ** 2 for k in cats) - m * m
        assert lz[i] == pytest.approx((l0 - mean) / np.sqrt(var), rel=1e-10)


def test_corrected_person_fit_equals_snijders_binary_formula() -> None:
    # Independent route: Snijders' (2001) formula for right/wrong items written out with the 2PL's
    # r_j = a_j (formula recalled from memory); the category form must reduce to it exactly.
    from calibration.irt.person_fit import person_fit_lz

    rng = np.random.default_rng(8)
    a, b = rng.uniform(0.8, 2.0, 12), rng.normal(0, 1, 12)
    params = ItemParameters.from_thresholds(a, b)
    theta = rng.normal(size=200)
    p = 1 / (1 + np.exp(-a * (theta[:, None] - b)))
    x = (rng.random(p.shape) < p).astype(float)
    x[rng.random(x.shape) < 0.1] = np.nan
    prior = NormalPrior(0.0, 1.0)
    got = person_fit_lz(params, x, theta, corrected=True, prior=prior)
    ok = ~np.isnan(x)
    w = np.log(p / (1 - p))
    d = a * p * (1 - p)
    c = np.where(ok, d * w, 0).sum(1) / np.where(ok, d * a, 0).sum(1)
    w_tilde = w - c[:, None] * a
    numerator = np.where(ok, (np.nan_to_num(x) - p) * w, 0).sum(1) + c * (-theta)
    denominator = np.sqrt(np.where(ok, w_tilde**2 * p * (1 - p), 0).sum(1))
    np.testing.assert_allclose(got, numerator / denominator, rtol=1e-9)


def test_an_extreme_pattern_counts_a_negative_slope_items_ends_the_other_way() -> None:
    # Independent route: scipy's bounded scalar minimiser on the 2PL log-likelihood written out. With a
    # reverse-keyed item left unreversed (negative slope), every answer at its high-theta end (that item
    # wrong, the others right) has no maximum inside the bound, and the all-right pattern has one.
    from scipy.optimize import minimize_scalar
    from scipy.special import log_expit

    from calibration.irt.scoring import eap_scores, ml_scores

    a = np.array([1.2, 0.8, 1.5, -0.9, 1.0, 0.7])
    b = np.array([-0.5, 0.0, 0.4, 0.2, 1.0, -1.0])
    params = ItemParameters.from_thresholds(a, b)
    keyed_high = np.array([1.0, 1.0, 1.0, 0.0, 1.0, 1.0])
    keyed_low = 1.0 - keyed_high
    all_right = np.ones(6)
    x = np.vstack([keyed_high, keyed_low, all_right])

    def minus_log_lik(t: float, pattern: np.ndarray) -> float:
        z = a * (t - b)
        return -float(np.sum(pattern * log_expit(z) + (1 - pattern) * log_expit(-z)))

    ml = ml_scores(params, x, bound=4.0)
    np.testing.assert_array_equal(ml.extreme, [True, True, False])
    np.testing.assert_array_equal(ml.theta[:2], [4.0, -4.0])
    for pattern, end in ((keyed_high, 4.0), (keyed_low, -4.0)):
        wide = minimize_scalar(minus_log_lik, bounds=(-30.0, 30.0), args=(pattern,), method="bounded")
        assert abs(wide.x) > 25.0 and np.sign(wide.x) == np.sign(end)  # no interior maximum
    inner = minimize_scalar(
        minus_log_lik, bounds=(-4.0, 4.0), args=(all_right,), method="bounded", options={"xatol": 1e-10}
    )
    assert -4.0 < inner.x < 4.0
    assert ml.theta[2] == pytest.approx(inner.x, abs=1e-6)
    np.testing.assert_array_equal(eap_scores(params, x).extreme, [True, True, False])


def test_corrected_person_fit_keeps_its_precision_far_from_an_items_difficulty() -> None:
    # Independent route: Snijders' formula written out with scipy's expit on both sides of each item
    # (1 - P = expit(-z), not 1 minus a rounded P), with items whose logit reaches 30-50, where
    # 1 - P rounds to 0 in double precision. A wrong answer there weighs its logit, not a floor's log.
    from scipy.special import expit

    from calibration.irt.person_fit import person_fit_lz

    rng = np.random.default_rng(17)
    a = np.r_[rng.uniform(0.8, 2.0, 6), np.full(6, 3.5)]
    b = np.r_[rng.normal(0, 1, 6), np.full(6, -11.0)]
    theta = rng.uniform(-1.0, 3.0, 50)
    z = a * (theta[:, None] - b)
    assert z[:, 6:].min() > 35.0  # 1 - P below double precision's spacing near 1
    x = (rng.random(z.shape) < expit(z)).astype(float)
    x[::5, 6] = 0.0  # a wrong answer to an item far below the respondent's level
    prior = NormalPrior(0.0, 1.0)
    got = person_fit_lz(ItemParameters.from_thresholds(a, b), x, theta, corrected=True, prior=prior)
    p, q = expit(z), expit(-z)
    d = p * q
    c = (d * a * z).sum(1) / (d * a * a).sum(1)
    numerator = ((x - p) * z).sum(1) + c * (-theta)
    denominator = np.sqrt(((z - c[:, None] * a) ** 2 * d).sum(1))
    np.testing.assert_allclose(got, numerator / denominator, rtol=1e-9)


def _lz_written_out(log_p: np.ndarray, r: np.ndarray, observed: np.ndarray, theta: np.ndarray, *, corrected: bool):
    """l_z (Drasgow et al. 1985) or l_z* (Snijders 2001, category form, prior N(0, 1)) from each respondent's
    category logs, weights r = d log P / d theta and one-hot answers, all (n, J, K): numerator
    sum (x - P) log P (+ c r_0), c = sum P r log P / sum P r^2, weights log P - c r in the variance."""
    p = np.exp(log_p)
    numerator = ((observed - p) * log_p).sum(axis=(1, 2))
    w = log_p
    if corrected:
        c = (p * r * log_p).sum(axis=(1, 2)) / (p * r * r).sum(axis=(1, 2))
        numerator = numerator - c * theta  # r_0 = -theta under N(0, 1)
        w = log_p - c[:, None, None] * r
    var = ((p * w**2).sum(2) - (p * w).sum(2) ** 2).sum(1)
    return numerator / np.sqrt(var)


@pytest.mark.parametrize("corrected", [False, True])
def test_graded_person_fit_keeps_its_precision_far_from_an_items_categories(corrected: bool) -> None:
    # Independent route: l_z and l_z* written out with each category's log probability from scipy's log_expit,
    # using expit(u) - expit(v) = expit(u) expit(-v) (1 - exp(v - u)) for the boundary logits u > v of a
    # category, and r_k = a (1 - expit(u) - expit(v)); two graded items sit 10-13 logits below the
    # respondents, where P_0 and P_1 round to 0 as differences of probabilities.
    from scipy.special import expit, log_expit

    from calibration.irt.person_fit import person_fit_lz

    rng = np.random.default_rng(23)
    a = np.array([1.2, 0.9, 1.6, 3.0, 3.0])
    thresholds = np.array([[-1.0, 0.5], [-0.5, 1.0], [0.0, 0.8], [-13.0, -12.0], [-12.5, -11.0]])
    theta = rng.uniform(0.0, 2.0, 40)
    x = rng.integers(0, 3, (40, 5)).astype(float)
    x[:, 3:] = 2.0
    x[::4, 3] = 0.0  # the lowest category of an item far below the respondent
    x[1::4, 4] = 1.0
    z = a[None, :, None] * (theta[:, None, None] - thresholds[None])  # (n, J, 2) boundary logits
    u = np.concatenate([np.full((40, 5, 1), np.inf), z], axis=2)  # category k lies between u_k and v_k
    v = np.concatenate([z, np.full((40, 5, 1), -np.inf)], axis=2)
    log_p = log_expit(u) + log_expit(-v) + np.log1p(-np.exp(v - u))  # (n, J, 3)
    r = a[None, :, None] * (1.0 - expit(u) - expit(v))
    observed = (x.astype(int)[:, :, None] == np.arange(3)).astype(float)
    got = person_fit_lz(
        ItemParameters.from_thresholds(a, thresholds), x, theta, corrected=corrected, prior=NormalPrior(0.0, 1.0)
    )
    np.testing.assert_allclose(got, _lz_written_out(log_p, r, observed, theta, corrected=corrected), rtol=1e-9)


@pytest.mark.parametrize("corrected", [False, True])
def test_3pl_person_fit_keeps_its_precision_far_above_an_item(corrected: bool) -> None:
    # Independent route: l_z and l_z* written out for 3PL items with scipy's log_expit: log P_0 = log(1 - g) +
    # log expit(-z), log P_1 = logaddexp(log g, log(1 - g) + log expit(z)), r_0 = -a s and r_1 = a (1 - s)
    # (1 - g) s / P_1; three items sit 33-47 logits below the respondents, where 1 - s rounds to 0.
    from scipy.special import expit, log_expit

    from calibration.irt.person_fit import person_fit_lz

    rng = np.random.default_rng(3)
    a = np.r_[rng.uniform(0.8, 2.0, 5), np.full(3, 3.5)]
    c = np.r_[rng.normal(0, 1, 5), np.full(3, 40.0)]
    g = np.r_[rng.uniform(0.1, 0.25, 4), 0.0, np.full(3, 0.2)]
    params = ItemParameters(
        slopes=a, intercepts=c[:, None], n_categories=np.full(8, 2), models=("3pl",) * 8, guessing=g
    )
    theta = rng.uniform(-2, 2, 30)
    z = a * theta[:, None] + c
    s = expit(z)
    x = (rng.random(z.shape) < g + (1 - g) * s).astype(float)
    x[::3, 6] = 0.0  # a wrong answer to an item far below the respondent
    with np.errstate(divide="ignore"):
        log_p = np.stack([np.log1p(-g) + log_expit(-z), np.logaddexp(np.log(g), np.log1p(-g) + log_expit(z))], 2)
    r = np.stack([-a * s, a * expit(-z) * (1 - g) * s / np.exp(log_p[:, :, 1])], 2)
    observed = np.stack([1 - x, x], 2)
    got = person_fit_lz(params, x, theta, corrected=corrected, prior=NormalPrior(0.0, 1.0))
    np.testing.assert_allclose(got, _lz_written_out(log_p, r, observed, theta, corrected=corrected), rtol=1e-9)


@pytest.mark.parametrize("corrected", [False, True])
def test_person_fit_right_wrong_path_equals_the_category_path(corrected: bool) -> None:
    # Two routes in the library: right/wrong tests take (n, J) arrays, others the (n, J, K) category
    # form. A graded item nobody answered adds nothing, so appending one sends the same answers
    # down the category form: both must agree to rounding.
    from calibration.irt.person_fit import person_fit_lz

    rng = np.random.default_rng(21)
    a, b = rng.uniform(0.8, 2.0, 15), rng.normal(0, 1, 15)
    theta = rng.normal(size=500)
    x = simulate_responses(a, b, theta, rng).astype(float)
    x[rng.random(x.shape) < 0.1] = np.nan
    prior = NormalPrior(0.2, 1.1)
    fast = person_fit_lz(ItemParameters.from_thresholds(a, b), x, theta, corrected=corrected, prior=prior)
    thresholds = np.full((16, 2), np.nan)
    thresholds[:15, 0] = b
    thresholds[15] = [-0.5, 0.5]
    padded = ItemParameters.from_thresholds(np.r_[a, 1.0], thresholds)
    unanswered = np.column_stack([x, np.full(500, np.nan)])
    slow = person_fit_lz(padded, unanswered, theta, corrected=corrected, prior=prior)
    np.testing.assert_allclose(fast, slow, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("method", ["ml", "eap"])
def test_corrected_person_fit_is_standard_normal_under_the_model(method: str) -> None:
    # Simulation (seeded, invented parameters): under the model l_z* has mean near 0 and SD near 1
    # at the estimated theta, while uncorrected l_z is too narrow (the reason for the correction).
    from calibration.irt.person_fit import person_fit_lz

    rng = np.random.default_rng(13)
    n_items = 30
    a = rng.uniform(0.8, 2.0, n_items)
    b = np.full((n_items, 3), np.nan)
    b[:20, 0] = rng.normal(0, 1, 20)
    b[20:] = rng.normal(0, 0.6, (10, 1)) + np.array([-1.0, 0.0, 1.0])
    params = ItemParameters.from_thresholds(a, b)
    x = simulate_responses(a, b, rng.normal(size=10_000), rng)
    scores = ml_scores(params, x) if method == "ml" else eap_scores(params, x)
    keep = ~scores.extreme
    prior = None if method == "ml" else NormalPrior()
    star = person_fit_lz(params, x[keep], scores.theta[keep], corrected=True, prior=prior)
    plain = person_fit_lz(params, x[keep], scores.theta[keep])
    assert abs(star.mean()) < 0.15 and 0.92 < star.std() < 1.08
    assert plain.std() < star.std()


def test_corrected_person_fit_is_standard_normal_for_3pl_and_partial_credit_items() -> None:
    # The same simulation with 20 3PL and 10 four-category GPCM items (seeded, invented parameters), at the
    # ML estimate: the category form of l_z* with each model's own P and P'.
    from calibration.irt.person_fit import person_fit_lz
    from calibration.irt.simulate import simulate_items

    rng = np.random.default_rng(14)
    rows = [
        (float(a), [float(c)], "3pl", float(g))
        for a, c, g in zip(rng.uniform(1.0, 2.0, 20), rng.normal(0, 1, 20), rng.uniform(0.1, 0.25, 20), strict=True)
    ]
    rows += [(float(a), [float(v) for v in rng.normal(0, 1, 3)], "gpcm", None) for a in rng.uniform(0.8, 1.6, 10)]
    params = ItemParameters.stack(rows)
    x = simulate_items(params, rng.normal(size=10_000), rng)
    scores = ml_scores(params, x)
    keep = ~scores.extreme
    star = person_fit_lz(params, x[keep], scores.theta[keep], corrected=True)
    assert abs(star.mean()) < 0.15 and 0.9 < star.std() < 1.1


def test_library_scoring_refuses_codes_outside_the_items_categories() -> None:
    # A code 5 on a right/wrong item once scored as if it were the top category; now the boundary refuses it.
    params = ItemParameters.from_thresholds(np.array([1.0, 1.2]), np.array([0.0, 0.5]))
    for bad in ([[1.0, 5.0]], [[0.5, 1.0]], [[-1.0, 0.0]]):
        with pytest.raises(ValueError, match="row 0, item"):
            eap_scores(params, np.array(bad))
    with pytest.raises(ValueError, match="2 items"):
        ml_scores(params, np.zeros((3, 3)))
