"""Scoring glue: a score request checked against a bundle, scored in one vectorised call, as JSON-ready data."""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from calibration.bundle.scorer import UnknownGroup
from calibration.bundle.summaries import GroupSummaries, summarize_groups
from service.errors import AnswerOutOfRange, InvalidScoreRequest, ProblemError, UnknownGroupProblem, UnknownItem
from service.registry import LoadedBundle
from service.schemas import CAUTION, ScoreRequest, SummaryRequest


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def _json_floats(array: np.ndarray) -> list[float | None]:
    """Floats for JSON: NaN and infinities become null (a pass over the list only when there are any)."""
    values = array.tolist()
    if np.isfinite(array).all():
        return values  # type: ignore[no-any-return]
    return [v if math.isfinite(v) else None for v in values]


Observer = Callable[[LoadedBundle, np.ndarray, Sequence[str]], None]
"""Called with every scored batch's answer matrix and groups (the drift watch)."""


def score_vectors(loaded: LoadedBundle, request: ScoreRequest, observe: Observer | None = None) -> dict[str, Any]:
    """Validate the vectors against the bundle and score them in one vectorised call.

    Returns the ScoreResponse document as plain JSON-ready data (the route sends it as is).
    """
    scorer, bundle = loaded.scorer, loaded.bundle
    x = _answer_matrix(loaded, request)
    groups = _resolve_groups(loaded, request)
    result = scorer.score(x, groups, method=request.options.method)
    if observe is not None:
        observe(loaded, x, groups)
    excluded = loaded.excluded_items
    # Plain dicts (the ScoreResult shape) instead of one model per respondent: the batch hot path.
    columns = [
        _json_floats(array)
        for array in (result.theta, result.se, result.scale_score, result.scale_se, result.person_fit)
    ]
    results = [
        {
            "id": respondent,
            "group": g,
            "theta": theta,
            "se": se,
            "scale_score": scale,
            "scale_se": scale_se,
            "items_answered": n_items,
            "excluded_items": excluded[g],
            "flags": flags,  # a tuple: orjson writes it as the array it is
            "person_fit_lz_star": lz,
            "summed_score": None,
            "summed_score_theta": None,
            "summed_score_se": None,
        }
        for respondent, g, theta, se, scale, scale_se, n_items, flags, lz in zip(
            [vector["id"] for vector in request.responses],
            groups,
            *columns[:4],
            result.n_answered.tolist(),
            result.flags,
            columns[4],
            strict=True,
        )
    ]
    if request.options.include_summed_score:
        _add_summed_scores(results, result.summed_score.tolist(), loaded)
    return {
        "bundle": {"name": bundle.name, "version": bundle.version, "hash": bundle.hash},
        "method": result.method,
        "results": results,
        "caution": CAUTION,
    }


def _answer_matrix(loaded: LoadedBundle, request: ScoreRequest | SummaryRequest) -> np.ndarray:
    """(n_vectors, n_items) answers, NaN where none was given; errors name the earliest offending vector.

    Vectors usually share one key order: each distinct layout of keys is placed with one column
    lookup, its values taken from the request's answer codes (one int64 array of every answer).
    """
    index, limits = loaded.item_index, loaded.item_limits
    x = np.full((len(request.responses), limits.size), np.nan)
    codes = request.answer_codes()
    lengths = np.fromiter((len(v["answers"]) for v in request.responses), dtype=np.int64, count=len(request.responses))
    starts = np.cumsum(lengths) - lengths
    layouts: dict[tuple[str, ...], list[int]] = {}
    for i, vector in enumerate(request.responses):
        layouts.setdefault(tuple(vector["answers"]), []).append(i)
    problems: list[tuple[int, ProblemError]] = []
    for keys, members in layouts.items():
        if not keys:
            continue
        cols = np.fromiter((index.get(k, -1) for k in keys), dtype=np.int64, count=len(keys))
        if (cols < 0).any():
            problems.append(_unknown_item(loaded, request, members[0], keys[int(np.flatnonzero(cols < 0)[0])]))
            continue
        rows = np.asarray(members, dtype=np.int64)
        values = codes[starts[rows][:, None] + np.arange(len(keys))]
        outside = (values < 0) | (values >= limits[cols][None, :])
        if outside.any():
            r, c = (int(v[0]) for v in np.nonzero(outside))
            i, item, value = members[r], keys[c], int(values[r, c])
            problems.append(
                (
                    i,
                    AnswerOutOfRange(
                        f"responses[{i}] (id {request.responses[i]['id']!r}), item {item!r}: answer {value} is "
                        f"outside the item's categories 0..{limits[cols[c]] - 1}",
                        field=f"responses.{i}.answers.{item}",
                    ),
                )
            )
            continue
        x[np.ix_(rows, cols)] = values
    if problems:
        raise min(problems, key=lambda p: p[0])[1]
    return x


