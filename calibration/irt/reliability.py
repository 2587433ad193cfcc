"""Reliability of theta scores: marginal reliability and the test information curve."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.models import FloatArray, ItemParameters, total_information


def marginal_reliability(theta: FloatArray, se: FloatArray) -> float:
    """``var(EAP) / (var(EAP) + mean(PSD^2))`` (Green, Bock, Humphreys, Linn & Reckase 1984)."""
    ok = np.isfinite(theta) & np.isfinite(se)
    if ok.sum() < 2:
        return float("nan")
    var_theta = float(np.var(theta[ok]))
    error = float(np.mean(se[ok] ** 2))
    return var_theta / (var_theta + error)


@dataclass(frozen=True)
class InformationCurve:
    """Test information and the conditional SE ``1/sqrt(I)`` on a theta grid."""

    theta: FloatArray
    information: FloatArray
    se: FloatArray


def information_curve(params: ItemParameters, theta: FloatArray | None = None) -> InformationCurve:
    """Test information on ``theta`` (default -4 .. 4 by 0.5)."""
    grid = np.linspace(-4.0, 4.0, 17) if theta is None else np.asarray(theta, dtype=np.float64)
    info = total_information(params, grid)
    return InformationCurve(theta=grid, information=info, se=1.0 / np.sqrt(info))
