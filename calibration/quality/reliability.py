"""Reliability with its uncertainty: alpha's confidence interval, equal alphas across groups, omega.

- Feldt's interval for Cronbach's alpha (Feldt, Woodruff & Salih 1987): with n complete rows and k items,
  ``(1 - alpha_hat) / (1 - alpha)`` follows F with (n - 1, (n - 1)(k - 1)) df, so the interval is
  ``1 - (1 - alpha_hat) F_upper`` to ``1 - (1 - alpha_hat) F_lower``.
- Feldt's (1969) test of two independent alphas: ``W = (1 - alpha_1) / (1 - alpha_2)`` is referred to F
  with (n_1 - 1, n_2 - 1) df (recalled from memory; checked by simulation in the tests: its rejection
  rate under equal alphas is near the nominal level).
- McDonald's omega (total) from a one-factor model of the item correlations fitted by maximum likelihood
  (Lawley & Maxwell's concentrated criterion over the uniquenesses): ``(sum lambda)^2 / ((sum lambda)^2
  + sum psi)``. Pearson correlations of the item scores (not polychoric ones), complete rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from calibration.irt.models import FloatArray
from calibration.quality.classical import complete_rows_moments

MIN_UNIQUENESS = 0.005
"""Uniquenesses are kept at or above this (a Heywood case stops at the bound)."""


def alpha_interval(alpha: float, n: int, k: int, *, level: float = 0.95) -> tuple[float, float]:
    """Feldt's interval for Cronbach's alpha from ``n`` complete rows of ``k`` items (NaN when undefined)."""
    if not np.isfinite(alpha) or n < 3 or k < 2:
        return float("nan"), float("nan")
    df1, df2 = n - 1, (n - 1) * (k - 1)
    tail = (1.0 - level) / 2.0
    low = 1.0 - (1.0 - alpha) * stats.f.isf(tail, df1, df2)
    high = 1.0 - (1.0 - alpha) * stats.f.isf(1.0 - tail, df1, df2)
    return float(low), float(high)


@dataclass(frozen=True)
class AlphaComparison:
    """Feldt's test of equal alphas in two independent groups: ``w = (1 - alpha_a) / (1 - alpha_b)``."""

    w: float
    df_a: int
    df_b: int
    p_value: float


def compare_alphas(alpha_a: float, n_a: int, alpha_b: float, n_b: int) -> AlphaComparison:
    """Two-sided Feldt test of ``alpha_a == alpha_b`` from each group's alpha and complete rows."""
    if not (np.isfinite(alpha_a) and np.isfinite(alpha_b)) or min(n_a, n_b) < 3 or alpha_b >= 1:
        return AlphaComparison(float("nan"), n_a - 1, n_b - 1, float("nan"))
    w = (1.0 - alpha_a) / (1.0 - alpha_b)
    df_a, df_b = n_a - 1, n_b - 1
    p = 2.0 * min(stats.f.cdf(w, df_a, df_b), stats.f.sf(w, df_a, df_b))
    return AlphaComparison(float(w), df_a, df_b, float(min(p, 1.0)))


@dataclass(frozen=True)
class OneFactor:
    """A one-factor model of the item correlations: loadings, uniquenesses and omega."""

    loadings: FloatArray
    uniquenesses: FloatArray
    omega: float
    converged: bool


def one_factor_omega(responses: FloatArray) -> OneFactor:
    """McDonald's omega from a maximum-likelihood one-factor model of the complete rows' item correlations."""
    x = np.asarray(responses, dtype=np.float64)
    moments = complete_rows_moments(x)
    n_items = x.shape[1]
    nan = np.full(n_items, np.nan)
    if moments.n < 3 or n_items < 3 or moments.constant():
        return OneFactor(nan, nan, float("nan"), converged=False)
    corr = moments.correlation()

    def criterion(psi: FloatArray) -> float:
        scale = 1.0 / np.sqrt(psi)
        values = np.linalg.eigvalsh(corr * np.outer(scale, scale))[::-1]
        rest = values[1:]
        return float(np.sum(rest - np.log(rest) - 1.0))  # Lawley & Maxwell's criterion, one factor

    start = np.clip(1.0 / np.diag(np.linalg.inv(corr)), MIN_UNIQUENESS, 1.0)  # 1 - squared multiple correlation
    result = optimize.minimize(
        criterion, start, method="L-BFGS-B", bounds=[(MIN_UNIQUENESS, 1.0)] * n_items, options={"ftol": 1e-12}
    )
    psi = result.x
    root = np.sqrt(psi)
    values, vectors = np.linalg.eigh(corr / np.outer(root, root))
    loadings = root * vectors[:, -1] * np.sqrt(max(values[-1] - 1.0, 0.0))
    if loadings.sum() < 0:
        loadings = -loadings
    total = loadings.sum() ** 2
    return OneFactor(loadings, psi, float(total / (total + psi.sum())), converged=bool(result.success))
