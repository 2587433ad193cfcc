"""The bundle document: provenance, scoring settings, fit summary, and the reader of older schema versions."""

from __future__ import annotations

import copy
from typing import Any, Literal

from pydantic import Field, field_validator, model_validator

from calibration.bundle.schema.common import (
    MAX_ABS_LATENT_MEAN,
    MAX_LATENT_SD,
    MAX_QUADRATURE_POINTS,
    MODELS_SINCE_VERSION_4,
    NAME_PATTERN,
    SCHEMA_VERSION,
    Frozen,
)
from calibration.bundle.schema.evidence import (
    DifReport,
    LadderRow,
    Quality,
)
from calibration.bundle.schema.items import (
    Anchors,
    ExcludedItem,
    ItemEntry,
    Metric,
)
from calibration.bundle.schema.link import Link
from calibration.irt.reporting_scale import ReportingScale
from calibration.vocabulary import (
    ScoringMethod,
)


class Provenance(Frozen):
    """Where the calibration came from: the data's hash and source, sizes, settings and notes."""

    data_sha256: str = Field(description="SHA-256 of the calibration data file's bytes")
    data_source: str = Field(description="File name of the calibration data (no directory)")
    n_respondents: int = Field(ge=0)
    n_respondents_by_group: dict[str, int]
    settings: dict[str, str | int | float | bool | None] = Field(
        description="Settings used for the calibration, as given on the command line or API"
    )
    notes: list[str] = Field(default_factory=list, description="Handling decisions made while reading the data")


class QuadratureSettings(Frozen):
    """A rectangular quadrature grid: number of points and range."""

    n_points: int = Field(ge=5, le=MAX_QUADRATURE_POINTS)
    lower: float = Field(ge=-50)
    upper: float = Field(le=50)

    @model_validator(mode="after")
    def _ordered(self) -> QuadratureSettings:
        if not self.lower < self.upper:
            raise ValueError(f"quadrature lower bound {self.lower:g} must be below the upper bound {self.upper:g}")
        return self


class ReportingScaleSettings(Frozen):
    """The linear reporting scale scores are shown on: location, scale, rounding, bounds."""

    # The defaults are the reporting scale's own (one place: calibration.irt.reporting_scale).
    location: float = Field(ReportingScale.location, ge=-1e9, le=1e9)
    scale: float = Field(ReportingScale.scale, gt=0, le=1e9)
    decimals: int = Field(ReportingScale.decimals, ge=0, le=6)
    minimum: float | None = Field(ReportingScale.minimum, ge=-1e12, le=1e12)
    maximum: float | None = Field(ReportingScale.maximum, ge=-1e12, le=1e12)

    @model_validator(mode="after")
    def _bounds_ordered(self) -> ReportingScaleSettings:
        if self.minimum is not None and self.maximum is not None and not self.minimum < self.maximum:
            raise ValueError(f"reporting scale minimum {self.minimum:g} must be below its maximum {self.maximum:g}")
        return self

    def to_scale(self) -> ReportingScale:
        """The reporting scale these settings describe (the arithmetic lives there)."""
        return ReportingScale(self.location, self.scale, self.decimals, self.minimum, self.maximum)


class ScoringSettings(Frozen):
    """How the service scores with this bundle: method, prior, grid, minimum answers, reporting scale."""

    method: ScoringMethod = "eap"
    quadrature: QuadratureSettings
    prior_mean: float = Field(0.0, ge=-MAX_ABS_LATENT_MEAN, le=MAX_ABS_LATENT_MEAN)
    prior_sd: float = Field(1.0, gt=0, le=MAX_LATENT_SD)
    ml_bound: float = Field(4.0, gt=0, le=50)
    min_items_answered: int = Field(1, ge=1)
    reporting_scale: ReportingScaleSettings


class FitSummary(Frozen):
    """The final model's fit: log-likelihood, parameter count, AIC, BIC, convergence, and how it was estimated."""

    log_likelihood: float
    n_parameters: int
    n_persons: int
    aic: float
    bic: float
    converged: bool
    n_iter: int
    estimation: str = Field(description="Estimator, quadrature and SE method, in words")


class Bundle(Frozen):
    """A calibration bundle. ``version`` 0 and empty ``hash`` mean "not yet published"."""

    schema_version: Literal["1", "2", "3", "4"] = SCHEMA_VERSION
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
    link: Link | None = Field(None, description="how this version was put on an earlier version's scale")

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
        newer = sorted({item.model for item in self.items if item.model in MODELS_SINCE_VERSION_4})
        if newer and self.schema_version in ("1", "2", "3"):
            raise ValueError(f"item models {', '.join(newer)} need schema version 4, not {self.schema_version}")
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
        if self.link is not None:
            linked = set(self.link.link_items) | set(self.link.drifted_items) | set(self.link.new_items)
            missing = sorted(linked - ids)
            if missing:
                raise ValueError(f"the link names items that are not in the bundle: {', '.join(missing)}")
        grid = self.scoring.quadrature
        for g in self.metric.groups:
            if not grid.lower <= g.latent_mean <= grid.upper:
                raise ValueError(f"group {g.name!r}: latent mean {g.latent_mean:g} lies outside the scoring grid")
        return self

    @property
    def label(self) -> str:
        """``name@version``, as messages name a bundle."""
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
