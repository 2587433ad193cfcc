"""The scale and the items: group metrics, item entries with their policy per group, anchors."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator

from calibration.bundle.schema.common import (
    MAX_ABS_LATENT_MEAN,
    MAX_LATENT_SD,
    THRESHOLD_TOLERANCE,
    Frozen,
    check_item_parameters,
)
from calibration.vocabulary import (
    ItemModel,
    PolicyStatus,
)


class GroupMetric(Frozen):
    """One group's place on the scale: size and latent mean and SD with their SEs."""

    name: str
    n_respondents: int = Field(ge=0)
    latent_mean: float = Field(ge=-MAX_ABS_LATENT_MEAN, le=MAX_ABS_LATENT_MEAN)
    latent_sd: float = Field(gt=0, le=MAX_LATENT_SD)
    latent_mean_se: float | None = Field(None, ge=0)
    latent_sd_se: float | None = Field(None, ge=0)


class Metric(Frozen):
    """The scale: the reference group (N(0, 1)) and every group's latent density."""

    parameterisation: Literal["slope-intercept"] = "slope-intercept"
    logistic_scale: float = Field(1.0, description="D in logistic(D * (a * theta + c)); always 1 here")
    reference_group: str
    groups: list[GroupMetric]

    @model_validator(mode="after")
    def _reference_present(self) -> Metric:
        names = [g.name for g in self.groups]
        if self.reference_group not in names:
            raise ValueError(f"reference group {self.reference_group!r} is not among the groups {names}")
        if len(set(names)) != len(names):
            raise ValueError("group names must be unique")
        return self


class PolicyEvidence(Frozen):
    """The statistics behind a policy decision (empty for a single-group calibration)."""

    statistic: str | None = None
    value: float | None = None
    p_value: float | None = None
    p_adjusted: float | None = None
    effect_size: float | None = None
    effect_size_se: float | None = Field(None, description="Delta-method SE of the effect size (theta units)")
    effect_level: str | None = Field(
        None,
        description="negligible / moderate / large when the effect's 95% interval lies in one band, else "
        "uncertain (see DifReport.effect_levels)",
    )
    note: str = ""


class GroupPolicy(Frozen):
    """One item's policy in one group, the reason and the evidence; group-specific parameters when freed."""

    status: PolicyStatus
    reason: str
    evidence: PolicyEvidence = Field(default_factory=PolicyEvidence)
    proposed_status: PolicyStatus | None = Field(
        None, description="the status the evidence proposed, when a reviewer's decision replaced it (reason: the note)"
    )
    slope: float | None = Field(None, description="Group-specific slope when status is group_specific")
    intercepts: list[float] | None = Field(None, description="Group-specific intercepts when group_specific")
    guessing: float | None = Field(None, description="Group-specific lower asymptote of a group_specific 3PL item")

    @model_validator(mode="after")
    def _specific_parameters(self) -> GroupPolicy:
        own = (self.slope, self.intercepts, self.guessing)
        if self.status != "group_specific" and any(v is not None for v in own):
            raise ValueError(f"a {self.status} cell carries no group-specific parameters")
        if self.status == "group_specific":
            if self.slope is None or not self.intercepts:
                raise ValueError("a group_specific cell needs its slope and intercepts")
            # The order of the intercepts is checked by the item, which knows its model.
            check_item_parameters("group-specific parameters", self.slope, self.intercepts, ordered=False)
        return self


