"""Plausible values (Mislevy 1991) and Rubin's (1987) rules for combining their results.

A respondent's plausible values are independent draws from their posterior ``p(theta | x, c)`` under the
latent density of their reporting cell ``c`` (group, cohort): ``N(mean_c, sd_c^2)``, fitted with the items
held (:func:`calibration.estimation.fit_cell_densities`). A group statistic computed on each set of draws
and combined by Rubin's rules carries the measurement error into its SE; unlike the mean and SD of EAP
scores (each shrunk towards the prior), it estimates the group's mean and SD without bias. The draws use
the posterior on the quadrature grid with each point's mass spread evenly over its interval (the midpoint
rule the posterior integrates by), so they are continuous.

Rubin's rules for M sets: ``Q = mean(q_m)``, ``U = mean(u_m)``, ``B = var(q_m)``,
``T = U + (1 + 1/M) B`` and ``df = (M - 1) (1 + U / ((1 + 1/M) B))^2`` (Rubin 1987). That df assumes large
complete-data samples; given the complete-data df ``v`` (e.g. n - 1 for a mean) the small-sample df of
Barnard & Rubin (1999) is used: ``g = (1 + 1/M) B / T``, ``v_obs = (v + 1) / (v + 3) v (1 - g)`` and
``df = 1 / (1 / df_Rubin + 1 / v_obs)``, below ``v``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from calibration.irt.likelihood import posterior_weights
from calibration.irt.models import FloatArray


def draw_plausible_values(
    log_likelihood: FloatArray,
    points: FloatArray,
    mean: FloatArray,
    sd: FloatArray,
    *,
    draws: int,
    rng: np.random.Generator,
) -> FloatArray:
    """``draws`` plausible values per respondent, shape (n, draws).

    ``log_likelihood`` (n, Q) on the equally spaced ``points``; ``mean`` and ``sd`` (n,) each respondent's
    latent density (their cell's). A draw picks a grid point by its posterior mass and a uniform position
    in that point's interval (inverse CDF of the piecewise-constant posterior).
    """
    z = (points[None, :] - np.asarray(mean)[:, None]) / np.asarray(sd)[:, None]
    post = posterior_weights(np.asarray(log_likelihood, dtype=np.float64) - 0.5 * z * z)
    cdf = np.cumsum(post, axis=1)
    cdf[:, -1] = 1.0  # rounding: the last point closes the distribution
    step = float(points[1] - points[0])
    u = rng.random((post.shape[0], draws))
    rows = np.arange(post.shape[0])
    out = np.empty_like(u)
    for m in range(draws):  # one (n, Q) comparison per draw, not an (n, draws, Q) array
        index = np.minimum((cdf < u[:, m : m + 1]).sum(axis=1), points.size - 1)
        below = np.where(index > 0, cdf[rows, np.maximum(index - 1, 0)], 0.0)
        share = (u[:, m] - below) / np.maximum(post[rows, index], 1e-300)  # where in the point's interval
        out[:, m] = points[index] + (np.clip(share, 0.0, 1.0) - 0.5) * step
    return out


@dataclass(frozen=True)
class RubinEstimate:
    """A statistic combined over M sets of plausible values."""

    estimate: float
    se: float
    df: float
    within: float  # U: the mean sampling variance
    between: float  # B: the variance of the M estimates

    def interval(self, level: float = 0.95) -> tuple[float, float]:
        """The ``level`` confidence interval from the t distribution with the estimate's df."""
        quantile = stats.t.ppf(0.5 + level / 2, self.df) if math.isfinite(self.df) else stats.norm.ppf(0.5 + level / 2)
        half = float(quantile) * self.se
        return self.estimate - half, self.estimate + half


def rubin(estimates: FloatArray, variances: FloatArray, *, complete_df: float = math.inf) -> RubinEstimate:
    """Rubin's rules for M estimates and their sampling variances; with ``complete_df`` (the statistic's
    df had theta been observed) the Barnard-Rubin small-sample df (see the module)."""
    q = np.asarray(estimates, dtype=np.float64)
    u = np.asarray(variances, dtype=np.float64)
    m = q.size
    within = float(u.mean())
    between = float(q.var(ddof=1)) if m > 1 else 0.0
    inflated = (1.0 + 1.0 / m) * between
    total = within + inflated
    df = (m - 1) * (1.0 + within / inflated) ** 2 if inflated > 0 else math.inf
    if math.isfinite(complete_df) and total > 0:
        share = inflated / total
        observed = (complete_df + 1.0) / (complete_df + 3.0) * complete_df * (1.0 - share)
        df = 1.0 / (1.0 / df + 1.0 / observed) if observed > 0 else df
    return RubinEstimate(float(q.mean()), math.sqrt(total), df, within, between)
