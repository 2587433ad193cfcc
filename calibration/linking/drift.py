"""Drift of common items between calibration cycles: a Wald test of the change, with both cycles' sampling error.

The earlier cycle enters as a reference "group" with no respondents whose item parameters are held at
the published values; the new cycle's reference-group respondents are the focal group. For each common
item the nested one-item models of the DIF tests are fitted with every other item held at a provisional
link (:func:`calibration.dif.anchored_lr.nested_item_tests`): M0 the published parameters, M1 the
published slope with the new cycle's own intercepts, M2 all of its own; the new cycle's latent mean and
SD on the earlier scale are re-estimated in every model. Their LR statistic (G2) treats the published
values as exact, which overstates the evidence when the earlier calibration was small. So the decision
rests on the Wald statistic of the change,

    W = d' (V_new + V_published)^-1 d,   d = (new slots under M2) - (published slots),

with ``V_new`` the observed-information covariance of the M2 estimates and ``V_published`` the published
SEs squared (the bundle keeps SEs, not their covariances: a diagonal approximation), df = the item's
slots. The effect size is the DIF one (the gap between the published and the new expected-score curves,
weighted by the new population on the earlier scale, in theta units), its SE from both cycles by the
delta method. An item drifts when its Wald test is significant after Benjamini-Hochberg control across
the common items and its effect reaches the moderate cut-off: the DIF flag rule.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
from scipy import stats

from calibration.dif.anchored_lr import EFFECT_SE_STEP, ItemGroupTest, nested_item_tests
from calibration.dif.effect_size import effect_size
from calibration.dif.multiplicity import adjust
from calibration.estimation import EMSettings, HeldLikelihood, LatentSpec
from calibration.estimation.layout import params_from_table, slot_table
from calibration.irt.likelihood import build_design, log_likelihood_grid, one_item_log_likelihood
from calibration.irt.models import GUESSING_SLOT, FloatArray, ItemParameters

NEW_CYCLE = 1
"""The new cycle's position in the two-group drift models (0 is the earlier cycle, without rows)."""


@dataclass(frozen=True)
class PublishedItem:
    """A common item as the earlier bundle published it: its position now, parameters and slot SEs."""

    position: int
    params: ItemParameters  # one item
    slot_se: FloatArray  # (slots,): slope, intercepts, a 3PL item's logit(g); 0 where the bundle has none


@dataclass(frozen=True)
class DriftTest:
    """One common item's drift test. ``test`` holds the nested LR fits with ``p_omnibus`` the Wald test's p,
    ``p_adjusted`` its FDR adjustment and ``effect_theta_se`` from both cycles (so its ``level`` and
    ``flagged`` apply the DIF rule to the Wald test); ``lr_p`` is the LR test's own p."""

    test: ItemGroupTest
    wald: float
    lr_p: float


def _slots(params: ItemParameters) -> FloatArray:
    """One item's slots: slope, intercepts and a 3PL item's ``logit(g)``."""
    return slot_table(params)[0]


def _published_effect_variance(published: PublishedItem, new: ItemParameters, mean: float, sd: float) -> float:
    """The effect's variance from the published parameters' own SEs (delta method, central differences)."""
    base = _slots(published.params)
    k = base.size
    gradient = np.zeros(k)
    for s in range(k):
        h = EFFECT_SE_STEP * max(1.0, abs(base[s]))
        values = []
        for step in (h, -h):
            moved = base.copy()
            moved[s] += step
            params = params_from_table(moved[None], published.params)
            values.append(effect_size(params, new, mean, sd)[0])
        gradient[s] = (values[0] - values[1]) / (2 * h)
    return float(gradient @ (published.slot_se**2 * gradient))


def _between_cycles(test: ItemGroupTest, published: PublishedItem, mean: float, sd: float) -> DriftTest:
    """The Wald test and the effect's SE with both cycles' sampling error (see the module)."""
    k = int(published.params.n_slots[0])
    change = test.focal_table[:k] - _slots(published.params)
    if test.focal_covariance is None:  # the information was singular: only the LR test is left
        return DriftTest(test, float("nan"), test.p_omnibus)
    own = test.focal_slots if test.focal_slots is not None else np.arange(k)  # the slots the test estimated
    change = change[own]
    variance = test.focal_covariance + np.diag(published.slot_se[own] ** 2)
    wald = float(change @ np.linalg.solve(variance, change))
    new = params_from_table(test.focal_table[None, :k], published.params)
    effect_variance = test.effect_theta_se**2 + _published_effect_variance(published, new, mean, sd)
    moved = replace(
        test, p_omnibus=float(stats.chi2.sf(wald, own.size)), effect_theta_se=float(np.sqrt(effect_variance))
    )
    return DriftTest(moved, wald, test.p_omnibus)


def drift_tests(  # noqa: PLR0913 - the data, the provisional link and keyword-only options
    responses: FloatArray,
    params: ItemParameters,
    common: Sequence[PublishedItem],
    *,
    mean: float,
    sd: float,
    settings: EMSettings,
) -> dict[int, DriftTest]:
    """Drift tests of the common items, keyed by item position, FDR-adjusted across them.

    ``responses`` (n, J) are the new cycle's reference-group rows, ``params`` every item on the
    earlier scale under the provisional link, ``mean`` and ``sd`` that population's density there.
    """
    points = settings.quadrature.points
    every_item = log_likelihood_grid(params, points, build_design(responses, params.n_categories))
    latent = LatentSpec(
        mean=np.array([0.0, mean]),
        sd=np.array([1.0, sd]),
        free_mean=np.array([False, True]),
        free_sd=np.array([False, True]),
    )
    found: dict[int, DriftTest] = {}
    for item in common:
        j, k_j = item.position, int(params.n_categories[item.position])
        answers = responses[:, j]
        others = every_item - one_item_log_likelihood(params, j, answers, points)
        held = [
            HeldLikelihood.without_rows(k_j, points.size),
            HeldLikelihood.from_offset(others, answers, k_j),
        ]
        table = _slots(item.params)
        start = np.stack([table[None], table[None]])  # (2, 1, K): both cycles start at the published values
        fixed = np.zeros((2, 1, table.size), dtype=bool)
        fixed[0] = True  # the earlier cycle's parameters are known
        if settings.held_guessing and np.isfinite(settings.held_guessing[j]) and params.has_guessing[j]:
            fixed[1, 0, GUESSING_SLOT] = True  # an asymptote the item spec holds is not tested
            start[1, 0, GUESSING_SLOT] = np.log(settings.held_guessing[j]) - np.log1p(-settings.held_guessing[j])
        test = nested_item_tests(
            held, params.subset([j]), start, latent, settings, item=j, group=NEW_CYCLE, fixed=fixed
        )
        found[j] = _between_cycles(test, item, mean, sd)
    adjusted = adjust({(j, NEW_CYCLE): d.test for j, d in found.items()})
    return {j: replace(d, test=adjusted[(j, NEW_CYCLE)]) for j, d in found.items()}
