"""Marginal maximum likelihood estimation of item parameters (one or many groups)."""

from calibration.estimation.em import (
    CalibrationFit,
    ConvergenceWarning,
    EMSettings,
    LatentSpec,
    MultiGroupFit,
    SlopePrior,
    calibrate_groups,
    calibrate_single_group,
    marginal_log_likelihood,
)

__all__ = [
    "CalibrationFit",
    "ConvergenceWarning",
    "EMSettings",
    "LatentSpec",
    "MultiGroupFit",
    "SlopePrior",
    "calibrate_groups",
    "calibrate_single_group",
    "marginal_log_likelihood",
]
