"""Characteristic-curve linking constants (Haebara 1980; Stocking & Lord 1983) and the scale transformation.

A link puts a new calibration on an earlier one's scale: ``theta_old = A * theta_new + B``. An item's
slope-intercept parameters on the new scale become ``a / A`` and ``c - a * B / A`` on the old one (its
thresholds ``A * b + B``), a group's latent mean ``A * mean + B`` and its SD ``A * sd``.

Both criteria compare the common items' curves on the old scale, over a grid weighted by the old
scale's base population N(0, 1) (one direction, old scale; Kolen & Brennan 2014 also describe a
symmetric variant):

* Haebara: ``sum_q w_q sum_j sum_k (P_jk(theta_q; old) - P_jk(theta_q; new on the old scale))^2``,
  every category curve of every common item;
* Stocking-Lord: ``sum_q w_q (T_old(theta_q) - T_new(theta_q))^2`` with ``T`` the expected summed
  score over the common items (the test characteristic curve).

The constants' SEs come from the delta method through the new estimates' covariance (the old
parameters are taken as known): by the implicit-function theorem ``d(A, B)/dp = -H^-1 d(grad)/dp``
at the minimum, with ``H`` and the mixed derivatives from central differences of the criterion.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from calibration.estimation.layout import params_from_table, slot_table
from calibration.irt.likelihood import QuadratureGrid, normal_weights
from calibration.irt.models import FloatArray, ItemParameters, category_probabilities, expected_item_scores
from calibration.vocabulary import LinkMethod

LINK_GRID = QuadratureGrid(81, -4.0, 4.0)
"""Where the criteria compare curves: 81 points on -4..4 of the old scale, weighted by N(0, 1)."""
DIFFERENCE_STEP = 1e-4
"""Relative step of the central differences behind the constants' SEs."""


@dataclass(frozen=True)
class LinkingConstants:
    """``theta_old = slope * theta_new + intercept``, with delta-method SEs (NaN without a covariance)."""

    slope: float
    intercept: float
    slope_se: float = float("nan")
    intercept_se: float = float("nan")
    covariance: FloatArray | None = None  # (2, 2) of (slope, intercept)

    def rescale(self, params: ItemParameters) -> ItemParameters:
        """Item parameters from the new scale on the old one."""
        return rescale(params, self.slope, self.intercept)


def rescale(params: ItemParameters, slope: float, intercept: float) -> ItemParameters:
    """Slope-intercept parameters on the new scale expressed on the old: ``a / A``, ``c - a * B / A``."""
    a = params.slopes / slope
    return ItemParameters(
        slopes=a,
        intercepts=params.intercepts - (a * intercept)[:, None],
        n_categories=params.n_categories,
        models=params.models,
        guessing=params.guessing,  # an asymptote is a probability: the same on every scale
    )


_Criterion = Callable[[ItemParameters], float]


def _criterion(method: LinkMethod, old: ItemParameters, points: FloatArray, weights: FloatArray) -> _Criterion:
    if method == "haebara":
        target = category_probabilities(old, points)

        def haebara(new: ItemParameters) -> float:
            gap = category_probabilities(new, points) - target  # categories an item lacks are 0 in both
            return float(np.einsum("jkq,q->", gap * gap, weights))

        return haebara
    if method == "stocking-lord":
        target_score = expected_item_scores(old, points).sum(axis=0)

        def stocking_lord(new: ItemParameters) -> float:
            gap = expected_item_scores(new, points).sum(axis=0) - target_score
            return float(weights @ (gap * gap))

        return stocking_lord
    raise ValueError(f"no characteristic-curve criterion for link method {method!r}")


def characteristic_curve_constants(
    old: ItemParameters,
    new: ItemParameters,
    *,
    method: LinkMethod,
    covariance: FloatArray | None = None,
    grid: QuadratureGrid = LINK_GRID,
) -> LinkingConstants:
    """The constants that put ``new`` (common items, new scale) on the scale of ``old`` (same items, same order).

    ``covariance`` of the new items' slots, in the order slope, intercepts (and logit(g)) item by item (the
    existing slots only), gives the constants' SEs by the delta method.
    """
    if old.n_items != new.n_items or not np.array_equal(old.n_categories, new.n_categories):
        raise ValueError("linking needs the same common items, with the same categories, on both scales")
    points = grid.points
    weights = normal_weights(points)
    criterion = _criterion(method, old, points, weights)

    def objective(constants: FloatArray, items: ItemParameters = new) -> float:
        log_slope, intercept = constants
        return criterion(rescale(items, float(np.exp(log_slope)), float(intercept)))

    best = _minimise(objective)
    slope, intercept = float(np.exp(best[0])), float(best[1])
    if covariance is None:
        return LinkingConstants(slope, intercept)
    jacobian = _constants_jacobian(objective, best, new)  # d(log A, B) / d(new slots)
    on_log = jacobian @ covariance @ jacobian.T
    to_slope = np.diag([slope, 1.0])  # dA / d log A = A
    cov = to_slope @ on_log @ to_slope
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    return LinkingConstants(slope, intercept, float(se[0]), float(se[1]), cov)


def _minimise(objective: Callable[[FloatArray], float]) -> FloatArray:
    """The criterion's minimum over (log A, B), from the identity link."""
    result = optimize.minimize(objective, np.zeros(2), method="BFGS", options={"gtol": 1e-12, "maxiter": 500})
    return np.asarray(result.x, dtype=np.float64)


def _slot_vector(params: ItemParameters) -> tuple[FloatArray, Callable[[FloatArray], ItemParameters]]:
    """The existing slots (slope, intercepts, a 3PL item's logit(g)) item by item, and the map back."""
    table = slot_table(params)
    exists = np.arange(params.max_slots)[None, :] < params.n_slots[:, None]

    def rebuild(values: FloatArray) -> ItemParameters:
        moved = table.copy()
        moved[exists] = values
        return params_from_table(moved, params)

    return table[exists], rebuild


def _constants_jacobian(
    objective: Callable[[FloatArray, ItemParameters], float], best: FloatArray, new: ItemParameters
) -> FloatArray:
    """``d(log A, B) / d p`` at the minimum: ``-H^-1 dG/dp`` (implicit function), by central differences."""
    p0, rebuild = _slot_vector(new)

    def gradient(at: FloatArray, items: ItemParameters) -> FloatArray:
        out = np.empty(2)
        for i in range(2):
            h = DIFFERENCE_STEP * max(1.0, abs(at[i]))
            up, down = at.copy(), at.copy()
            up[i] += h
            down[i] -= h
            out[i] = (objective(up, items) - objective(down, items)) / (2 * h)
        return out

    hessian = np.empty((2, 2))
    for i in range(2):
        h = DIFFERENCE_STEP * max(1.0, abs(best[i]))
        up, down = best.copy(), best.copy()
        up[i] += h
        down[i] -= h
        hessian[:, i] = (gradient(up, new) - gradient(down, new)) / (2 * h)
    hessian = 0.5 * (hessian + hessian.T)
    mixed = np.empty((2, p0.size))
    for p in range(p0.size):
        h = DIFFERENCE_STEP * max(1.0, abs(p0[p]))
        up, down = p0.copy(), p0.copy()
        up[p] += h
        down[p] -= h
        mixed[:, p] = (gradient(best, rebuild(up)) - gradient(best, rebuild(down))) / (2 * h)
    return np.asarray(-np.linalg.solve(hessian, mixed), dtype=np.float64)
