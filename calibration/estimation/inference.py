"""Standard errors on the threshold scale by the delta method (the covariance comes from :mod:`.information`)."""

from __future__ import annotations

import math

import numpy as np

from calibration.irt.models import FloatArray, IntArray, ItemParameters


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
