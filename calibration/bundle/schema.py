"""The calibration bundle: the contract between calibration, the stores and the service.

A bundle is one JSON document. Its identity is (name, version); its content is
fixed by a SHA-256 over its canonical bytes (see :mod:`calibration.bundle.canonical`).
Missing statistics are ``null`` (JSON has no NaN).
"""

from __future__ import annotations

import copy
import re
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

SCHEMA_VERSION = "2"
# Schema versions this code reads. A version-1 document is verified against its stored bytes, then
# upgraded in memory (see :func:`upgrade_document`); it keeps ``schema_version`` "1" so that a reader
# knows its hash was taken over the version-1 form.
READABLE_SCHEMA_VERSIONS = ("1", "2")
NAME_PATTERN = r"^[a-z0-9][a-z0-9._-]{0,63}$"
ALIAS_PATTERN = r"^[a-z][a-z0-9_-]{0,31}$"

PolicyStatus = Literal["invariant", "group_specific", "excluded"]

# Sanity bounds on published parameters (equitheta's own, generous for any real bank): a slope of 20
# makes an item a step function, an intercept of 200 puts a threshold 10 SD out at that slope, and
# latent means and SDs of 10 are far outside any grid. A document beyond them is refused on publish.
MAX_ABS_SLOPE = 20.0
MAX_ABS_INTERCEPT = 200.0
MAX_ABS_LATENT_MEAN = 10.0
MAX_LATENT_SD = 10.0
MAX_QUADRATURE_POINTS = 1001
# A stated threshold must equal -intercept / slope to this relative precision.
THRESHOLD_TOLERANCE = 1e-6


class _Frozen(BaseModel):
    # No NaN or infinity anywhere: JSON has neither, and 1e999 would otherwise read as infinity.
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


def _check_item_parameters(where: str, slope: float, intercepts: list[float]) -> None:
    """Range and order checks shared by the shared parameters and group-specific ones."""
    if abs(slope) > MAX_ABS_SLOPE:
        raise ValueError(f"{where}: slope {slope:g} is outside -{MAX_ABS_SLOPE:g}..{MAX_ABS_SLOPE:g}")
    for m, c in enumerate(intercepts):
        if abs(c) > MAX_ABS_INTERCEPT:
            raise ValueError(
                f"{where}: intercept {m + 1} = {c:g} is outside -{MAX_ABS_INTERCEPT:g}..{MAX_ABS_INTERCEPT:g}"
            )
    if any(later >= earlier for earlier, later in zip(intercepts, intercepts[1:], strict=False)):
        raise ValueError(f"{where}: intercepts must be strictly decreasing")


class Provenance(_Frozen):
    data_sha256: str = Field(description="SHA-256 of the calibration data file's bytes")
    data_source: str = Field(description="File name of the calibration data (no directory)")
    n_respondents: int = Field(ge=0)
    n_respondents_by_group: dict[str, int]
    settings: dict[str, str | int | float | bool | None] = Field(
        description="Settings used for the calibration, as given on the command line or API"
    )
    notes: list[str] = Field(default_factory=list, description="Handling decisions made while reading the data")


class GroupMetric(_Frozen):
    name: str
    n_respondents: int = Field(ge=0)
    latent_mean: float = Field(ge=-MAX_ABS_LATENT_MEAN, le=MAX_ABS_LATENT_MEAN)
    latent_sd: float = Field(gt=0, le=MAX_LATENT_SD)
    latent_mean_se: float | None = Field(None, ge=0)
    latent_sd_se: float | None = Field(None, ge=0)


class Metric(_Frozen):
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


class PolicyEvidence(_Frozen):
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


