"""Multiple testing across items x focal groups: Benjamini & Hochberg (1995) false discovery rate."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from scipy import stats

from calibration.dif.anchored_lr import ItemGroupTest
from calibration.irt.models import FloatArray


def benjamini_hochberg(p_values: FloatArray) -> FloatArray:
    """Adjusted p values (step-up, Benjamini & Hochberg 1995), by scipy's ``false_discovery_control``."""
    p = np.asarray(p_values, dtype=np.float64)
    return p if p.size == 0 else np.asarray(stats.false_discovery_control(p, method="bh"))


def adjust(tests: dict[tuple[int, int], ItemGroupTest]) -> dict[tuple[int, int], ItemGroupTest]:
    """Fill ``p_adjusted`` by Benjamini-Hochberg across all the given tests."""
    keys = list(tests)
    adjusted = benjamini_hochberg(np.array([tests[k].p_omnibus for k in keys]))
    return {k: _with_adjusted(tests[k], float(a)) for k, a in zip(keys, adjusted, strict=True)}


def _with_adjusted(test: ItemGroupTest, p: float) -> ItemGroupTest:
    return replace(test, p_adjusted=p)
