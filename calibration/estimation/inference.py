"""Standard errors: observed information from the analytic marginal score, and the delta method.

The observed information is the central finite-difference Jacobian of the analytic
marginal score (Fisher's identity: the score of the marginal likelihood is the posterior
expectation of the complete-data score); this is the numerical form of Oakes' (1999,
JRSS-B 61:479) identity.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from calibration.irt.models import FloatArray, IntArray, ItemParameters


def observed_covariance(vec: FloatArray, score: Callable[[FloatArray], FloatArray]) -> FloatArray | None:
    """Inverse of the observed information: central differences of the analytic marginal score.

    Returns None when the information matrix is not positive definite (an
    unidentified or boundary solution); callers then report NaN SEs.
    """
    n = vec.size
    hessian = np.empty((n, n))
    for p in range(n):
        h = 1e-4 * max(1.0, abs(vec[p]))
        up, down = vec.copy(), vec.copy()
        up[p] += h
        down[p] -= h
        hessian[:, p] = (score(up) - score(down)) / (2 * h)
    information = -0.5 * (hessian + hessian.T)
    try:
        chol = np.linalg.cholesky(information)
    except np.linalg.LinAlgError:
        return None
    inv_chol = np.linalg.inv(chol)
    return inv_chol.T @ inv_chol


def threshold_se(params: ItemParameters, index: IntArray, covariance: FloatArray | None) -> FloatArray:
    """Delta-method SEs of ``b_k = -c_k / a`` from a covariance over the free parameters.

    ``index`` is (n_items, k_max): each slot's position in the covariance, -1 if fixed.
    """
    out = np.full_like(params.intercepts, np.nan)
    if covariance is None:
        return out
    a = params.slopes
    for j in range(params.n_items):
        ia = index[j, 0]
        for m in range(params.n_categories[j] - 1):
            ic = index[j, m + 1]
            c = params.intercepts[j, m]
            # b = -c/a: db/dc = -1/a, db/da = c/a^2; a fixed slot contributes no variance.
            g_c, g_a = -1.0 / a[j], c / a[j] ** 2
            var = 0.0
            if ic >= 0:
                var += g_c**2 * covariance[ic, ic]
            if ia >= 0:
                var += g_a**2 * covariance[ia, ia]
            if ia >= 0 and ic >= 0:
                var += 2 * g_a * g_c * covariance[ia, ic]
            out[j, m] = math.sqrt(var) if var > 0 else np.nan
    return out
