"""The linear reporting scale that theta scores and their SEs are shown on."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calibration.irt.models import FloatArray


@dataclass(frozen=True)
class ReportingScale:
    """Linear reporting scale: ``score = round(location + scale * theta)`` within bounds.

    The SE on the reporting scale is ``scale * SE(theta)`` (not rounded away: it
    keeps ``decimals + 1`` places so that small SEs stay visible).
    """

    location: float = 500.0
    scale: float = 100.0
    decimals: int = 0
    minimum: float | None = 100.0
    maximum: float | None = 900.0

    def __post_init__(self) -> None:
        if not self.scale > 0:
            raise ValueError("reporting scale must be positive")
        if self.minimum is not None and self.maximum is not None and self.minimum >= self.maximum:
            raise ValueError("reporting scale minimum must be below its maximum")

    def transform(self, theta: FloatArray, se: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Theta and its SE on the reporting scale: rounded and clipped scores, SEs with one more decimal."""
        raw = self.location + self.scale * np.asarray(theta, dtype=np.float64)
        lo = -math.inf if self.minimum is None else self.minimum
        hi = math.inf if self.maximum is None else self.maximum
        scaled = np.clip(np.round(raw, self.decimals), lo, hi)
        return scaled, np.round(self.scale * np.asarray(se, dtype=np.float64), self.decimals + 1)
