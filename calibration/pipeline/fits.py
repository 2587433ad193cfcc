"""The pipeline's model fits: non-convergence goes into the bundle's warnings, not a Python warning."""

from __future__ import annotations

from typing import Any

from calibration.estimation import MultiGroupFit, calibrate_groups


def quiet_fit(*args: Any, **kwargs: Any) -> MultiGroupFit:
    """:func:`calibrate_groups` with ``warn=False`` (the pipeline reports ``converged`` itself)."""
    return calibrate_groups(*args, warn=False, **kwargs)
