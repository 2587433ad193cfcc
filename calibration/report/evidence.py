"""The evidence behind each policy cell, in one place for the terminal summary, the review file and the report.

A cell (item x focal group) is "for review" when its status is not invariant or when any method flags it:
the anchored IRT test, the observed-score class (MH or Mantel B/C) or the logistic-regression level
(moderate/large). The text helpers say each method's finding in the same words everywhere.
"""

from __future__ import annotations

from dataclasses import dataclass

from calibration.bundle.schema import Bundle, GroupPolicy, IrtDifRow, ObservedDifRow
from calibration.dif.effect_size import effect_interval

OBSERVED_CONCERN_CLASSES = ("B", "C")
"""Observed-score classes that count as "this method sees DIF"."""
LOGISTIC_CONCERN_LEVELS = ("moderate", "large")
"""Logistic-regression levels that count as "this method sees DIF"."""
REVIEWER_PREFIX = "reviewer override: "
"""How the reason of a cell a reviewer decided begins (the rest is the reviewer's note)."""


def _number(value: float | None, spec: str) -> str:
    return "-" if value is None else format(value, spec)


def observed_text(row: ObservedDifRow | None) -> str:
    """The observed-score statistic and its class."""
    if row is None:
        return "-"
    if row.method == "mantel-haenszel":
        return f"MH D-DIF {_number(row.mh_d_dif, '.2f')} ({row.dif_class})"
    return f"Mantel SMD/SD {_number(row.smd_over_sd, '.2f')} ({row.dif_class})"


def logistic_text(row: ObservedDifRow | None) -> str:
    """The logistic-regression delta R-squared and its level."""
    if row is None or row.logistic_delta_r2 is None:
        return "-"
    return f"{row.logistic_delta_r2:.3f} ({row.logistic_level or '-'})"


def irt_text(row: IrtDifRow | None) -> tuple[str, str, str]:
    """The anchored LR test: G2 (df), its FDR-adjusted p, and the effect with its 95% interval and level."""
    if row is None:
        return "-", "-", "-"
    effect = _number(row.effect_theta, ".2f")
    if row.effect_theta is not None and row.effect_theta_se is not None:
        low, high = effect_interval(row.effect_theta, row.effect_theta_se)
        effect += f" [{low:.2f}, {high:.2f}]"
    return f"{row.g2_omnibus:.1f} ({row.df_omnibus})", _number(row.p_adjusted, ".3g"), f"{effect} {row.level}"


def agreement(irt: IrtDifRow | None, observed: ObservedDifRow | None) -> str:
    """Whether the IRT test and the observed-score methods point the same way, in words."""
    irt_flag = irt is not None and irt.flagged
    observed_flag = observed is not None and (
        observed.dif_class[:1] in OBSERVED_CONCERN_CLASSES or observed.logistic_level in LOGISTIC_CONCERN_LEVELS
    )
    if irt_flag and observed_flag:
        return "agree: DIF"
    if irt_flag:
        return "disagree: IRT flags it, the observed-score methods call it negligible"
    if observed_flag:
        return "disagree: observed-score methods see DIF, the IRT test does not flag it"
    return "agree: no DIF"


@dataclass(frozen=True)
class CellEvidence:
    """One item in one focal group: its policy and every method's row."""

    item: str
    group: str
    policy: GroupPolicy
    irt: IrtDifRow | None
    observed: ObservedDifRow | None

    @property
    def verdict(self) -> str:
        """Whether the methods agree (see :func:`agreement`)."""
        return agreement(self.irt, self.observed)

    @property
    def reviewed(self) -> bool:
        """Whether a reviewer's decision set this cell."""
        return self.policy.reason.startswith(REVIEWER_PREFIX)

    @property
    def reviewer_note(self) -> str | None:
        """The reviewer's note, when a reviewer decided the cell."""
        return self.policy.reason.removeprefix(REVIEWER_PREFIX) if self.reviewed else None


def cells_for_review(bundle: Bundle) -> list[CellEvidence]:
    """Every focal-group cell that is not invariant or that any method flags, items in bundle order."""
    if bundle.dif is None:
        return []
    irt = {(r.item, r.group): r for r in bundle.dif.irt if r.stage == "test"}
    observed = {(r.item, r.group): r for r in bundle.dif.observed}
    out = []
    for item in bundle.items:
        for group, policy in item.policy.items():
            if group == bundle.metric.reference_group:
                continue
            cell = CellEvidence(item.id, group, policy, irt.get((item.id, group)), observed.get((item.id, group)))
            if policy.status != "invariant" or cell.verdict != "agree: no DIF" or cell.reviewed:
                out.append(cell)
    return out
