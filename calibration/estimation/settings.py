"""Settings of the EM calibration, its slope prior and its convergence warning."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from calibration.irt.likelihood import CALIBRATION_GRID, QuadratureGrid
from calibration.irt.models import FloatArray

SLOPE_FLOOR = 1e-8
"""Slopes are floored here before the log in the slope prior (a slope is never exactly 0 in a valid fit)."""


class ConvergenceWarning(UserWarning):
    """EM stopped at ``max_iter`` before the convergence criterion was met."""


@dataclass(frozen=True)
class SlopePrior:
    """Log-normal prior on slopes: ``log a ~ N(mean, sd^2)`` (a mild one keeps slopes finite)."""

    mean: float = 0.0
    sd: float = 1.0

    def log_density(self, a: FloatArray) -> FloatArray:
        """Log prior density of slopes ``a`` (up to a constant)."""
        safe = np.maximum(a, SLOPE_FLOOR)
        z = (np.log(safe) - self.mean) / self.sd
        return -np.log(safe) - 0.5 * z * z

    def gradient(self, a: FloatArray) -> FloatArray:
        """Derivative of the log prior density with respect to the slope."""
        safe = np.maximum(a, SLOPE_FLOOR)
        return -1.0 / safe - (np.log(safe) - self.mean) / (self.sd**2 * safe)

    def second_derivative(self, a: FloatArray) -> FloatArray:
        """Second derivative of the log prior density with respect to the slope."""
        safe = np.maximum(a, SLOPE_FLOOR)
        return (1.0 - (1.0 - (np.log(safe) - self.mean)) / self.sd**2) / (safe * safe)

    def curvature(self, a: FloatArray) -> FloatArray:
        """A positive stand-in for minus the second derivative (used in Fisher scoring)."""
        safe = np.maximum(a, SLOPE_FLOOR)
        return 1.0 / (self.sd**2 * safe * safe)


@dataclass(frozen=True)
class EMSettings:
    """Settings of the EM calibration.

    ``tolerance`` is the largest absolute change of any item parameter between
    iterations that counts as converged. No slope prior by default (pure marginal
    ML); ``SlopePrior(0, 1)`` is a mild choice for small samples.
    """

    max_iter: int = 1000
    tolerance: float = 1e-5
    quadrature: QuadratureGrid = field(default_factory=lambda: CALIBRATION_GRID)
    slope_prior: SlopePrior | None = None
    m_step_iter: int = 4
    accelerate: bool = True
    standard_errors: bool = True
    compress_patterns: bool = True
