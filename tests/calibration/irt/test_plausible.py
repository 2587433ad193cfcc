"""Plausible values and Rubin's rules against independent routes: the formulas written out by hand,
adaptive quadrature of a posterior, scipy's optimiser on a marginal likelihood written out, and a seeded
simulation with known group means and SDs."""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
from scipy import integrate, optimize, stats

from calibration.estimation import fit_cell_densities
from calibration.irt.likelihood import QuadratureGrid, build_design, log_likelihood_grid
from calibration.irt.models import ItemParameters
from calibration.irt.plausible import draw_plausible_values, rubin
from tests.helpers import simulate_responses

ITEMS = ItemParameters.from_thresholds([1.2, 0.9, 1.6, 1.1, 1.4, 0.8], [-1.2, -0.5, 0.0, 0.4, 0.9, 1.5])


def test_rubins_rules_equal_the_formulas_written_out() -> None:
    # Rubin (1987) as REFERENCES.md gives it: T = U + (1 + 1/M) B, df = (M - 1)(1 + U / ((1 + 1/M) B))^2.
    estimates = [0.512, 0.498, 0.531, 0.507, 0.520]
    variances = [0.0021, 0.0019, 0.0023, 0.0020, 0.0022]
    m = len(estimates)
    u_bar = sum(variances) / m
    b = statistics.variance(estimates)
    total = u_bar + (1 + 1 / m) * b
    df = (m - 1) * (1 + u_bar / ((1 + 1 / m) * b)) ** 2
    ours = rubin(np.array(estimates), np.array(variances))
    assert ours.estimate == pytest.approx(sum(estimates) / m, rel=1e-15)
    assert ours.se == pytest.approx(math.sqrt(total), rel=1e-14)
    assert ours.df == pytest.approx(df, rel=1e-14)
    low, high = ours.interval()
    half = stats.t.ppf(0.975, df) * math.sqrt(total)
    assert (low, high) == pytest.approx((ours.estimate - half, ours.estimate + half), rel=1e-14)


def test_small_sample_df_follows_barnard_and_rubin() -> None:
    # Barnard & Rubin (1999), written out here from memory of the paper: g = (1 + 1/M) B / T,
    # v_obs = (v + 1) / (v + 3) v (1 - g), df = 1 / (1 / df_Rubin + 1 / v_obs). Two limits that do not rest
    # on memory: a huge complete-data df gives Rubin's df back, and with no spread between the draws the df
    # is v_obs with g = 0, i.e. v (v + 1) / (v + 3).
    estimates = np.array([0.512, 0.498, 0.531, 0.507, 0.520])
    variances = np.array([0.0021, 0.0019, 0.0023, 0.0020, 0.0022])
    m, v = estimates.size, 24.0
    u_bar, b = variances.mean(), statistics.variance(estimates)
    total = u_bar + (1 + 1 / m) * b
    g = (1 + 1 / m) * b / total
    df_rubin = (m - 1) / g**2
    v_obs = (v + 1) / (v + 3) * v * (1 - g)
    ours = rubin(estimates, variances, complete_df=v)
    assert ours.df == pytest.approx(1 / (1 / df_rubin + 1 / v_obs), rel=1e-13)
    assert ours.df < v and ours.se == rubin(estimates, variances).se  # only the df changes
    assert rubin(estimates, variances, complete_df=1e12).df == pytest.approx(df_rubin, rel=1e-6)
    flat = rubin(np.full(m, 0.5), variances, complete_df=v)
    assert flat.df == pytest.approx(v * (v + 1) / (v + 3), rel=1e-13)


def test_draws_follow_the_posterior_found_by_quadrature() -> None:
    # One pattern, prior N(0.3, 1.1^2): the continuous posterior's mean and variance by scipy.integrate.quad;
    # 200,000 draws. The draws follow the grid posterior with each point's mass spread over its interval, so
    # their variance exceeds the continuous one by about h^2 / 12 (h = 0.2): 0.02 absolute covers it and
    # the sampling error (SE of the mean about 0.0013).
    grid = QuadratureGrid()
    pattern = np.array([[1, 1, 0, 1, 0, 0]], dtype=float)
    log_lik = log_likelihood_grid(ITEMS, grid.points, build_design(pattern, ITEMS.n_categories))
    n = 200_000
    draws = draw_plausible_values(
        np.repeat(log_lik, n, axis=0),
        grid.points,
        np.full(n, 0.3),
        np.full(n, 1.1),
        draws=1,
        rng=np.random.default_rng(1),
    )[:, 0]

    def density(t: float, power: int) -> float:
        p = 1.0 / (1.0 + np.exp(-(ITEMS.slopes * t + ITEMS.intercepts[:, 0])))
        like = float(np.prod(np.where(pattern[0] == 1, p, 1 - p)))
        return t**power * like * stats.norm.pdf(t, 0.3, 1.1)

    moments = [integrate.quad(density, -10, 10, args=(k,), epsabs=1e-13)[0] for k in range(3)]
    mean = moments[1] / moments[0]
    variance = moments[2] / moments[0] - mean**2
    assert draws.mean() == pytest.approx(mean, abs=0.006)
    assert draws.var() == pytest.approx(variance + 0.2**2 / 12, abs=0.02)


def test_cell_densities_equal_a_direct_maximisation_of_the_marginal_likelihood() -> None:
    # Two cells; the marginal log-likelihood of each written out as sum_i log sum_q L_iq w_q(mean, sd)
    # and maximised by scipy's Nelder-Mead: the EM fixed point agrees to 1e-4 (EM tolerance 1e-6).
    rng = np.random.default_rng(4)
    theta = np.concatenate([rng.normal(0.0, 1.0, 800), rng.normal(0.7, 0.6, 800)])
    x = simulate_responses(ITEMS.slopes, ITEMS.thresholds(), theta, rng)
    points = QuadratureGrid().points
    log_lik = log_likelihood_grid(ITEMS, points, build_design(x, ITEMS.n_categories))
    cells = np.repeat([0, 1], 800)
    fitted = fit_cell_densities(log_lik, cells, 2, points)
    assert fitted.converged
    for c in (0, 1):
        rows = log_lik[cells == c]

        def minus_log_lik(v: np.ndarray, rows: np.ndarray = rows) -> float:
            if v[1] <= 0:
                return math.inf
            w = stats.norm.pdf(points, v[0], v[1])
            w = w / w.sum()
            return -float(np.log(np.exp(rows) @ w).sum())

        best = optimize.minimize(
            minus_log_lik, [0.0, 1.0], method="Nelder-Mead", options={"xatol": 1e-8, "fatol": 1e-10}
        )
        assert (fitted.mean[c], fitted.sd[c]) == pytest.approx(tuple(best.x), abs=1e-4)