class ItemEntry(Frozen):
    """One calibrated item: model, reference parameters with SEs, classical statistics, policy per group."""

    id: str = Field(min_length=1)
    model: ItemModel
    n_categories: int = Field(ge=2)
    slope: float
    intercepts: list[float] = Field(
        description="c_1 > c_2 > ... (slope-intercept form); a partial-credit item's step intercepts, in any order"
    )
    thresholds: list[float] = Field(description="b_k = -c_k / slope (slope-threshold form, derived)")
    slope_se: float | None = None
    intercept_se: list[float | None]
    threshold_se: list[float | None]
    guessing: float | None = Field(None, description="A 3PL item's lower asymptote g (absent for other models)")
    guessing_se: float | None = Field(None, ge=0, description="SE of g (delta method from logit(g)); null when held")
    category_map: list[int] | None = Field(
        None, description="Answer code -> model category when sparse categories were merged (index = answer code)"
    )
    n_responses: int = Field(ge=0)
    mean_score: float | None = None
    item_rest_correlation: float | None = None
    policy: dict[str, GroupPolicy] = Field(description="Policy for this item in each group")

    @model_validator(mode="after")
    def _shapes(self) -> ItemEntry:
        k = self.n_categories - 1
        if not (len(self.intercepts) == len(self.thresholds) == len(self.intercept_se) == len(self.threshold_se) == k):
            raise ValueError(f"item {self.id!r}: {self.n_categories} categories need {k} intercepts and thresholds")
        ordered = self.model not in ("gpcm", "pcm")
        check_item_parameters(f"item {self.id!r}", self.slope, self.intercepts, ordered=ordered, guessing=self.guessing)
        if (self.guessing is not None) != (self.model == "3pl"):
            raise ValueError(f"item {self.id!r}: a lower asymptote belongs to a 3pl item, and a 3pl item needs one")
        if self.slope != 0:
            for m, (c, b) in enumerate(zip(self.intercepts, self.thresholds, strict=True)):
                if abs(b + c / self.slope) > THRESHOLD_TOLERANCE * max(1.0, abs(b)):
                    raise ValueError(
                        f"item {self.id!r}: threshold {m + 1} = {b:g} is not -intercept / slope = {-c / self.slope:g}"
                    )
        errors = [self.slope_se, *self.intercept_se, *self.threshold_se]
        if any(se is not None and se < 0 for se in errors):
            raise ValueError(f"item {self.id!r}: a standard error is negative")
        for group, policy in self.policy.items():
            if policy.intercepts is not None and len(policy.intercepts) != k:
                raise ValueError(f"item {self.id!r}, group {group!r}: {k} group-specific intercepts needed")
            if policy.status == "group_specific" and policy.slope is not None and policy.intercepts:
                where = f"item {self.id!r}, group {group!r}"
                check_item_parameters(where, policy.slope, policy.intercepts, ordered=ordered, guessing=policy.guessing)
                if (policy.guessing is not None) != (self.model == "3pl"):
                    raise ValueError(f"{where}: group-specific parameters of a 3pl item need their lower asymptote")
        if self.model in ("2pl", "1pl", "3pl") and self.n_categories != 2:
            raise ValueError(f"item {self.id!r}: model {self.model} has exactly 2 categories")
        if self.category_map is not None and (
            sorted(set(self.category_map)) != list(range(self.n_categories))
            or any(b < a for a, b in zip(self.category_map, self.category_map[1:], strict=False))
        ):
            raise ValueError(
                f"item {self.id!r}: category_map must map answer codes onto 0..{self.n_categories - 1} in order"
            )
        return self

    @property
    def answer_categories(self) -> int:
        """Number of answer codes a respondent may give (before any merging)."""
        return self.n_categories if self.category_map is None else len(self.category_map)


class ExcludedItem(Frozen):
    """An item left out of the calibration, and why."""

    id: str
    reason: str


class AnchorCandidate(Frozen):
    """One item's place in the anchor ranking (smallest statistic first)."""

    item: str
    rank: int = Field(ge=1)
    statistic: float | None = Field(
        description="Largest over focal groups of (G2 - df) / sqrt(2 df) from the screening; null: never tested"
    )
    worst_group: str
    p_adjusted: float | None = Field(None, description="Smallest FDR-adjusted screening p value over focal groups")
    selected: bool


class Anchors(Frozen):
    """The anchor items, how they were chosen, and the ranking they were chosen from."""

    items: list[str] = Field(default_factory=list)
    method: str = Field(description="How the anchor items were chosen")
    ranking: list[AnchorCandidate] = Field(
        default_factory=list, description="Every screened item in rank order, so the choice can be rebuilt"
    )
