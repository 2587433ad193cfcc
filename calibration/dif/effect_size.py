"""Effect size of DIF on the theta scale, and its 95% interval.

The focal-density weighted mean absolute difference between the group's and the reference
expected item score curves, divided by the weighted mean slope of the reference curve,
``sum_q w_q |E_g(theta_q) - E_R(theta_q)| / sum_q w_q E_R'(theta_q)`` with ``w ~ N(mu_g, sigma_g)``;
it captures non-uniform DIF too. For pure uniform DIF in a 2PL item it is close to the threshold
shift |b_g - b_R|. Levels (equitheta defaults, settings): negligible < 0.20, moderate 0.20 - 0.40,
large >= 0.40 theta units.

The interval needs only ``math`` (the command line prints stored bundles without loading scipy).
"""

from __future__ import annotations

import numpy as np

from calibration.irt.likelihood import normal_weights
from calibration.irt.models import ItemParameters, category_probability_derivatives, expected_item_scores

# Two-sided 95% normal quantile (scipy.stats.norm.ppf(0.975) = 1.959963984540054).
EFFECT_Z = 1.959963984540054
EFFECT_GRID_POINTS = 201
"""Points of the theta grid (mean +- 5 SD of the focal density) the effect is averaged over."""


def effect_interval(effect: float, se: float) -> tuple[float, float]:
    """95% interval of an unsigned effect, clipped at 0 (an effect size is never negative)."""
    half = EFFECT_Z * se
    return max(effect - half, 0.0), effect + half


def effect_size(reference: ItemParameters, focal: ItemParameters, mean: float, sd: float) -> tuple[float, float]:
    """Theta-scale effect (unsigned, signed) of one item (see the module docstring)."""
    theta = np.linspace(mean - 5 * sd, mean + 5 * sd, EFFECT_GRID_POINTS)
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
