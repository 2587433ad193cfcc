"""The command line end to end: calibrate, score, bundle, demo; errors and exit codes."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibration.bundle import DirectoryStore
from calibration.bundle.scorer import BundleScorer
from calibration.cli import main
from calibration.demo import make_demo_responses
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.scoring import NormalPrior, eap_scores


@pytest.fixture(scope="module")
def published(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("cli")
    data = root / "responses.csv"
    make_demo_responses(800, seed=5, with_sites=False).to_csv(data, index=False)
    assert main(["calibrate", str(data), "--name", "skills", "--store", str(root / "store")]) == 0
    return data, root / "store"


def test_calibrate_publishes_version_one(published: tuple[Path, Path]) -> None:
    _, store_dir = published
    bundle = DirectoryStore(store_dir).get("skills", 1)
    assert len(bundle.items) == 24
    assert bundle.fit.converged
    assert bundle.provenance.n_respondents == 800


def test_score_output_matches_the_library(published: tuple[Path, Path], tmp_path: Path) -> None:
    data, store_dir = published
    out = tmp_path / "scores.csv"
    assert main(["score", str(data), "--bundle", "skills@1", "--store", str(store_dir), "--out", str(out)]) == 0
    frame = pd.read_csv(out, keep_default_na=False)
    for column in ("id", "theta", "se", "scale_score", "scale_se", "items_answered", "flags"):
        assert column in frame.columns
    bundle = DirectoryStore(store_dir).get("skills", 1)
    scorer = BundleScorer(bundle)
    raw = pd.read_csv(data)
    x = raw[list(scorer.item_ids)].to_numpy(dtype=float)
    direct = eap_scores(scorer.plans["all"].params, x, grid=QuadratureGrid(), prior=NormalPrior())
    assert (frame["group"] == "all").all() and (frame["excluded_items"] == "").all()
    # The CSV keeps 6 decimals.
    np.testing.assert_allclose(frame["theta"], direct.theta, atol=5e-7)
    np.testing.assert_allclose(frame["se"], direct.se, atol=5e-7)
    assert (frame["items_answered"] == (~np.isnan(x)).sum(axis=1)).all()


def test_score_error_late_in_a_large_file_leaves_the_output_untouched(
    published: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    # The file is scored in batches; a bad cell in its last rows must not leave a partial output.
    data, store_dir = published
    frame = pd.concat([pd.read_csv(data, dtype=str, keep_default_na=False)] * 50, ignore_index=True)
    frame["id"] = [f"p{i}" for i in range(len(frame))]
    frame.loc[len(frame) - 2, "DOC03"] = "yes"
    bad = tmp_path / "late.csv"
    frame.to_csv(bad, index=False)
    out = tmp_path / "scores.csv"
    out.write_text("earlier scores\n")
    args = ["score", str(bad), "--bundle", "skills@1", "--store", str(store_dir), "--out", str(out)]
    assert main(args) == 2
    assert f"row {len(frame) - 1} (line {len(frame)}), column 'DOC03': value 'yes'" in capsys.readouterr().err
    assert out.read_text() == "earlier scores\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["late.csv", "scores.csv"]


def test_bad_cell_exits_2_names_the_cell_and_publishes_nothing(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    data = tmp_path / "bad.csv"
    frame = make_demo_responses(100, seed=1, with_sites=False).astype(str)
    frame.loc[41, "DOC03"] = "yes"
    frame.to_csv(data, index=False)
    store_dir = tmp_path / "store"
    assert main(["calibrate", str(data), "--name", "skills", "--store", str(store_dir)]) == 2
    err = capsys.readouterr().err
    assert "row 42 (line 43), column 'DOC03': value 'yes'" in err
    assert DirectoryStore(store_dir).names() == []


def test_too_few_respondents_is_a_clear_error(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    data = tmp_path / "small.csv"
    make_demo_responses(30, seed=2, with_sites=False).to_csv(data, index=False)
    assert main(["calibrate", str(data), "--name", "s", "--store", str(tmp_path / "st")]) == 2
    assert "30 respondents; a calibration needs at least 50" in capsys.readouterr().err


def test_item_without_variance_is_left_out_and_reported(tmp_path: Path) -> None:
    data = tmp_path / "flat.csv"
    frame = make_demo_responses(600, seed=3, with_sites=False)
    frame["NUM01"] = 1
    frame.to_csv(data, index=False)
    assert main(["calibrate", str(data), "--name", "flat", "--store", str(tmp_path / "st")]) == 0
    bundle = DirectoryStore(tmp_path / "st").get("flat", 1)
    assert [e.id for e in bundle.excluded_items] == ["NUM01"]
    assert "no variance: all 600 respondents who answered gave category 1" in bundle.excluded_items[0].reason
    assert any("NUM01" in w for w in bundle.quality.warnings)


def test_unknown_bundle_exits_3(published: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    data, store_dir = published
    code = main(["score", str(data), "--bundle", "skills@7", "--store", str(store_dir), "--out", str(tmp_path / "o")])
    assert code == 3
    assert "bundle 'skills' has no version 7" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_bundle_list_show_alias(published: tuple[Path, Path], capsys: pytest.CaptureFixture) -> None:
    _, store_dir = published
    assert main(["bundle", "alias", "skills@1", "production", "--store", str(store_dir)]) == 0
    assert main(["bundle", "list", "--store", str(store_dir)]) == 0
    listing = capsys.readouterr().out
    assert "skills" in listing and "production -> 1" in listing
    assert main(["bundle", "show", "skills@production", "--store", str(store_dir)]) == 0
    shown = capsys.readouterr().out
    assert "NUM01" in shown and "aliases of skills and their moves" in shown and "command line (" in shown
    assert main(["bundle", "alias", "skills", "production", "--store", str(store_dir)]) == 2


def test_demo_runs_end_to_end(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["demo", "--out", str(tmp_path), "--respondents", "600"]) == 0
    scores = pd.read_csv(tmp_path / "tidewater_skills_scores.csv")
    assert len(scores) == 600
    store = DirectoryStore(tmp_path / "store")
    assert store.aliases("tidewater-skills")["production"].version == 1
    second = store.get("tidewater-skills", 2)  # the next intake, linked to the first version's scale
    assert second.link is not None and second.link.parent == "tidewater-skills@1"
    assert second.link.new_items == ["NUM09", "DIG09"]
    out = capsys.readouterr().out
    assert "measurement error" in out and "tidewater-skills@1 -> tidewater-skills@2: both on the scale" in out
    assert (tmp_path / "tidewater_skills_report.html").read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    sites = pd.read_csv(tmp_path / "tidewater_skills_site_summaries.csv")
    assert sorted(sites["group"]) == ["marsh-creek", "port-ellery", "ridgeview"] and sites["n"].sum() == 600
    assert "plausible values" in out


def test_calibrate_link_to_prints_the_link_and_refuses_what_it_cannot_do(
    published: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    # The invented second cycle (two new tasks, DOC03 drifted) linked to skills@1 of the fixture.
    _, store_dir = published
    store = DirectoryStore(store_dir)
    second = tmp_path / "second.csv"
    make_demo_responses(800, seed=6, with_sites=False, cycle=2).to_csv(second, index=False)
    base = ["calibrate", str(second), "--name", "skills", "--store", str(store_dir)]
    before = store.versions("skills")
    assert main([*base, "--link-to", "skills@9"]) == 3  # no such parent: nothing is calibrated
    assert "has no version 9" in capsys.readouterr().err
    assert main([*base, "--link-to", "skills@1", "--report-mean", "250"]) == 2
    assert "reporting scale" in capsys.readouterr().err
    assert store.versions("skills") == before
    assert main([*base, "--link-to", "skills@1", "--link-method", "haebara"]) == 0
    out = capsys.readouterr().out
    assert "on the scale of skills@1 (haebara link" in out and "drift of the common items" in out
    linked = store.get("skills", store.versions("skills")[-1])
    assert linked.link is not None and linked.link.new_items == ["NUM09", "DIG09"]
    assert main(["bundle", "show", linked.label, "--store", str(store_dir)]) == 0
    assert "kept out for drift" in capsys.readouterr().out
    assert main(["bundle", "diff", "skills@1", linked.label, "--store", str(store_dir)]) == 0
    diff = capsys.readouterr().out
    assert f"skills@1 -> {linked.label}: both on the scale of skills@1" in diff and "NUM09" in diff


def test_summarize_writes_groups_and_differences(
    published: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    # skills@1 is a single-group bundle: the site column then holds reporting groups of any name.
    _, store_dir = published
    data = tmp_path / "sites.csv"
    make_demo_responses(900, seed=8).to_csv(data, index=False)
    out = tmp_path / "summary.csv"
    base = ["summarize", str(data), "--bundle", "skills@1", "--store", str(store_dir), "--out", str(out)]
    assert main([*base, "--group-column", "site", "--percentiles", "25,75"]) == 0
    printed = capsys.readouterr().out
    cells = pd.read_csv(out)
    differences = pd.read_csv(tmp_path / "summary_differences.csv")
    assert sorted(cells["group"]) == ["marsh-creek", "port-ellery", "ridgeview"] and cells["n"].sum() == 900
    assert {"mean", "se", "ci_low", "ci_high", "sd", "p25", "p75", "plausible_values", "seed"} <= set(cells.columns)
    assert len(differences) == 3 and "Rubin's rules" in printed and "describe groups, not individuals" in printed
    assert main([*base, "--group-column", "region"]) == 2  # no such column: named, nothing written
    assert "no group column 'region'" in capsys.readouterr().err
