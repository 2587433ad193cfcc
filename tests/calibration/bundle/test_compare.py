"""Comparing two versions: the example bundle's two invented cycles (openapi_examples), checked item by item
and against the true-score change found by scipy's root finder on curves written out here."""

from __future__ import annotations

import math

import pytest
from scipy import optimize

from calibration.bundle import Bundle
from calibration.bundle.compare import compare_bundles
from tests.helpers import EXAMPLES


def _bundle(name: str) -> Bundle:
    return Bundle.model_validate_json((EXAMPLES / name).read_text())


def _expected_score(bundle: Bundle, items: list[str], theta: float) -> float:
    """Sum of 2PL probabilities written out: 1 / (1 + exp(-(a theta + c)))."""
    entries = {item.id: item for item in bundle.items}
    return sum(1.0 / (1.0 + math.exp(-(entries[i].slope * theta + entries[i].intercepts[0]))) for i in items)


def _information(bundle: Bundle, items: list[str], theta: float) -> float:
    """Sum of a^2 P (1 - P) written out (2PL information)."""
    entries = {item.id: item for item in bundle.items}
    total = 0.0
    for i in items:
        p = 1.0 / (1.0 + math.exp(-(entries[i].slope * theta + entries[i].intercepts[0])))
        total += entries[i].slope ** 2 * p * (1.0 - p)
    return total


def test_items_policy_and_groups_are_compared_and_the_score_change_equals_a_root_finder() -> None:
    first, second = _bundle("bundle.json"), _bundle("bundle_v2.json")
    diff = compare_bundles(first, second, same_scale=True, scale_note="linked")
    changes = {c.item: c for c in diff.items}
    assert changes["T7"].change == "added" and changes["T7"].from_slope is None
    assert diff.common_items == ["T1", "T2", "T3", "T4", "T5", "T6"]
    link = second.link
    assert link is not None
    for item in link.link_items:  # held at the published values by the fixed-parameter link
        assert changes[item].change == "unchanged" and changes[item].change_theta == 0.0
    for item in link.drifted_items:
        assert changes[item].change == "changed" and changes[item].change_theta > 0.2
    assert {g.group for g in diff.groups} == {"paper", "tablet"}
    for point in diff.scores:
        target = _expected_score(first, diff.common_items, point.theta)
        root = optimize.brentq(
            lambda t, goal=target: _expected_score(second, diff.common_items, t) - goal, -12, 12, xtol=1e-12
        )
        # The code inverts the newer curve by interpolating on a 0.005 grid: 1e-4 covers its error.
        assert point.to_theta == pytest.approx(root, abs=1e-4)
        assert point.from_se == pytest.approx(_information(first, diff.common_items, point.theta) ** -0.5, rel=1e-9)
        assert point.to_se == pytest.approx(_information(second, diff.common_items, point.to_theta) ** -0.5, rel=1e-9)


def test_a_version_compared_with_itself_has_no_change() -> None:
    first = _bundle("bundle.json")
    diff = compare_bundles(first, first, same_scale=True, scale_note="the same version")
    assert all(c.change == "unchanged" for c in diff.items) and not diff.policy
    assert all(abs(point.change) < 1e-4 for point in diff.scores if point.change is not None)
