"""Scoring response vectors from a bundle: the one path the CLI and the service share.

Each group scores with its own item set and parameters: items whose policy for
the group is ``excluded`` are left out, ``group_specific`` items use the group's
parameters, every other item the shared ones. Every group uses the same prior
(the reference metric, N(prior_mean, prior_sd)), so the same answers to the same
items give the same score whatever the group: group membership changes which
items count, never how an answer is weighed beyond what the bundle records.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from calibration.bundle.schema import Bundle, ItemEntry
from calibration.errors import UnknownGroup
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import FloatArray, IntArray, ItemParameters, recode_in_place
from calibration.irt.person_fit import checked_person_fit_lz
from calibration.irt.scoring import MAP_BOUND, METHOD_MAP, METHOD_ML, METHODS, NormalPrior, score, score_tables

FLAG_NO_ANSWERS = "no_answers"
FLAG_FEW_ITEMS = "few_items"
FLAG_EXTREME = "extreme_pattern"
FLAG_MISFIT = "person_misfit"
FLAG_AT_BOUND = "theta_at_bound"
"""An ML (or MAP) theta held at the bound although the pattern is not extreme: the likelihood's maximum lies at or
beyond it, so the reported theta is a limit, not an estimate."""
# l_z* below the one-sided 5% normal point flags a pattern as unlikely (common practice).
PERSON_FIT_CUTOFF = -1.645


@dataclass(frozen=True)
class GroupScoringPlan:
    """The items and parameters one group scores with."""

    group: str
    columns: IntArray  # positions in the bundle's item list
    params: ItemParameters
    excluded: tuple[tuple[str, str], ...]  # (item id, reason)
    tables: tuple[FloatArray, FloatArray]  # log-probability tables on the scoring grid, built once


@dataclass(frozen=True)
class ScoredBatch:
    """Scores for a batch; arrays have shape (n_persons,)."""

    theta: FloatArray
    se: FloatArray
    scale_score: FloatArray
    scale_se: FloatArray
    n_answered: IntArray
    groups: tuple[str, ...]
    flags: tuple[tuple[str, ...], ...]
    method: str
    person_fit: FloatArray  # l_z* at the estimate (NaN without answers)
    summed_score: FloatArray  # summed score when every item of the group's plan was answered, else NaN


def entry_parameters(entries: Sequence[ItemEntry], group: str | None = None) -> ItemParameters:
    """The items' parameters as one test: the shared ones, or with ``group`` that group's own where it has them."""
    rows = []
    for entry in entries:
        policy = None if group is None else entry.policy[group]
        if policy is not None and policy.status == "group_specific" and policy.slope is not None and policy.intercepts:
            rows.append((policy.slope, policy.intercepts, entry.model, policy.guessing))
        else:
            rows.append((entry.slope, entry.intercepts, entry.model, entry.guessing))
    return ItemParameters.stack(rows)


def group_codes(groups: Sequence[str]) -> tuple[list[str], IntArray]:
    """The distinct groups (sorted) and each respondent's position among them."""
    distinct = sorted(set(groups))
    if len(distinct) <= 1:
        return distinct, np.zeros(len(groups), dtype=np.int64)
    position = {g: i for i, g in enumerate(distinct)}
    return distinct, np.fromiter((position[g] for g in groups), dtype=np.int64, count=len(groups))


