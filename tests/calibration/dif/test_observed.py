"""Observed-score DIF against statsmodels (StratifiedTable) and direct computation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.stats.contingency_tables import StratifiedTable

from calibration.dif.observed import (
    mantel_haenszel,
    mantel_polytomous,
    mh_abc_class,
    polytomous_category,
    screen_observed,
)
from tests.helpers import load_reference, simulate_responses


def test_mh_matches_published_strata() -> None:
    # Source: tests/data/mh_strata.json (statsmodels' suite, from R's mantelhaen.test); printed to 4-7 digits.
    ref = load_reference("mh_strata.json")
    alpha, se_log, chi, p = mantel_haenszel(np.array(ref["strata"], dtype=float))
    assert alpha == pytest.approx(ref["alpha_mh"], abs=1e-4)
    assert chi == pytest.approx(ref["chi_square_corrected"], abs=1e-4)
    assert p == pytest.approx(ref["p_value"], abs=1e-7)
    lo, hi = math.exp(math.log(alpha) - 1.959964 * se_log), math.exp(math.log(alpha) + 1.959964 * se_log)
    assert (lo, hi) == pytest.approx(tuple(ref["ci95"]), abs=1e-5)


def test_mh_matches_statsmodels_on_our_own_tables() -> None:
    # Reference library: statsmodels StratifiedTable (RBG SE, corrected test, shift_zeros=False).
    rng = np.random.default_rng(17)
    tables = rng.integers(0, 40, size=(9, 2, 2)).astype(float)
    st = StratifiedTable(np.transpose(tables, (1, 2, 0)), shift_zeros=False)
    alpha, se_log, chi, p = mantel_haenszel(tables)
    assert alpha == pytest.approx(st.oddsratio_pooled, rel=1e-12)
    assert se_log == pytest.approx(st.logodds_pooled_se, rel=1e-12)
    test = st.test_null_odds(correction=True)
    assert chi == pytest.approx(test.statistic, rel=1e-12)
    assert p == pytest.approx(test.pvalue, rel=1e-9)


@pytest.mark.parametrize(
    ("d", "se", "p", "expected"),
    [
        (-0.8, 0.2, 0.001, "A"),  # |D| < 1
        (-1.2, 0.3, 0.20, "A"),  # not significant
        (-1.2, 0.3, 0.001, "B-"),
        (1.6, 0.5, 0.001, "B+"),  # |D| >= 1.5 but not significantly above 1 (z = 1.2)
        (-1.8, 0.3, 0.0001, "C-"),  # z = 2.67
    ],
)
def test_abc_categories(d: float, se: float, p: float, expected: str) -> None:
    # Rule: Zwick (2012) after Petersen (1988), as stated in REFERENCES.md [published].
    assert mh_abc_class(d, se, p) == expected


def test_greater_than_one_critical_value_is_a_setting() -> None:
    # z = (1.55 - 1) / 0.3 = 1.83: C at the one-sided 1.645, B at 1.96.
    assert mh_abc_class(-1.55, 0.3, 0.001, greater_than_one_z=1.645) == "C-"
    assert mh_abc_class(-1.55, 0.3, 0.001, greater_than_one_z=1.96) == "B-"


def test_mantel_polytomous_against_direct_formula() -> None:
    # Independent route: Mantel (1963) written out stratum by stratum with plain Python sums.
    rng = np.random.default_rng(4)
    scores = rng.integers(0, 4, 300).astype(float)
    focal = rng.random(300) < 0.4
    strata = rng.integers(0, 5, 300)
    chi, p, smd = mantel_polytomous(scores, focal, strata)
    f_sum = e_sum = v_sum = 0.0
    smd_direct = 0.0
    for k in range(5):
        y = [s for s, st in zip(scores, strata, strict=True) if st == k]
        yf = [s for s, st, f in zip(scores, strata, focal, strict=True) if st == k and f]
        yr = [s for s, st, f in zip(scores, strata, focal, strict=True) if st == k and not f]
        n, nf, nr = len(y), len(yf), len(yr)
        f_sum += sum(yf)
        e_sum += nf * sum(y) / n
        v_sum += nr * nf / (n * n * (n - 1)) * (n * sum(v * v for v in y) - sum(y) ** 2)
        smd_direct += nf / focal.sum() * (np.mean(yf) - np.mean(yr))
    assert chi == pytest.approx((f_sum - e_sum) ** 2 / v_sum, rel=1e-12)
    assert smd == pytest.approx(smd_direct, rel=1e-12)
    assert polytomous_category(0.5, 0.4) == "AA"
    assert polytomous_category(0.001, -0.3) == "CC-"


def test_screening_finds_a_built_in_dif_item() -> None:
    # Seeded simulation: item 2 is 0.8 logits harder for the focal group; the others are clean.
    rng = np.random.default_rng(21)
    a, b = rng.uniform(0.9, 1.8, 15), rng.normal(0, 1, 15)
    ref = simulate_responses(a, b[:, None], rng.normal(size=1500), rng)
    b_focal = b.copy()
    b_focal[2] += 0.8 / a[2]
    foc = simulate_responses(a, b_focal[:, None], rng.normal(-0.3, 1, size=1500), rng)
    x = np.vstack([ref, foc])
    groups = np.repeat([0, 1], 1500)
    screening = screen_observed(x, np.full(15, 2), groups, 2)
    assert screening.mh[(2, 1)].category in ("B-", "C-")
    assert 2 in screening.stage1_flagged[1] and 2 not in screening.matching_items[1]
    others = [screening.mh[(j, 1)].category for j in range(15) if j != 2]
    assert others.count("A") >= 13
