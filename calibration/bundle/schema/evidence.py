"""The evidence a reviewer reads: quality by group, DIF rows (observed and IRT), the invariance ladder."""

from __future__ import annotations

from pydantic import Field

from calibration.bundle.schema.common import Frozen
from calibration.vocabulary import (
    DifAction,
    DifStage,
    EffectLevel,
    InvarianceModel,
    ObservedMethod,
)


class InformationTable(Frozen):
    """Test information and conditional SE on a theta grid."""

    theta: list[float]
    information: list[float]
    se: list[float]


class SummedScoreRow(Frozen):
    """One summed score's EAP theta, posterior SD and model probability."""

    summed_score: int
    theta: float
    se: float
    probability: float


class ItemQuality(Frozen):
    """Item statistics within one group."""

    item_rest_correlation: float | None = None
    alpha_if_deleted: float | None = None
    s_x2: float | None = Field(None, description="Orlando-Thissen S-X2 item fit statistic")
    s_x2_df: int | None = None
    s_x2_p: float | None = None
    rmsd: float | None = Field(None, description="Root mean squared difference between observed and model curves")


class Dimensionality(Frozen):
    """Dimensionality summaries of one group (null where there were too few complete rows)."""

    eigenvalue_ratio: float | None = Field(None, description="First to second eigenvalue of the item correlations")
    residual_pca_first_eigenvalue: float | None = Field(
        None, description="Largest eigenvalue of the principal components of the standardized residuals"
    )
    n_complete: int = 0


class ModalRange(Frozen):
    """Where a category is the most probable answer; null ends run off the theta grid (-6 or 6)."""

    low: float | None
    high: float | None


class CategoryFunctioning(Frozen):
    """How one polytomous item's categories work in one group (see calibration.quality.categories)."""

    counts: list[int] = Field(description="answers per category")
    mean_theta: list[float | None] = Field(description="mean EAP of the respondents who answered each category")
    modal: list[ModalRange | None] = Field(description="theta range where each category is most probable; null: never")
    steps_ordered: bool = Field(description="thresholds (graded) or steps (partial credit) in increasing order")
    flags: list[str] = Field(default_factory=list, description="categories to review, with a merge to consider")


class GroupQuality(Frozen):
    """Quality of one group's scores: reliability, summed-score table, item statistics, dimensionality."""

    n_respondents: int
    alpha: float | None
    alpha_if_deleted: dict[str, float | None]
    marginal_reliability: float | None
    summed_score_table: list[SummedScoreRow]
    items: dict[str, ItemQuality] = Field(default_factory=dict)
    dimensionality: Dimensionality | None = None
    categories: dict[str, CategoryFunctioning] = Field(
        default_factory=dict, description="category functioning of every polytomous item (schema 4)"
    )
    alpha_interval: list[float] | None = Field(
        None, min_length=2, max_length=2, description="Feldt's 95% interval for alpha (schema 4)"
    )
    omega: float | None = Field(None, description="McDonald's omega from a one-factor ML model (schema 4)")


class AlphaComparisonRow(Frozen):
    """Feldt's test that a group's alpha equals the reference group's (W = (1 - alpha) / (1 - alpha_ref))."""

    group: str
    reference: str
    w: float
    df: list[int] = Field(min_length=2, max_length=2)
    p_value: float
    p_holm: float = Field(description="Holm-adjusted over the focal groups")


class Quality(Frozen):
    """Quality by group, the test information curve and every warning of the calibration."""

    by_group: dict[str, GroupQuality]
    test_information: InformationTable
    warnings: list[str] = Field(default_factory=list)
    alpha_comparison: list[AlphaComparisonRow] = Field(
        default_factory=list, description="equal alpha in every focal group and the reference group (schema 4)"
    )


class ObservedDifRow(Frozen):
    """Observed-score screening of one item for one focal group (against the reference group)."""

    item: str
    group: str
    method: ObservedMethod
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


class IrtDifRow(Frozen):
    """Anchored likelihood-ratio test of one item for one focal group."""

    item: str
    group: str
    stage: DifStage
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
    level: EffectLevel
    flagged: bool
    reference_slope: float | None = Field(None, description="the item's reference parameters in the freed model")
    reference_intercepts: list[float] | None = None
    focal_slope: float | None = Field(None, description="the group's own parameters in the freed model")
    focal_intercepts: list[float] | None = None
    reference_guessing: float | None = Field(None, description="a 3PL item's reference asymptote in the freed model")
    focal_guessing: float | None = Field(None, description="a 3PL item's focal asymptote in the freed model")


class DifSettingsRecord(Frozen):
    """The DIF settings a calibration used."""

    fdr_alpha: float
    effect_moderate: float
    effect_large: float
    action: DifAction
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


class DifReport(Frozen):
    """The DIF section: settings, observed-score rows and IRT rows (multiple-group calibrations only)."""

    settings: DifSettingsRecord
    effect_levels: str = Field(EFFECT_LEVEL_RULE, description="How effect levels are assigned")
    observed: list[ObservedDifRow]
    irt: list[IrtDifRow]
    caution: str = Field(
        "A DIF flag is statistical evidence, not a verdict: content experts must review an item before it is "
        "removed or treated differently for a group."
    )


class LadderRow(Frozen):
    """One model of the invariance ladder with its comparison."""

    model: InvarianceModel
    description: str
    log_likelihood: float
    n_parameters: int
    aic: float
    bic: float
    compared_with: str | None = None
    lr_statistic: float | None = None
    df: int | None = None
    p_value: float | None = None
