"""Results of the marginal ML estimators: one base with the information criteria."""

from __future__ import annotations

import math
from dataclasses import dataclass

from calibration.estimation.inference import threshold_se
from calibration.estimation.latent import LatentSpec
from calibration.estimation.layout import GroupLayout, params_from_table
from calibration.estimation.settings import EMSettings
from calibration.irt.models import FloatArray, ItemParameters


class InformationCriteria:
    """AIC and BIC of a fit that has ``log_likelihood``, ``n_parameters`` and ``n_persons``."""

    log_likelihood: float
    n_parameters: int
    n_persons: int

    @property
    def aic(self) -> float:
        """Akaike's criterion, ``-2 LL + 2 p``."""
        return -2.0 * self.log_likelihood + 2.0 * self.n_parameters

    @property
    def bic(self) -> float:
        """Schwarz's criterion, ``-2 LL + p log n`` (n = respondents, at least 1)."""
        return -2.0 * self.log_likelihood + self.n_parameters * math.log(max(self.n_persons, 1))


@dataclass(frozen=True)
class MultiGroupFit(InformationCriteria):
    """Result of a multiple-group marginal ML calibration.

    ``tables[g]`` holds group g's (slope, intercepts...) per item; ``slot_se`` the SEs
    (NaN for fixed slots). Latent arrays have shape (n_groups,); SEs are NaN where fixed.
    """

    template: ItemParameters
    tables: FloatArray
    slot_se: FloatArray
    latent_mean: FloatArray
    latent_sd: FloatArray
    latent_mean_se: FloatArray
    latent_sd_se: FloatArray
    log_likelihood: float
    group_log_likelihood: FloatArray
    n_parameters: int
    n_persons: int
    converged: bool
    n_iter: int
    covariance: FloatArray | None
    layout: GroupLayout
    latent: LatentSpec
    settings: EMSettings
    history: tuple[float, ...] = ()

    def group_params(self, g: int) -> ItemParameters:
        """Group g's item parameters."""
        return params_from_table(self.tables[g], self.template)


@dataclass(frozen=True)
class CalibrationFit(InformationCriteria):
    """Result of a single-group marginal ML calibration (latent density N(0, 1)).

    ``slope_se`` and ``intercept_se`` hold NaN for fixed parameters (and for all
    parameters when SEs were not requested or the information was singular).
    """

    params: ItemParameters
    slope_se: FloatArray
    intercept_se: FloatArray
    log_likelihood: float
    n_parameters: int
    n_persons: int
    converged: bool
    n_iter: int
    covariance: FloatArray | None
    settings: EMSettings
    layout: GroupLayout
    history: tuple[float, ...] = ()

    def threshold_se(self) -> FloatArray:
        """Delta-method SEs of ``b_k = -c_k / a`` (NaN where the covariance is unknown)."""
        return threshold_se(self.params, self.layout.index[0], self.covariance)