class GroupPolicy(_Frozen):
    status: PolicyStatus
    reason: str
    evidence: PolicyEvidence = Field(default_factory=PolicyEvidence)
    slope: float | None = Field(None, description="Group-specific slope when status is group_specific")
    intercepts: list[float] | None = Field(None, description="Group-specific intercepts when group_specific")

    @model_validator(mode="after")
    def _specific_parameters(self) -> GroupPolicy:
        if self.status != "group_specific" and (self.slope is not None or self.intercepts is not None):
            raise ValueError(f"a {self.status} cell carries no group-specific parameters")
        if self.status == "group_specific":
            if self.slope is None or not self.intercepts:
                raise ValueError("a group_specific cell needs its slope and intercepts")
            _check_item_parameters("group-specific parameters", self.slope, self.intercepts)
        return self


class ItemEntry(_Frozen):
    id: str = Field(min_length=1)
    model: Literal["2pl", "1pl", "grm"]
    n_categories: int = Field(ge=2)
    slope: float
    intercepts: list[float] = Field(description="c_1 > c_2 > ... (slope-intercept form)")
    thresholds: list[float] = Field(description="b_k = -c_k / slope (slope-threshold form, derived)")
    slope_se: float | None = None
    intercept_se: list[float | None]
    threshold_se: list[float | None]
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
        _check_item_parameters(f"item {self.id!r}", self.slope, self.intercepts)
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
        if self.model in ("2pl", "1pl") and self.n_categories != 2:
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


class ExcludedItem(_Frozen):
    id: str
    reason: str


class AnchorCandidate(_Frozen):
    """One item's place in the anchor ranking (smallest statistic first)."""

    item: str
    rank: int = Field(ge=1)
    statistic: float | None = Field(
        description="Largest over focal groups of (G2 - df) / sqrt(2 df) from the screening; null: never tested"
    )
    worst_group: str
    p_adjusted: float | None = Field(None, description="Smallest FDR-adjusted screening p value over focal groups")
    selected: bool


class Anchors(_Frozen):
    items: list[str] = Field(default_factory=list)
    method: str = Field(description="How the anchor items were chosen")
    ranking: list[AnchorCandidate] = Field(
        default_factory=list, description="Every screened item in rank order, so the choice can be rebuilt"
    )


class QuadratureSettings(_Frozen):
    n_points: int = Field(ge=5, le=MAX_QUADRATURE_POINTS)
    lower: float = Field(ge=-50)
    upper: float = Field(le=50)

    @model_validator(mode="after")
    def _ordered(self) -> QuadratureSettings:
        if not self.lower < self.upper:
            raise ValueError(f"quadrature lower bound {self.lower:g} must be below the upper bound {self.upper:g}")
        return self


class ReportingScaleSettings(_Frozen):
    location: float = Field(500.0, ge=-1e9, le=1e9)
    scale: float = Field(100.0, gt=0, le=1e9)
    decimals: int = Field(0, ge=0, le=6)
    minimum: float | None = Field(100.0, ge=-1e12, le=1e12)
    maximum: float | None = Field(900.0, ge=-1e12, le=1e12)

    @model_validator(mode="after")
    def _bounds_ordered(self) -> ReportingScaleSettings:
        if self.minimum is not None and self.maximum is not None and not self.minimum < self.maximum:
            raise ValueError(f"reporting scale minimum {self.minimum:g} must be below its maximum {self.maximum:g}")
        return self


class ScoringSettings(_Frozen):
    method: Literal["eap", "map", "ml"] = "eap"
    quadrature: QuadratureSettings
    prior_mean: float = Field(0.0, ge=-MAX_ABS_LATENT_MEAN, le=MAX_ABS_LATENT_MEAN)
    prior_sd: float = Field(1.0, gt=0, le=MAX_LATENT_SD)
    ml_bound: float = Field(4.0, gt=0, le=50)
    min_items_answered: int = Field(1, ge=1)
    reporting_scale: ReportingScaleSettings


class FitSummary(_Frozen):
    log_likelihood: float
    n_parameters: int
    n_persons: int
    aic: float
    bic: float
    converged: bool
    n_iter: int
    estimation: str = Field(description="Estimator, quadrature and SE method, in words")


class InformationTable(_Frozen):
    theta: list[float]
    information: list[float]
    se: list[float]


