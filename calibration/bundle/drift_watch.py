"""Drift watch: how each published item fits the responses scored with it in production.

The service (when ``EQUITHETA_DRIFT_WATCH`` is on) adds every scored batch to counts kept in the shared
Redis store, per bundle version, group and item: for each theta bin and category the posterior-weighted
number of answers, and the posterior-weighted model expected score. Only these sums are kept: no answers,
no ids, no scores of anyone. The report gives, for each item and group, the RMSD between the observed and
the model expected-score curves over the theta bins (each bin weighted by its share of the posterior
mass), divided by the item's maximum score: the definition of the calibration's own RMSD
(:mod:`calibration.quality.model_fit`), on production traffic. An item is flagged when its RMSD exceeds
``RMSD_THRESHOLD`` once at least ``MIN_RESPONSES`` answers have accumulated.

Posterior weighting (each respondent spread over the grid by their posterior, not placed at their point
estimate) keeps the observed curve free of the regression of EAP scores towards the mean.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from pydantic import Field

from calibration.bundle.schema import Bundle, Frozen
from calibration.irt.likelihood import build_design, log_likelihood_grid, normal_log_weights, posterior_weights
from calibration.irt.models import FloatArray, expected_item_scores

if TYPE_CHECKING:
    from calibration.bundle.redis_store import RedisStore
    from calibration.bundle.scorer import BundleScorer

BIN_CENTRES = np.arange(-3.0, 3.001, 0.5)
"""Theta bins the counts are kept in (the scoring grid's points go to the nearest centre; the tails to the ends)."""
RMSD_THRESHOLD = 0.10
"""An RMSD above this flags an item in a group (common practice for the RMSD of an item's curve)."""
MIN_RESPONSES = 200
"""Answers an item needs in a group before its RMSD can flag it (equitheta's default)."""
DRIFT_CAUTION = (
    "A drift flag says that production responses no longer follow the item's published curve for that group "
    "(exposure, a changed text or context, a shifted population): evidence for a review and, when confirmed, a "
    "new calibration linked to this one. It is not a verdict on any respondent's score."
)


@dataclass
class GroupCounts:
    """One group's sums over a bundle version: ``observed[j, b, k]`` answers, ``model[j, b]`` expected scores."""

    items: tuple[str, ...]
    observed: FloatArray  # (J, B, K_max)
    model: FloatArray  # (J, B)
    respondents: int = 0

    def fields(self, group: str) -> dict[str, float]:
        """The nonzero sums as Redis hash fields (a JSON list [group, item, bin, category or "model"])."""
        out = {json.dumps([group, "", -1, "respondents"]): float(self.respondents)} if self.respondents else {}
        for j, b, k in zip(*np.nonzero(self.observed), strict=True):
            out[json.dumps([group, self.items[j], int(b), int(k)])] = float(self.observed[j, b, k])
        for j, b in zip(*np.nonzero(self.model), strict=True):
            out[json.dumps([group, self.items[j], int(b), "model"])] = float(self.model[j, b])
        return out


def _bins(points: FloatArray) -> FloatArray:
    """(Q, B): 1 where a grid point falls in a bin."""
    nearest = np.clip(np.rint((points - BIN_CENTRES[0]) / 0.5), 0, BIN_CENTRES.size - 1).astype(np.int64)
    out = np.zeros((points.size, BIN_CENTRES.size))
    out[np.arange(points.size), nearest] = 1.0
    return out


def batch_counts(scorer: BundleScorer, responses: FloatArray, groups: Sequence[str]) -> dict[str, GroupCounts]:
    """The sums one scored batch adds, per group (the rows aligned to the bundle's items, NaN unanswered)."""
    x = scorer.model_categories(responses)
    points = scorer.grid.points
    to_bins = _bins(points)
    log_prior = normal_log_weights(points, scorer.prior.mean, scorer.prior.sd)
    labels = np.asarray(groups, dtype=object)
    out = {}
    for group in sorted(set(groups)):
        plan = scorer.plans[group]
        sub = x[np.ix_(np.flatnonzero(labels == group), plan.columns)]
        design = build_design(sub, plan.params.n_categories)
        joint = log_likelihood_grid(plan.params, points, design, tables=plan.tables, log_prior=log_prior)
        post = posterior_weights(joint)
        answered = ~np.isnan(sub)
        k_max = plan.params.max_categories
        observed = np.stack(
            [(sub == k).astype(np.float64).T @ post @ to_bins for k in range(k_max)], axis=-1
        )  # (J, B, K)
        mass_on_grid = answered.astype(np.float64).T @ post  # (J, Q)
        model = (mass_on_grid * expected_item_scores(plan.params, points)) @ to_bins  # (J, B)
        items = tuple(scorer.item_ids[j] for j in plan.columns)
        out[group] = GroupCounts(items, observed, model, respondents=int(sub.shape[0]))
    return out


def drift_key(store: RedisStore, name: str, version: int) -> str:
    """The Redis hash that holds a bundle version's drift-watch sums."""
    return store.key("drift", name, version)


def add_counts(store: RedisStore, name: str, version: int, counts: Iterable[tuple[str, GroupCounts]]) -> None:
    """Add sums to the store (HINCRBYFLOAT per field, one pipeline)."""
    key = drift_key(store, name, version)

    def write() -> None:
        pipe = store.client.pipeline(transaction=False)
        for group, group_counts in counts:
            for field, value in group_counts.fields(group).items():
                pipe.hincrbyfloat(key, field, value)
        pipe.execute()

    store.call(write)


class DriftWatchRow(Frozen):
    """One item in one group: the answers counted and the RMSD of its curve."""

    item: str
    group: str
    responses: float = Field(description="answers to the item counted in this group")
    rmsd: float | None = Field(description="observed vs model expected-score curve, over the theta bins")
    flagged: bool = Field(description="RMSD above the threshold with enough answers")


class DriftWatchReport(Frozen):
    """Production fit of every item and group of one bundle version."""

    bundle: str
    threshold: float = RMSD_THRESHOLD
    min_responses: int = MIN_RESPONSES
    respondents: dict[str, int] = Field(description="respondents counted per group")
    rows: list[DriftWatchRow]
    rule: str = (
        f"RMSD = sqrt(sum over theta bins of w_b (observed - model expected score)^2) / the item's maximum score, "
        f"w_b the bin's share of the posterior mass; flagged above {RMSD_THRESHOLD} once {MIN_RESPONSES} answers "
        "are counted (common practice for the threshold, equitheta's default for the count)"
    )
    caution: str = DRIFT_CAUTION


def _read(store: RedisStore, name: str, version: int) -> dict[tuple[str, str, int, str], float]:
    raw = store.call(store.client.hgetall, drift_key(store, name, version))
    out = {}
    for field, value in raw.items():
        group, item, b, k = json.loads(field)
        out[(group, item, int(b), str(k))] = float(value)
    return out


def drift_report(store: RedisStore, bundle: Bundle) -> DriftWatchReport:
    """Every item and group of ``bundle`` with the sums counted so far (no counts yet: every RMSD null)."""
    sums = _read(store, bundle.name, bundle.version)
    respondents = {g: int(v) for (g, _, _, k), v in sums.items() if k == "respondents"}
    bins = BIN_CENTRES.size
    rows = []
    for item in bundle.items:
        for group in (g.name for g in bundle.metric.groups):
            if item.policy[group].status == "excluded":
                continue
            categories = range(item.n_categories)
            observed = np.array([[sums.get((group, item.id, b, str(k)), 0.0) for k in categories] for b in range(bins)])
            model = np.array([sums.get((group, item.id, b, "model"), 0.0) for b in range(bins)])
            mass = observed.sum(axis=1)
            total = float(mass.sum())
            rmsd = None
            if total > 0:
                seen = mass > 0
                gap = (observed[seen] @ np.arange(item.n_categories) - model[seen]) / mass[seen]
                rmsd = float(np.sqrt((mass[seen] / total) @ (gap * gap)) / (item.n_categories - 1))
            rows.append(
                DriftWatchRow(
                    item=item.id,
                    group=group,
                    responses=total,
                    rmsd=rmsd,
                    flagged=bool(rmsd is not None and total >= MIN_RESPONSES and rmsd > RMSD_THRESHOLD),
                )
            )
    return DriftWatchReport(bundle=bundle.label, respondents=respondents, rows=rows)
