"""The invariance ladder: configural, metric, scalar and partial models on the same data."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from scipy import stats

from calibration.bundle.schema import LadderRow
from calibration.dif.irt import DifOutcome
from calibration.estimation import EMSettings, LatentSpec, MultiGroupFit
from calibration.pipeline.fits import quiet_fit
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData


def invariance_ladder(
    prepared: PreparedData, em: EMSettings, scalar: MultiGroupFit, policy: PolicyTable, dif: DifOutcome
) -> list[LadderRow]:
    """Configural, metric, scalar and partial invariance models on the same data.

    Cells without variance in a group carry no data in any rung and stay shared.
    """
    em = replace(em, standard_errors=False)  # the rungs are compared by likelihood: no SEs needed
    x, k, group_index, n_groups, models = (
        prepared.model_responses,
        prepared.k,
        prepared.group_index,
        prepared.n_groups,
        prepared.models,
    )
    structural = set(prepared.no_variance_cells)
    n_items, k_max = x.shape[1], scalar.tables.shape[2]  # k_max: slots per item
    everything = np.ones((n_groups, n_items, k_max), dtype=bool)
    everything[0] = False
    for j, g in structural:
        everything[g, j, :] = False
    configural = quiet_fit(
        x,
        k,
        group_index,
        n_groups,
        models=models,
        settings=em,
        group_free=everything,
        start=scalar.tables,
        latent=LatentSpec.reference_fixed(n_groups, free_mean=False, free_sd=False),
    )
    intercepts = everything.copy()
    intercepts[..., 0] = False
    metric = quiet_fit(
        x,
        k,
        group_index,
        n_groups,
        models=models,
        settings=em,
        group_free=intercepts,
        start=scalar.tables,
        latent=LatentSpec.reference_fixed(n_groups, free_mean=False),
    )
    partial_free = np.zeros((n_groups, n_items, k_max), dtype=bool)
    for (j, g), cell in policy.cells():
        if cell.status != "invariant" and (j, g) not in structural:
            partial_free[g, j, :] = True  # same data as the other rungs: excluded cells are freed here
    partial = quiet_fit(
        x, k, group_index, n_groups, models=models, settings=em, group_free=partial_free, start=dif.anchor_fit.tables
    )

    return [
        _ladder_row("configural", "all item parameters free per group; every group N(0,1)", configural, None),
        _ladder_row("metric", "slopes equal; intercepts free; focal SDs estimated", metric, ("configural", configural)),
        _ladder_row("scalar", "slopes and intercepts equal; focal means and SDs estimated", scalar, ("metric", metric)),
        _ladder_row(
            "partial",
            "anchors and unflagged items equal; flagged or overridden cells free",
            partial,
            ("scalar", scalar),
        ),
    ]


def _ladder_row(
    model: str, description: str, fit: MultiGroupFit, against: tuple[str, MultiGroupFit] | None
) -> LadderRow:
    lr = df = p = None
    compared = None
    if against is not None:
        compared, other = against
        df = abs(fit.n_parameters - other.n_parameters)
        bigger, smaller = (fit, other) if fit.n_parameters >= other.n_parameters else (other, fit)
        lr = max(2.0 * (bigger.log_likelihood - smaller.log_likelihood), 0.0)
        p = float(stats.chi2.sf(lr, df)) if df > 0 else None
    return LadderRow(
        model=model,
        description=description,
        log_likelihood=fit.log_likelihood,  # type: ignore[arg-type]
        n_parameters=fit.n_parameters,
        aic=fit.aic,
        bic=fit.bic,
        compared_with=compared,
        lr_statistic=lr,
        df=df,
        p_value=p,
    )