class SummedScoreRow(_Frozen):
    summed_score: int
    theta: float
    se: float
    probability: float


class ItemQuality(_Frozen):
    """Item statistics within one group."""

    item_rest_correlation: float | None = None
    alpha_if_deleted: float | None = None
    s_x2: float | None = Field(None, description="Orlando-Thissen S-X2 item fit statistic")
    s_x2_df: int | None = None
    s_x2_p: float | None = None
    rmsd: float | None = Field(None, description="Root mean squared difference between observed and model curves")


class Dimensionality(_Frozen):
    eigenvalue_ratio: float | None = Field(None, description="First to second eigenvalue of the item correlations")
    residual_pca_first_eigenvalue: float | None = Field(
        None, description="Largest eigenvalue of the principal components of the standardized residuals"
    )
    n_complete: int = 0


class GroupQuality(_Frozen):
    n_respondents: int
    alpha: float | None
    alpha_if_deleted: dict[str, float | None]
    marginal_reliability: float | None
    summed_score_table: list[SummedScoreRow]
    items: dict[str, ItemQuality] = Field(default_factory=dict)
    dimensionality: Dimensionality | None = None


class Quality(_Frozen):
    by_group: dict[str, GroupQuality]
    test_information: InformationTable
    warnings: list[str] = Field(default_factory=list)


class ObservedDifRow(_Frozen):
    """Observed-score screening of one item for one focal group (against the reference group)."""

    item: str
    group: str
    method: Literal["mantel-haenszel", "mantel"]
    chi_square: float
    p_value: float
    mh_odds_ratio: float | None = None
    mh_d_dif: float | None = None
    mh_d_dif_se: float | None = None
    smd: float | None = None
    smd_over_sd: float | None = None
    dif_class: str = Field(description="A/B/C (+/-) for right/wrong items, AA/BB/CC for graded items")
    logistic_chi_square: float | None = None
    logistic_p_value: float | None = None
    logistic_delta_r2: float | None = None
    logistic_level: str | None = None
    n_reference: int
    n_focal: int


class IrtDifRow(_Frozen):
    """Anchored likelihood-ratio test of one item for one focal group."""

    item: str
    group: str
    stage: Literal["screening", "test"]
    g2_omnibus: float
    df_omnibus: int
    p_value: float
    p_adjusted: float | None
    g2_nonuniform: float | None
    p_nonuniform: float | None
    g2_uniform: float | None
    p_uniform: float | None
    effect_theta: float | None = Field(description="Focal-density weighted curve difference in theta units")
    effect_signed: float | None = Field(description="Signed version; negative: harder for the focal group")
    effect_theta_se: float | None = Field(None, description="Delta-method SE of effect_theta")
    level: Literal["negligible", "moderate", "large", "uncertain"]
    flagged: bool


class DifSettingsRecord(_Frozen):
    fdr_alpha: float
    effect_moderate: float
    effect_large: float
    action: Literal["exclude", "free"]
    mh_greater_than_one_z: float
    anchor_fraction: float
    min_anchors: int


EFFECT_LEVEL_RULE = (
    "The effect size is in theta units with a delta-method SE. Its level is negligible, moderate or large "
    "only when the whole 95% interval lies in that band (cut-offs effect_moderate and effect_large); "
    "otherwise it is uncertain. In small groups noise inflates an unsigned effect, so a point estimate "
    "alone would overstate it. A cell is flagged only when it is significant after FDR control and its "
    "point estimate reaches effect_moderate."
)


class DifReport(_Frozen):
    settings: DifSettingsRecord
    effect_levels: str = Field(EFFECT_LEVEL_RULE, description="How effect levels are assigned")
    observed: list[ObservedDifRow]
    irt: list[IrtDifRow]
    caution: str = Field(
        "A DIF flag is statistical evidence, not a verdict: content experts must review an item before it is "
        "removed or treated differently for a group."
    )