class BundleScorer:
    """Holds a bundle's per-group parameters, built once (the service keeps one per bundle)."""

    def __init__(self, bundle: Bundle) -> None:
        self.bundle = bundle
        self.item_ids: tuple[str, ...] = tuple(item.id for item in bundle.items)
        self.item_categories: dict[str, int] = {item.id: item.answer_categories for item in bundle.items}
        # Answer code -> model category, for items whose sparse categories were merged at calibration.
        self.recode: dict[int, np.ndarray] = {
            j: np.array(item.category_map, dtype=np.float64)
            for j, item in enumerate(bundle.items)
            if item.category_map is not None
        }
        settings = bundle.scoring
        self.grid = QuadratureGrid(settings.quadrature.n_points, settings.quadrature.lower, settings.quadrature.upper)
        self.prior = NormalPrior(settings.prior_mean, settings.prior_sd)
        scale = settings.reporting_scale
        self.reporting_scale = scale.to_scale()
        self.plans: dict[str, GroupScoringPlan] = {}
        for group in bundle.metric.groups:
            keep: list[int] = []
            excluded: list[tuple[str, str]] = []
            for j, item in enumerate(bundle.items):
                policy = item.policy[group.name]
                if policy.status == "excluded":
                    excluded.append((item.id, policy.reason))
                    continue
                keep.append(j)
            columns = np.array(keep, dtype=np.int64)
            params = entry_parameters(bundle.items, group.name).subset(columns)
            self.plans[group.name] = GroupScoringPlan(
                group.name, columns, params, tuple(excluded), score_tables(params, self.grid)
            )

    @property
    def default_group(self) -> str | None:
        """The group used when a respondent names none: the only group, if there is one."""
        groups = self.bundle.metric.groups
        return groups[0].name if len(groups) == 1 else None

    def resolve_groups(
        self, groups: Sequence[str | None] | None, n_persons: int, *, unknown_to_reference: bool = False
    ) -> tuple[str, ...]:
        """Check every respondent's group; raise :class:`UnknownGroup` listing every bad one."""
        known = set(self.plans)
        reference = self.bundle.metric.reference_group
        default = self.default_group
        if groups is None and default is not None:
            return (default,) * n_persons
        if groups is not None and known.issuperset(groups):
            return tuple(groups)  # type: ignore[arg-type]
        if groups is None:
            groups = [None] * n_persons
        resolved: list[str] = []
        problems: list[tuple[int, str | None]] = []
        for i, g in enumerate(groups):
            if g is None or g == "":
                if default is None:
                    problems.append((i, None))
                resolved.append(default or reference)
            elif g in known:
                resolved.append(g)
            elif unknown_to_reference:
                resolved.append(reference)
            else:
                problems.append((i, g))
                resolved.append(reference)
        if problems:
            i, g = problems[0]
            what = (
                "no group given and the bundle has several groups"
                if g is None
                else f"group {g!r} is not in bundle {self.bundle.label}"
            )
            more = f" ({len(problems) - 1} more respondents like this)" if len(problems) > 1 else ""
            raise UnknownGroup(
                f"respondent {i + 1}: {what} (groups: {', '.join(sorted(known))}){more}", problems=problems
            )
        return tuple(resolved)

    def model_categories(self, responses: FloatArray) -> FloatArray:
        """The answers as the model's categories (codes merged at calibration recoded; a copy only then)."""
        x = np.asarray(responses, dtype=np.float64)
        if self.recode:
            x = x.copy()
            recode_in_place(x, self.recode)
        return x

    def score(
        self,
        responses: FloatArray,
        groups: Sequence[str],
        *,
        method: str | None = None,
    ) -> ScoredBatch:
        """Score rows aligned to the bundle's items (NaN = not administered).

        ``groups`` must already be resolved (see :meth:`resolve_groups`).
        """
        method = method or self.bundle.scoring.method
        if method not in METHODS:
            raise ValueError(f"unknown scoring method {method!r}; use one of {', '.join(METHODS)}")
        x = self.model_categories(responses)
        n = x.shape[0]
        theta = np.empty(n)
        se = np.empty(n)
        n_answered = np.zeros(n, dtype=np.int64)
        minimum = np.zeros(n, dtype=np.int64)  # judged against the items open to each respondent's group
        extreme = np.zeros(n, dtype=bool)
        person_fit = np.full(n, np.nan)
        summed = np.full(n, np.nan)
        names, which = group_codes(groups)
        fit_prior = None if method == "ml" else self.prior  # l_z*'s estimating equation: ML has no prior term
        for g, name in enumerate(names):
            plan = self.plans[name]
            rows: slice | np.ndarray
            if len(names) == 1:  # every row: slices, no index arrays (a single vector's request is mostly overhead)
                rows = slice(None)
                sub = x if plan.columns.size == x.shape[1] else x[:, plan.columns]
            else:
                rows = np.flatnonzero(which == g)
                sub = x[np.ix_(rows, plan.columns)]
            result = score(
                plan.params,
                sub,
                method=method,
                grid=self.grid,
                prior=self.prior,
                ml_bound=self.bundle.scoring.ml_bound,
                tables=plan.tables,
            )
            theta[rows], se[rows] = result.theta, result.se
            minimum[rows] = min(self.bundle.scoring.min_items_answered, plan.columns.size)
            n_answered[rows], extreme[rows] = result.n_answered, result.extreme
            # sub has passed the scoring call's checks, so the person fit takes it as it is.
            finite = np.isfinite(result.theta)
            keep = slice(None) if finite.all() else finite  # views while every theta is finite
            fit = np.full(finite.size, np.nan)
            fit[keep] = checked_person_fit_lz(
                plan.params, sub[keep], result.theta[keep], corrected=True, prior=fit_prior
            )
            person_fit[rows] = fit
            summed[rows] = sub.sum(axis=1)  # NaN where an answer is missing
        scale_score, scale_se = self.reporting_scale.transform(theta, se)
        marks = (
            (n_answered == 0, FLAG_NO_ANSWERS),
            ((n_answered > 0) & (n_answered < minimum), FLAG_FEW_ITEMS),
            (extreme, FLAG_EXTREME),
            (person_fit < PERSON_FIT_CUTOFF, FLAG_MISFIT),  # NaN (no fit) compares False
            (~extreme & (np.abs(theta) >= self._bound(method)), FLAG_AT_BOUND),  # NaN compares False
        )
        # One code per row (a bit per flag), each distinct code spelt out once.
        code = sum(mask.astype(np.int64) << bit for bit, (mask, _) in enumerate(marks)).tolist()
        spelt = {c: tuple(name for bit, (_, name) in enumerate(marks) if c >> bit & 1) for c in set(code)}
        flags = [spelt[c] for c in code]
        return ScoredBatch(
            theta=theta,
            se=se,
            scale_score=scale_score,
            scale_se=scale_se,
            n_answered=n_answered,
            groups=tuple(groups),
            flags=tuple(flags),
            method=method,
            person_fit=person_fit,
            summed_score=summed,
        )

    def _bound(self, method: str) -> float:
        """The bound a method keeps theta within (EAP has none: a posterior mean never reaches the grid's end)."""
        return {METHOD_ML: self.bundle.scoring.ml_bound, METHOD_MAP: MAP_BOUND}.get(method, np.inf)

    def excluded_for(self, group: str) -> tuple[tuple[str, str], ...]:
        """Items left out of ``group``'s score, with the reason for each."""
        return self.plans[group].excluded
