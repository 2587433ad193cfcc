"""Settings of a calibration run, a reviewer's policy override, the size floors and the vocabulary."""

from __future__ import annotations

from dataclasses import dataclass, field

from calibration.bundle.schema import ReportingScaleSettings
from calibration.dif.settings import DifSettings
from calibration.estimation import EMSettings
from calibration.irt.likelihood import QuadratureGrid

SINGLE_GROUP = "all"

# About 500 respondents per group is a common floor for 2PL/GRM calibration
# (Jiang, Wang & Weiss 2016, published for the GRM). Below it equitheta warns and says
# what suffers. It refuses only below a hard floor: 50 respondents in a single-group
# calibration, 30 per group in a multiple-group one. With fewer than 30 a group's latent
# mean has an SE of at least 1/sqrt(30) = 0.18 even for a perfectly reliable test, a
# right/wrong item answered by so few has slope and intercept SEs of the order of 0.5,
# and the chi-square references of the MH and LR tests need expected cell counts that
# such a group cannot fill; no statement about that group's items would be worth
# publishing. A programme's own rule can raise the floor (``min_group_size``).
RECOMMENDED_MIN_RESPONDENTS = 500
HARD_MIN_RESPONDENTS = 50
HARD_MIN_PER_GROUP = 30
# A graded category with fewer answers than this in any group is merged with a neighbour (common practice).
MIN_CATEGORY_COUNT = 5


@dataclass(frozen=True)
class PolicyOverride:
    """A reviewer's decision for one item in one group; ``note`` is required."""

    item: str
    group: str
    status: str
    note: str


@dataclass(frozen=True)
class PipelineSettings:
    """Every setting of a calibration run; each default is documented where it is defined."""

    em: EMSettings = field(default_factory=EMSettings)
    scoring_quadrature: QuadratureGrid = field(default_factory=QuadratureGrid)
    reporting_scale: ReportingScaleSettings = field(default_factory=ReportingScaleSettings)
    scoring_method: str = "eap"
    min_items_answered: int | None = None  # default: min(5, number of items)
    dif: DifSettings = field(default_factory=DifSettings)
    dif_action: str = "exclude"
    mh_greater_than_one_z: float = 1.645
    min_group_size: int = HARD_MIN_PER_GROUP  # refuse a multiple-group calibration with a smaller group

    def describe(self) -> dict[str, str | int | float | bool | None]:
        """The settings as the bundle's provenance records them."""
        prior = self.em.slope_prior
        return {
            "max_iter": self.em.max_iter,
            "tolerance": self.em.tolerance,
            "calibration_quadrature_points": self.em.quadrature.n_points,
            "calibration_quadrature_range": f"{self.em.quadrature.lower:g}..{self.em.quadrature.upper:g}",
            "slope_prior": "none" if prior is None else f"lognormal(mean={prior.mean:g}, sd={prior.sd:g})",
            "acceleration": "squarem" if self.em.accelerate else "none",
            "dif_action": self.dif_action,
            "dif_fdr_alpha": self.dif.fdr_level,
            "dif_anchors": ",".join(self.dif.anchors) or "automatic",
            "min_group_size": self.min_group_size,
        }
