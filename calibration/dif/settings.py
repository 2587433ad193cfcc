"""Settings of the IRT DIF stage (all documented defaults)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class DifSettings:
    """Settings of the IRT DIF stage (all documented defaults)."""

    fdr_level: float = 0.05  # false discovery rate across items x focal groups
    effect_moderate: float = 0.20
    effect_large: float = 0.40
    anchor_fraction: float = 0.20
    min_anchors: int = 4
    anchors: tuple[str, ...] = ()  # user-named anchors (item ids); empty: select automatically
    sub_tolerance: float = 1e-3  # EM tolerance of a one-item fit where Newton cannot go on (rare)