class LadderRow(_Frozen):
    """One model of the invariance ladder with its comparison."""

    model: Literal["configural", "metric", "scalar", "partial"]
    description: str
    log_likelihood: float
    n_parameters: int
    aic: float
    bic: float
    compared_with: str | None = None
    lr_statistic: float | None = None
    df: int | None = None
    p_value: float | None = None


class Bundle(_Frozen):
    """A calibration bundle. ``version`` 0 and empty ``hash`` mean "not yet published"."""

    schema_version: Literal["1", "2"] = SCHEMA_VERSION
    name: str = Field(pattern=NAME_PATTERN)
    version: int = Field(ge=0)
    created_at: str = Field(description="UTC time of the calibration, ISO 8601")
    software_version: str
    hash: str = Field("", description="SHA-256 of the canonical JSON without this field")
    provenance: Provenance
    metric: Metric
    items: list[ItemEntry]
    excluded_items: list[ExcludedItem] = Field(default_factory=list)
    anchors: Anchors
    scoring: ScoringSettings
    fit: FitSummary
    quality: Quality
    dif: DifReport | None = None
    invariance: list[LadderRow] = Field(default_factory=list)

    @field_validator("items")
    @classmethod
    def _unique_items(cls, items: list[ItemEntry]) -> list[ItemEntry]:
        ids = [i.id for i in items]
        dup = sorted({i for i in ids if ids.count(i) > 1})
        if dup:
            raise ValueError(f"item ids must be unique; repeated: {', '.join(dup)}")
        if not items:
            raise ValueError("a bundle needs at least one item")
        return items

    @model_validator(mode="after")
    def _policies_cover_groups(self) -> Bundle:
        groups = {g.name for g in self.metric.groups}
        for item in self.items:
            if set(item.policy) != groups:
                raise ValueError(f"item {item.id!r}: policy must name every group {sorted(groups)}")
            ref = item.policy[self.metric.reference_group]
            if ref.status == "excluded":
                raise ValueError(f"item {item.id!r}: the reference group keeps every item")
        ids = {item.id for item in self.items}
        unknown = [a for a in self.anchors.items if a not in ids]
        if unknown:
            raise ValueError(f"anchors name items that are not in the bundle: {', '.join(unknown)}")
        grid = self.scoring.quadrature
        for g in self.metric.groups:
            if not grid.lower <= g.latent_mean <= grid.upper:
                raise ValueError(f"group {g.name!r}: latent mean {g.latent_mean:g} lies outside the scoring grid")
        return self

    @property
    def label(self) -> str:
        return f"{self.name}@{self.version}"


def upgrade_document(document: dict[str, Any]) -> dict[str, Any]:
    """A schema-1 document in the schema-2 shape (renamed fields only; the statistics are unchanged).

    Version 2 renamed ``category`` (an MH/Mantel class in the observed DIF rows, an effect
    level in the policy evidence) to ``dif_class`` and ``effect_level``, and the residual
    PCA's ``residual_first_contrast`` to ``residual_pca_first_eigenvalue``.
    """
    if document.get("schema_version") != "1":
        return document
    doc = copy.deepcopy(document)

    def rename(record: dict[str, Any] | None, old: str, new: str) -> None:
        if isinstance(record, dict) and old in record:
            record[new] = record.pop(old)

    for item in doc.get("items") or []:
        for policy in (item.get("policy") or {}).values():
            rename(policy.get("evidence"), "category", "effect_level")
    for row in (doc.get("dif") or {}).get("observed") or []:
        rename(row, "category", "dif_class")
    for quality in ((doc.get("quality") or {}).get("by_group") or {}).values():
        rename(quality.get("dimensionality"), "residual_first_contrast", "residual_pca_first_eigenvalue")
    return doc


def valid_name(name: str) -> bool:
    return re.fullmatch(NAME_PATTERN, name) is not None


def valid_alias(alias: str) -> bool:
    return re.fullmatch(ALIAS_PATTERN, alias) is not None