def _unknown_item(
    loaded: LoadedBundle, request: ScoreRequest | SummaryRequest, i: int, item: str
) -> tuple[int, ProblemError]:
    respondent = request.responses[i]["id"]
    message = f"responses[{i}] (id {respondent!r}): item {item!r} is not in bundle {loaded.bundle.label}"
    return i, UnknownItem(message, field=f"responses.{i}.answers.{item}")


def _resolve_groups(loaded: LoadedBundle, request: ScoreRequest | SummaryRequest) -> tuple[str, ...]:
    scorer = loaded.scorer
    try:
        return scorer.resolve_groups([v.get("group") for v in request.responses], len(request.responses))
    except UnknownGroup as exc:
        vector = request.responses[exc.index]
        known = ", ".join(sorted(scorer.plans))
        what = (
            "no group given and the bundle has several groups"
            if exc.group is None
            else f"group {exc.group!r} is not in bundle {loaded.bundle.label}"
        )
        raise UnknownGroupProblem(
            f"responses[{exc.index}] (id {vector['id']!r}): {what} (groups: {known})",
            field=f"responses.{exc.index}.group",
        ) from exc


def _add_summed_scores(results: list[dict[str, Any]], summed_scores: list[float], loaded: LoadedBundle) -> None:
    """Each result's summed score with the theta and SE its group's summed-score table gives it."""
    tables = {
        name: {row.summed_score: (row.theta, row.se) for row in quality.summed_score_table}
        for name, quality in loaded.bundle.quality.by_group.items()
    }
    for entry, summed in zip(results, summed_scores, strict=True):
        if math.isfinite(summed):
            theta_s, se_s = tables.get(entry["group"], {}).get(int(summed), (math.nan, math.nan))
            entry.update(summed_score=int(summed), summed_score_theta=_finite(theta_s), summed_score_se=_finite(se_s))


def summarize_vectors(loaded: LoadedBundle, request: SummaryRequest) -> GroupSummaries:
    """Group (and cohort) summaries of the vectors with plausible values (see calibration.bundle.summaries).

    With one bundle group a vector's ``group`` is any reporting group (none: the bundle's); with several
    it must be one of them (its item policy scores the respondent). Cohorts are given for every vector or none.
    """
    scorer = loaded.scorer
    x = _answer_matrix(loaded, request)
    if scorer.default_group is not None:
        scored_as = [scorer.default_group] * len(request.responses)
        labels = [v.get("group") or scorer.default_group for v in request.responses]
    else:
        scored_as = labels = list(_resolve_groups(loaded, request))
    given = [v.get("cohort") for v in request.responses]
    cohorts = None
    if any(c is not None for c in given):
        i = next((i for i, c in enumerate(given) if c is None), None)
        if i is not None:
            raise InvalidScoreRequest(
                f"responses[{i}] (id {request.responses[i]['id']!r}): no cohort; give every respondent a cohort, "
                "or none",
                field=f"responses.{i}.cohort",
            )
        cohorts = [str(c) for c in given]
    options = request.options
    return summarize_groups(
        scorer,
        x,
        labels,
        scored_as=scored_as,
        cohorts=cohorts,
        draws=options.plausible_values,
        seed=options.seed,
        percentiles=options.percentiles,
    )
