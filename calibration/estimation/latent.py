"""Normal latent densities per group: which moments are estimated, their EM update and score.

Groups other than the reference get a normal latent density whose mean and SD are
re-estimated from the posterior moments on the grid (Bock & Zimowski 1997); the reference
group stays N(0, 1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calibration.irt.likelihood import normal_weights
from calibration.irt.models import FloatArray

LATENT_VARIANCE_FLOOR = 1e-4
"""A group's latent variance never falls below this in an EM update (SD 0.01)."""


@dataclass(frozen=True)
class LatentSpec:
    """Latent N(mean, sd) per group and which of them are estimated (group 0 is the reference)."""

    mean: FloatArray
    sd: FloatArray
    free_mean: np.ndarray
    free_sd: np.ndarray

    @classmethod
    def reference_fixed(cls, n_groups: int, *, free_mean: bool = True, free_sd: bool = True) -> LatentSpec:
        """Reference group N(0, 1) fixed; the other groups' means and SDs estimated (unless switched off)."""
        others = np.arange(n_groups) > 0
        return cls(
            mean=np.zeros(n_groups),
            sd=np.ones(n_groups),
            free_mean=others & free_mean,
            free_sd=others & free_sd,
        )

    @property
    def n_free(self) -> int:
        """Number of estimated latent moments."""
        return int(self.free_mean.sum() + self.free_sd.sum())


def latent_update(
    mass: FloatArray, points: FloatArray, mean: float, sd: float, *, free_mean: bool, free_sd: bool
) -> tuple[float, float]:
    """Normal latent density from the posterior mass on the grid (Bock & Zimowski 1997 moments)."""
    total = mass.sum()
    if total <= 0:
        return mean, sd
    if free_mean:
        mean = float(mass @ points / total)
    if free_sd:
        sd = float(math.sqrt(max(mass @ (points - mean) ** 2 / total, LATENT_VARIANCE_FLOOR)))
    return mean, sd


def latent_score(mass: FloatArray, points: FloatArray, mean: float, sd: float) -> tuple[float, float]:
    """d/d mean and d/d sd of ``sum_q mass_q log w_q`` for the grid-normalised normal weights."""
    d_mean, d_sd = mass @ latent_derivatives(points, mean, sd)[0]
    return float(d_mean), float(d_sd)


def latent_derivatives(points: FloatArray, mean: float, sd: float) -> tuple[FloatArray, FloatArray]:
    """First and second derivatives of ``log w_q`` in (mean, sd): shapes (n_points, 2) and (n_points, 2, 2).

    ``w_q`` are the grid-normalised normal weights, ``log w_q = l_q - log sum_r exp(l_r)`` with
    ``l_q = -(theta_q - mean)^2 / (2 sd^2)``; so the score is ``l'_q - E_w[l']`` and the Hessian
    ``l''_q - E_w[l''] - Cov_w(l')``.
    """
    w = normal_weights(points, mean, sd)
    z = points - mean
    first = np.stack([z / sd**2, z**2 / sd**3], axis=1)
    second = np.empty((points.size, 2, 2))
    second[:, 0, 0] = -1.0 / sd**2
    second[:, 0, 1] = second[:, 1, 0] = -2.0 * z / sd**3
    second[:, 1, 1] = -3.0 * z**2 / sd**4
    centred = first - w @ first  # the score
    hessian = second - np.einsum("q,qst->st", w, second) - np.einsum("q,qs,qt->st", w, centred, centred)
    return centred, hessian
