"""The 95% interval of a DIF effect size, in one place for the DIF stage and the summaries that print it.

Plain ``math``: the command line imports it to print a stored bundle without loading scipy.
"""

from __future__ import annotations

# Two-sided 95% normal quantile (scipy.stats.norm.ppf(0.975) = 1.959963984540054).
EFFECT_Z = 1.959963984540054


def effect_interval(effect: float, se: float) -> tuple[float, float]:
    """95% interval of an unsigned effect, clipped at 0 (an effect size is never negative)."""
    half = EFFECT_Z * se
    return max(effect - half, 0.0), effect + half
