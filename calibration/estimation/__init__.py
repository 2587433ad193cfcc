"""Marginal maximum likelihood estimation of item parameters (one or many groups).

The public names are here; the rooms behind them are ``settings``, ``layout`` (parameter
slots), ``estep``, ``mstep``, ``latent`` (group densities), ``optimizer`` (EM + SQUAREM),
``start`` (starting values), ``information`` (observed information, covariance), ``inference``
(threshold SEs), ``results`` and ``mml`` (the estimators).
"""

from calibration.estimation.estep import HeldLikelihood
from calibration.estimation.inference import threshold_se
from calibration.estimation.latent import LatentSpec
from calibration.estimation.mml import (
    CellDensities,
    HeldItemFit,
    calibrate_groups,
    calibrate_single_group,
    fit_cell_densities,
    fit_item_given_offsets,
)
from calibration.estimation.results import CalibrationFit, MultiGroupFit
from calibration.estimation.settings import ConvergenceWarning, EMSettings, SlopePrior
from calibration.irt.likelihood import marginal_log_likelihood

__all__ = [
    "CalibrationFit",
    "CellDensities",
    "ConvergenceWarning",
    "EMSettings",
    "HeldItemFit",
    "HeldLikelihood",
    "LatentSpec",
    "MultiGroupFit",
    "SlopePrior",
    "calibrate_groups",
    "calibrate_single_group",
    "fit_cell_densities",
    "fit_item_given_offsets",
    "marginal_log_likelihood",
    "threshold_se",
]
