"""The EM iteration, accelerated by SQUAREM.

SQUAREM (Varadhan & Roland 2008, Scand. J. Stat. 35:335), scheme S3, over the EM map,
with a fall-back to the plain EM step whenever the extrapolated point is invalid or
lowers the likelihood, so every accepted iterate raises it.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable

import numpy as np

from calibration.estimation.settings import ConvergenceWarning, EMSettings
from calibration.irt.models import FloatArray

EMMap = Callable[[FloatArray], tuple[FloatArray, float]]
"""An EM map: the updated vector and the log-likelihood at the vector it was given."""


def _squarem_step(
    vec: FloatArray,
    em_map: Callable[[FloatArray], tuple[FloatArray, float]],
    current_ll: float,
) -> tuple[FloatArray, float, int]:
    """One SQUAREM cycle (scheme S3); returns the new vector, its log-likelihood and EM calls."""
    v1, _ = em_map(vec)
    v2, ll2 = em_map(v1)
    r = v1 - vec
    v = (v2 - v1) - r
    norm_v = float(np.linalg.norm(v))
    if norm_v == 0.0:
        return v2, ll2, 2
    alpha = -float(np.linalg.norm(r)) / norm_v
    alpha = min(alpha, -1.0)
    candidate = vec - 2 * alpha * r + alpha * alpha * v
    try:
        v3, ll3 = em_map(candidate)
    except (np.linalg.LinAlgError, FloatingPointError, ValueError):
        return v2, ll2, 3
    if np.all(np.isfinite(v3)) and ll3 >= ll2 - 1e-9:
        return v3, ll3, 3
    return v2, ll2, 3


def run_em(
    vec: FloatArray,
    em_map: Callable[[FloatArray], tuple[FloatArray, float]],
    settings: EMSettings,
    *,
    progress: Callable[[int, float], None] | None = None,
    warn: bool = True,
) -> tuple[FloatArray, bool, int, tuple[float, ...]]:
    """Iterate an EM map (SQUAREM-accelerated) to the convergence criterion.

    ``em_map(vec)`` returns the updated vector and the log-likelihood at ``vec``.
    Warns with :class:`ConvergenceWarning` when ``max_iter`` is reached, unless ``warn`` is
    False (callers that report non-convergence themselves, e.g. in a bundle's warnings).
    """
    history: list[float] = []
    converged = False
    n_iter = 0
    log_lik = -np.inf
    while n_iter < settings.max_iter:
        if settings.accelerate and n_iter >= 2:
            new_vec, new_ll, calls = _squarem_step(vec, em_map, log_lik)
        else:
            new_vec, new_ll = em_map(vec)
            calls = 1
        n_iter += calls
        change = float(np.max(np.abs(new_vec - vec))) if vec.size else 0.0
        vec, log_lik = new_vec, new_ll
        history.append(log_lik)
        if progress is not None:
            progress(n_iter, log_lik)
        if change < settings.tolerance:
            converged = True
            break
    if not converged and warn:
        warnings.warn(
            f"EM did not converge in {settings.max_iter} iterations "
            f"(last largest parameter change above {settings.tolerance:g}); "
            "estimates may be unstable: check for items with near-zero variance or raise max_iter",
            ConvergenceWarning,
            stacklevel=3,
        )
    return vec, converged, n_iter, tuple(history)
