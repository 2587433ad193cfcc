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
class GuessingPrior:
    """Beta(alpha, beta) prior on every estimated 3PL lower asymptote ``g``, applied on ``gamma = logit(g)``.

    The default Beta(5, 17) has its mode at 0.2 and 95% of its mass between about 0.08 and 0.43: it
    keeps an asymptote that the data say little about (few low-ability respondents) near a
    plausible chance rate instead of letting it run to 0 or to the item's p-value, and the data
    overrule it where they are informative (a common-practice choice; fix the asymptote in the
    item spec to hold it at a known chance rate instead). The log density in ``gamma`` is
    ``(alpha - 1) log g + (beta - 1) log(1 - g)`` (no Jacobian: the mode is the mode in ``g``).
    """

    alpha: float = 5.0
    beta: float = 17.0

    def log_density(self, gamma: FloatArray) -> FloatArray:
        """Log prior density (up to a constant) at ``gamma = logit(g)``."""
        gamma = np.asarray(gamma, dtype=np.float64)
        return -(self.alpha - 1.0) * np.logaddexp(0.0, -gamma) - (self.beta - 1.0) * np.logaddexp(0.0, gamma)

    def gradient(self, gamma: FloatArray) -> FloatArray:
        """Derivative of the log density in ``gamma``: ``(alpha - 1)(1 - g) - (beta - 1) g``."""
        g = 1.0 / (1.0 + np.exp(-np.asarray(gamma, dtype=np.float64)))
        return (self.alpha - 1.0) * (1.0 - g) - (self.beta - 1.0) * g

    def second_derivative(self, gamma: FloatArray) -> FloatArray:
        """Second derivative in ``gamma``: ``-(alpha + beta - 2) g (1 - g)``."""
        g = 1.0 / (1.0 + np.exp(-np.asarray(gamma, dtype=np.float64)))
        return -(self.alpha + self.beta - 2.0) * g * (1.0 - g)

    @property
    def sd(self) -> float:
        """The prior's SD on the asymptote scale."""
        total = self.alpha + self.beta
        return float(np.sqrt(self.alpha * self.beta / (total * total * (total + 1.0))))

    def describe(self) -> str:
        """How the bundle's settings name it."""
        return f"beta(alpha={self.alpha:g}, beta={self.beta:g}) on each estimated 3PL lower asymptote"


GUESSING_PRIOR = GuessingPrior()
"""The prior every estimated 3PL asymptote carries (in the calibration, the one-item DIF and link fits)."""


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
    held_guessing: tuple[float, ...] = ()
    """Per item, a 3PL asymptote held at this value in every group and every fit (NaN: estimated under
    the asymptote prior); empty: every asymptote estimated."""
