"""The pipeline's model fits: non-convergence goes into the bundle's warnings, not a Python warning."""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

from calibration.estimation import EMSettings, MultiGroupFit, calibrate_groups

if TYPE_CHECKING:
    from calibration.pipeline.policy import PolicyTable
    from calibration.pipeline.prepare import PreparedData

ProgressCallback = Callable[[str, int, float], None]


def quiet_fit(*args: Any, **kwargs: Any) -> MultiGroupFit:
    """:func:`calibrate_groups` with ``warn=False`` (the pipeline reports ``converged`` itself)."""
    return calibrate_groups(*args, warn=False, **kwargs)


class WholeTable(Protocol):
    """The whole response table when the table a calibration reads is a random sample of it."""

    @property
    def group_sizes(self) -> dict[str, int]:
        """Respondents per group in the whole table."""

    @property
    def answered(self) -> dict[str, int]:
        """Answers to each item in the whole table."""

    @property
    def sample_record(self) -> str | None:
        """How the sample was drawn, as provenance records it (None: the sample holds every respondent)."""

    def final_fit(  # noqa: PLR0913 - the prepared sample, the policy and the fit's options
        self,
        prepared: PreparedData,
        policy: PolicyTable,
        *,
        settings: EMSettings,
        group_free: np.ndarray,
        start: np.ndarray | None,
        progress: ProgressCallback | None,
    ) -> MultiGroupFit:
        """The calibration under the policy on every respondent, prepared as ``prepared`` prepared the sample."""
