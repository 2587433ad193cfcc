"""`equitheta relate` against scipy (Pearson r and its Fisher-z interval), the correction for unreliability and
the equal-correlation statistic written out, on a seeded simulation with known relations."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from calibration.bundle import DirectoryStore
from calibration.bundle.scorer import BundleScorer, entry_parameters
from calibration.cli import main
from calibration.errors import InputError
from calibration.irt.simulate import simulate_items
from tests.helpers import example_bundle


@pytest.fixture
def related(tmp_path: Path) -> dict:
    store = tmp_path / "store"
    bundle = example_bundle()
    DirectoryStore(store).put_version(bundle)
    rng = np.random.default_rng(21)
    n = 3000
    theta = rng.normal(size=n)
    x = simulate_items(entry_parameters(bundle.items), theta, rng)
    frame = pd.DataFrame(x.astype(int), columns=[i.id for i in bundle.items])
    frame.insert(0, "mode", np.where(rng.random(n) < 0.5, "paper", "tablet"))
    frame.insert(0, "id", [f"r{i}" for i in range(n)])
    frame["criterion"] = 0.8 * theta + rng.normal(0.0, 0.6, n)
    frame["opposite"] = -0.7 * theta + rng.normal(0.0, 0.7, n)
    frame["unrelated"] = rng.normal(size=n)
    frame.loc[5, "criterion"] = np.nan  # a missing measure drops that row from its correlation only
    path = tmp_path / "related.csv"
    frame.to_csv(path, index=False)
    return {"store": store, "path": path, "frame": frame, "bundle": bundle, "root": tmp_path}


def test_correlations_intervals_and_evidence(related: dict) -> None:
    out = related["root"] / "relations.csv"
    args = ["relate", str(related["path"]), "--bundle", "pantry-checkout", "--store", str(related["store"]),
            "--group-column", "mode", "--measure", "criterion", "--measure", "opposite", "--measure", "unrelated",
            "--reliability", "criterion=0.8", "--expect", "criterion:positive", "--expect", "opposite:negative",
            "--expect", "unrelated:none", "--out", str(out)]  # fmt: skip
    assert main(args) == 0
    rows = pd.read_csv(out)
    frame, bundle = related["frame"], related["bundle"]
    scorer = BundleScorer(bundle)
    answers = frame[[i.id for i in bundle.items]].to_numpy(dtype=float)
    theta = scorer.score(answers, tuple(frame["mode"]), method="eap").theta
    z_terms = {}
    for group in ("paper", "tablet", "all"):
        members = np.ones(len(frame), dtype=bool) if group == "all" else (frame["mode"] == group).to_numpy()
        for measure in ("criterion", "opposite", "unrelated"):
            ok = members & frame[measure].notna().to_numpy()
            reference = stats.pearsonr(theta[ok], frame[measure].to_numpy()[ok])  # Source: scipy
            interval = reference.confidence_interval(0.95)  # Fisher's z
            row = rows[(rows["group"] == group) & (rows["measure"] == measure)].iloc[0]
            assert row["n"] == ok.sum()
            # The CSV prints 6 decimals.
            assert row["r"] == pytest.approx(reference.statistic, abs=5e-7)
            assert (row["ci_low"], row["ci_high"]) == pytest.approx((interval.low, interval.high), abs=5e-7)
            assert row["evidence"] == "agrees"
            if group != "all":
                z_terms.setdefault(measure, []).append((ok.sum() - 3, np.arctanh(reference.statistic)))
            if measure == "criterion" and group != "all":
                rel = bundle.quality.by_group[group].marginal_reliability
                assert row["r_corrected"] == pytest.approx(reference.statistic / np.sqrt(rel * 0.8), abs=5e-7)
    homogeneity = pd.read_csv(related["root"] / "relations_groups.csv")
    for measure, terms in z_terms.items():
        w = np.array([t[0] for t in terms], dtype=float)
        z = np.array([t[1] for t in terms])
        q = np.sum(w * (z - np.sum(w * z) / w.sum()) ** 2)  # the Q statistic written out
        row = homogeneity[homogeneity["measure"] == measure].iloc[0]
        assert row["q"] == pytest.approx(q, abs=5e-7) and row["df"] == 1
        assert row["p_value"] == pytest.approx(stats.chi2.sf(q, 1), abs=5e-7)


def test_bad_measure_cells_and_options_are_named(related: dict, capsys: pytest.CaptureFixture[str]) -> None:
    frame = related["frame"].copy()
    frame["criterion"] = frame["criterion"].astype(object)
    frame.loc[7, "criterion"] = "n/a"
    path = related["root"] / "bad.csv"
    frame.to_csv(path, index=False)
    base = ["relate", str(path), "--bundle", "pantry-checkout", "--store", str(related["store"]),
            "--group-column", "mode", "--measure", "criterion", "--ignore-columns", "opposite,unrelated",
            "--out", str(related["root"] / "x.csv")]  # fmt: skip
    with pytest.raises(InputError, match=r"row 8 \(line 9\), column 'criterion': 'n/a' is not a number"):
        from calibration.cli import build_parser
        from calibration.cli.relate import run_relate

        run_relate(build_parser().parse_args(base[:]))
    no_groups = [a for a in base if a not in ("--group-column", "mode")]
    assert main(no_groups) == 2  # the bundle has groups: the message names the one column that could hold them
    assert "(perhaps --group-column mode)" in capsys.readouterr().err
    assert main([*base, "--expect", "criterion:sideways"]) == 2
    assert main([*base, "--reliability", "criterion=1.5"]) == 2
    assert not (related["root"] / "x.csv").exists()
