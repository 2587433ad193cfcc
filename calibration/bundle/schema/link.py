"""The link section: how a calibration was put on an earlier bundle's scale, and the evidence for its link items."""

from __future__ import annotations

from pydantic import Field

from calibration.bundle.schema.common import Frozen
from calibration.vocabulary import EffectLevel, LinkMethod

LINK_CAUTION = (
    "A link makes this version's scores comparable with the parent's only as far as the link items measure the "
    "same thing in both cycles. Items flagged for drift are kept out of the link: content experts should review "
    "why they changed (exposure, a revised text, a changed curriculum) before the versions are compared."
)


class LinkConstants(Frozen):
    """``theta_parent = slope * theta_new + intercept``: this cycle's reference population on the parent's scale."""

    slope: float = Field(gt=0, description="A: the new reference population's SD on the parent's scale")
    intercept: float = Field(description="B: the new reference population's mean on the parent's scale")
    slope_se: float | None = Field(None, ge=0)
    intercept_se: float | None = Field(None, ge=0)


class DriftRow(Frozen):
    """The drift test of one common item: this cycle's own parameters against the published ones."""

    item: str
    wald: float | None = Field(description="Wald statistic of the change, with both cycles' sampling error")
    df: int
    p_value: float = Field(description="of the Wald test (the LR test's when the information was singular)")
    p_adjusted: float | None = Field(description="Benjamini-Hochberg across the common items")
    g2: float = Field(description="LR G2 of the same change, taking the published values as exact")
    g2_p_value: float
    g2_nonuniform: float | None = None
    g2_uniform: float | None = None
    effect_theta: float | None = Field(description="gap between the published and this cycle's curves, theta units")
    effect_signed: float | None = Field(description="signed: negative means harder in this cycle")
    effect_theta_se: float | None = Field(None, description="delta method, both cycles' sampling error")
    level: EffectLevel
    drifted: bool = Field(description="significant after FDR control with at least a moderate effect")
    parent_slope: float
    parent_intercepts: list[float]
    slope: float = Field(description="this cycle's own slope on the parent's scale (the freed model)")
    intercepts: list[float]


class NotLinkedItem(Frozen):
    """A parent item that could not serve the link, and why."""

    item: str
    reason: str


class Link(Frozen):
    """How this version was put on the parent's scale: method, link items, drift evidence, constants."""

    parent: str = Field(description="name@version of the bundle whose scale this version uses")
    parent_hash: str
    method: LinkMethod
    link_items: list[str] = Field(description="common items that anchor the link")
    drifted_items: list[str] = Field(description="common items kept out of the link because they drifted")
    new_items: list[str] = Field(description="items calibrated onto the parent's scale for the first time")
    not_linked: list[NotLinkedItem] = Field(
        default_factory=list, description="items in both cycles that could not be compared (categories differ)"
    )
    constants: LinkConstants
    drift: list[DriftRow]
    rounds: int = Field(ge=1, description="purification rounds until the link set stopped changing")
    rule: str = Field(description="the drift test and the rule that keeps an item out of the link, in words")
    caution: str = LINK_CAUTION
