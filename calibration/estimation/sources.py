"""Where the estimator's sums over respondents come from: this process's rows, or partitions elsewhere.

Every sum the EM and the SEs need is a sum over respondents: the E-step's expected counts, posterior
mass and log-likelihood, and the observed information's per-respondent terms. A :class:`GroupSource`
returns those sums; :class:`LocalGroups` computes them from the rows it holds, and a distributed source
(``calibration.distributed``) adds up its partitions' sums. The estimator does not know which.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

from calibration.estimation.estep import ExpectedCounts, GroupData, expected_counts
from calibration.estimation.information import observed_information
from calibration.estimation.latent import LatentSpec
from calibration.estimation.layout import GroupLayout
from calibration.irt.models import FloatArray, ItemParameters


class GroupSource(Protocol):
    """The respondents of a calibration, group by group, as sums over rows."""

    @property
    def n_persons(self) -> int:
        """Respondents in all groups."""
        ...

    def expected(
        self, params: Sequence[ItemParameters], points: FloatArray, log_priors: Sequence[FloatArray]
    ) -> list[ExpectedCounts]:
        """Each group's E-step sums under its item parameters and log prior weights on ``points``."""
        ...

    def information(
        self, tables: FloatArray, template: ItemParameters, points: FloatArray, latent: LatentSpec, layout: GroupLayout
    ) -> FloatArray:
        """Minus the Hessian of the marginal log-likelihood over the free parameters, without any prior."""
        ...


@dataclass(frozen=True)
class LocalGroups:
    """The rows of every group, held in this process (prepared by :func:`~.estep.prepare_groups`)."""

    groups: list[GroupData]

    @property
    def n_persons(self) -> int:
        """Respondents in all groups."""
        return sum(d.n_persons for d in self.groups)

    def expected(
        self, params: Sequence[ItemParameters], points: FloatArray, log_priors: Sequence[FloatArray]
    ) -> list[ExpectedCounts]:
        """Each group's E-step sums under its item parameters and log prior weights on ``points``."""
        return [
            expected_counts(params[g], d.design, points, log_priors[g], d.weights) for g, d in enumerate(self.groups)
        ]

    def information(
        self, tables: FloatArray, template: ItemParameters, points: FloatArray, latent: LatentSpec, layout: GroupLayout
    ) -> FloatArray:
        """Minus the Hessian of the marginal log-likelihood over the free parameters, without any prior."""
        return observed_information(tables, template, self.groups, points, latent, layout, None, with_priors=False)
