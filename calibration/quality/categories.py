"""Category functioning of a polytomous item in one group: do its rating categories work as intended?

Four checks, all on the group's respondents and the item's parameters in that group:

- how often each category was answered;
- the mean theta (EAP) of the respondents who answered each category, which should rise with the
  category (a category whose respondents stand no higher than the one below it does not order people);
- whether the thresholds (graded items) or steps (partial-credit items) are in order;
- for an item with a negative slope (reverse-keyed and left unreversed) "rise" and "in order" are read
  the other way along theta;
- the theta range where each category is the most probable answer, on a fine grid: a category that is
  never the most probable (its steps reversed, or a graded category squeezed between close thresholds) is
  one respondents hardly use as a distinct level.

A category that is never most probable or whose mean theta does not rise is flagged, with the adjacent
category it is closest to (by mean theta) as the one to consider merging it with. These are common
practice checks for rating scales; the decision belongs to the people who wrote the rating guide.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.models import FloatArray, IntArray, ItemParameters, category_probabilities

MODAL_GRID = np.linspace(-6.0, 6.0, 2401)
"""Theta points (step 0.005) on which the most probable category is found."""


@dataclass(frozen=True)
class CategoryCheck:
    """One item's categories in one group. ``modal_from``/``modal_to`` are NaN where the category is never
    most probable, and -inf/inf where its range runs off the grid's end."""

    counts: IntArray
    mean_theta: FloatArray
    modal_from: FloatArray
    modal_to: FloatArray
    steps_ordered: bool
    flags: tuple[str, ...]


def category_check(params: ItemParameters, item: int, answers: FloatArray, theta: FloatArray) -> CategoryCheck:
    """The checks of item ``item`` of ``params`` from the group's answers to it (NaN: not answered) and thetas."""
    one = params.subset([item])
    k = int(one.n_categories[0])
    answered = ~np.isnan(answers)
    codes = answers[answered].astype(np.int64)
    counts = np.bincount(codes, minlength=k)[:k]
    sums = np.bincount(codes, weights=theta[answered], minlength=k)[:k]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    modal = np.argmax(category_probabilities(one, MODAL_GRID)[0, :k], axis=0)
    low, high = np.full(k, np.nan), np.full(k, np.nan)
    for c in range(k):
        where = np.flatnonzero(modal == c)
        if where.size:
            low[c] = -np.inf if where[0] == 0 else MODAL_GRID[where[0]]
            high[c] = np.inf if where[-1] == MODAL_GRID.size - 1 else MODAL_GRID[where[-1]]
    # A negative slope (a reverse-keyed item left unreversed) orders the categories the other way along theta:
    # its locations fall and its respondents' mean theta should fall with the category.
    direction = 1.0 if one.slopes[0] >= 0 else -1.0
    locations = one.thresholds()[0, : k - 1]
    ordered = bool(np.all(direction * np.diff(locations) > 0))
    flags = []
    for c in range(k):
        never = np.isnan(low[c])
        falls = c > 0 and np.isfinite(mean[c]) and np.isfinite(mean[c - 1]) and direction * (mean[c] - mean[c - 1]) <= 0
        if not (never or falls):
            continue
        why = []
        if never:
            why.append("never the most probable answer" + ("" if ordered else " (its steps are out of order)"))
        if falls:
            side = "above" if direction > 0 else "below"
            why.append(f"its respondents' mean theta {mean[c]:.2f} is not {side} category {c - 1}'s {mean[c - 1]:.2f}")
            if direction < 0:
                why[-1] += " (the slope is negative: the categories run down the scale)"
        flags.append(f"category {c} ({counts[c]} answers): {'; '.join(why)}; consider merging it with category "
                     f"{_closest_neighbour(mean, c, k)}")  # fmt: skip
    return CategoryCheck(counts, mean, low, high, ordered, tuple(flags))


def _closest_neighbour(mean: FloatArray, c: int, k: int) -> int:
    """The adjacent category whose respondents' mean theta is closest to category ``c``'s (the lower one on a tie
    or when a mean is missing)."""
    neighbours = [n for n in (c - 1, c + 1) if 0 <= n < k]
    if len(neighbours) == 1 or not np.isfinite(mean[c]):
        return neighbours[0]
    gaps = [abs(mean[n] - mean[c]) if np.isfinite(mean[n]) else np.inf for n in neighbours]
    return neighbours[int(np.argmin(gaps))]
