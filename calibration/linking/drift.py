"""Drift of common items between calibration cycles: the anchored LR test against the earlier parameters.

The earlier cycle enters as a reference "group" with no respondents whose item parameters are held
at the published values; the new cycle's reference-group respondents are the focal group. For each
common item the nested one-item models of the DIF tests are fitted with every other item held at a
provisional link (:func:`calibration.dif.anchored_lr.nested_item_tests`): M0 the earlier parameters,
M1 the earlier slope with the new cycle's own intercepts, M2 all of its own. The new cycle's latent
mean and SD on the earlier scale are re-estimated in every model. So drift is judged exactly as DIF
is: the omnibus G2 with Benjamini-Hochberg control across the common items, and an effect size in
theta units (the new population's density weighting the gap between the earlier and the new
expected-score curves) with its delta-method SE; an item drifts when it is significant after FDR
control and its effect reaches the moderate cut-off (the same rule as a DIF flag). The earlier
parameters are taken as known (their own SEs do not enter the test).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from calibration.dif.anchored_lr import ItemGroupTest, nested_item_tests
from calibration.dif.multiplicity import adjust
from calibration.estimation import EMSettings, HeldLikelihood, LatentSpec
from calibration.irt.likelihood import build_design, log_likelihood_grid, one_item_log_likelihood
from calibration.irt.models import FloatArray, ItemParameters

NEW_CYCLE = 1
"""The new cycle's position in the two-group drift models (0 is the earlier cycle, without rows)."""


def drift_tests(  # noqa: PLR0913 - the data, the provisional link and keyword-only options
    responses: FloatArray,
    params: ItemParameters,
    common: Sequence[tuple[int, ItemParameters]],
    *,
    mean: float,
    sd: float,
    settings: EMSettings,
) -> dict[int, ItemGroupTest]:
    """Drift tests of the common items, keyed by item position, with FDR-adjusted p values.

    ``responses`` (n, J) are the new cycle's reference-group rows, ``params`` every item on the
    earlier scale under the provisional link, ``mean`` and ``sd`` that population's density there,
    ``common`` the (position, earlier one-item parameters) pairs to test.
    """
    points = settings.quadrature.points
    every_item = log_likelihood_grid(params, points, build_design(responses, params.n_categories))
    latent = LatentSpec(
        mean=np.array([0.0, mean]),
        sd=np.array([1.0, sd]),
        free_mean=np.array([False, True]),
        free_sd=np.array([False, True]),
    )
    tests: dict[tuple[int, int], ItemGroupTest] = {}
    for j, earlier in common:
        k_j = int(params.n_categories[j])
        answers = responses[:, j]
        others = every_item - one_item_log_likelihood(params, j, answers, points)
        held = [
            HeldLikelihood.without_rows(k_j, points.size),
            HeldLikelihood.from_offset(others, answers, k_j),
        ]
        earlier_table = np.concatenate([earlier.slopes[:1], earlier.intercepts[0, : k_j - 1]])
        start = np.stack([earlier_table[None], earlier_table[None]])  # (2, 1, K): both cycles start there
        fixed = np.zeros((2, 1, k_j), dtype=bool)
        fixed[0] = True  # the earlier cycle's parameters are known
        tests[(j, NEW_CYCLE)] = nested_item_tests(
            held, params.subset([j]), start, latent, settings, item=j, group=NEW_CYCLE, fixed=fixed
        )
    return {j: test for (j, _), test in adjust(tests).items()}
