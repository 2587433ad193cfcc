"""Marginal maximum likelihood estimation of item parameters."""

from calibration.estimation.em import (
    CalibrationFit,
    ConvergenceWarning,
    EMSettings,
    SlopePrior,
    calibrate_single_group,
    marginal_log_likelihood,
)

__all__ = ["CalibrationFit", "ConvergenceWarning", "EMSettings", "SlopePrior", "calibrate_single_group",
           "marginal_log_likelihood"]
