"""What a new user meets in the first hour: each test pins one defect of the first-contact review.

Data here are invented (the demo's generator) unless a test says otherwise; the real open
data sets are exercised in ``test_real_data.py``.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibration.bundle import DirectoryStore
from calibration.bundle.canonical import from_bytes
from calibration.bundle.scorer import BundleScorer
from calibration.cli import main
from calibration.demo import make_demo_responses
from calibration.io import read_responses
from calibration.pipeline import PipelineSettings, PolicyOverride, calibrate_data

DATA = Path(__file__).resolve().parents[1] / "data"


def _old_store(root: Path) -> None:
    """A store holding the schema-1 bundle file as an older equitheta wrote it."""
    (root / "two-regions").mkdir(parents=True)
    (root / "two-regions" / "v000001.json").write_bytes((DATA / "bundle_schema_v1.json").read_bytes())


@pytest.fixture(scope="module")
def dif_free(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Three invented sites, no item built to function differently (the common case)."""
    path = tmp_path_factory.mktemp("nodif") / "nodif.csv"
    make_demo_responses(1500, seed=4, with_dif=False).to_csv(path, index=False)
    return path


def test_dif_free_groups_through_the_cli_exit_0_and_print_dashes(
    dif_free: Path, tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    # Before: the partial rung has no LR p value and the printer died with a TypeError after publishing.
    store = tmp_path / "store"
    assert (
        main(
            [
                "calibrate",
                str(dif_free),
                "--name",
                "nodif",
                "--store",
                str(store),
                "--group-column",
                "site",
                "--reference-group",
                "port-ellery",
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    bundle = DirectoryStore(store).get("nodif", 1)
    partial = next(r for r in bundle.invariance if r.model == "partial")
    if partial.df == 0:  # nothing flagged: the partial model is the scalar model
        assert "vs scalar: same model (no cell freed)" in out
    assert "invariance ladder" in out and "published nodif@1" in out


def test_the_summary_is_rendered_before_the_store_is_touched(
    dif_free: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import calibration.cli.calibrate as command

    def broken(bundle: object) -> None:
        raise RuntimeError("printer failed")

    monkeypatch.setattr(command, "print_calibration_summary", broken)
    store = tmp_path / "store"
    with pytest.raises(RuntimeError, match="printer failed"):
        main(
            [
                "calibrate",
                str(dif_free),
                "--name",
                "nodif",
                "--store",
                str(store),
                "--group-column",
                "site",
                "--alias",
                "production",
            ]
        )
    assert DirectoryStore(store).names() == []  # nothing published, no alias moved


def test_small_group_is_calibrated_with_warnings_and_refused_only_below_the_floor(tmp_path: Path) -> None:
    frame = make_demo_responses(900, seed=12)
    frame.loc[frame.index[:70], "site"] = "outpost"  # a real-sized small group of 70
    path = tmp_path / "small.csv"
    frame.to_csv(path, index=False)
    outcome = calibrate_data(read_responses(path, group_column="site"), name="small", reference_group="port-ellery")
    warnings = " ".join(outcome.bundle.quality.warnings)
    assert "group 'outpost': 70 respondents is below the common floor of about 500" in warnings
    assert "DIF tests have low power" in warnings and "Mantel-Haenszel strata are sparse" in warnings
    assert any(g.name == "outpost" and g.n_respondents == 70 for g in outcome.bundle.metric.groups)


def test_no_cell_is_called_large_unless_its_whole_interval_is(dif_free: Path) -> None:
    bundle = calibrate_data(
        read_responses(dif_free, group_column="site"), name="nodif", reference_group="port-ellery"
    ).bundle
    assert bundle.dif is not None
    settings = bundle.dif.settings
    for row in bundle.dif.irt:
        assert row.effect_theta_se is not None and row.effect_theta_se > 0
        low = max(row.effect_theta - 1.96 * row.effect_theta_se, 0.0)
        if row.level == "large":
            assert low >= settings.effect_large
        if row.level == "negligible":
            assert row.effect_theta + 1.96 * row.effect_theta_se < settings.effect_moderate
    assert "95% interval" in bundle.dif.effect_levels


def test_anchors_do_not_depend_on_the_column_order(tmp_path: Path) -> None:
    frame = make_demo_responses(1800, seed=21)
    forward, backward = tmp_path / "forward.csv", tmp_path / "backward.csv"
    frame.to_csv(forward, index=False)
    items = [c for c in frame.columns if c not in ("id", "site")]
    frame[["id", "site", *items[::-1]]].to_csv(backward, index=False)
    one = calibrate_data(read_responses(forward, group_column="site"), name="f", reference_group="port-ellery").bundle
    two = calibrate_data(read_responses(backward, group_column="site"), name="b", reference_group="port-ellery").bundle
    assert sorted(one.anchors.items) == sorted(two.anchors.items)
    assert one.anchors.items != items[: len(one.anchors.items)]  # not simply the first columns
    # The stored ranking rebuilds the choice: the selected items are the first k, in the same order.
    ranking = one.anchors.ranking
    assert [c.rank for c in ranking] == list(range(1, len(items) + 1))
    assert {c.item for c in ranking if c.selected} == set(one.anchors.items)
    assert all(c.selected for c in ranking[: len(one.anchors.items)])
    assert [c.item for c in ranking] == [c.item for c in two.anchors.ranking]
    statistics = [c.statistic for c in ranking if c.statistic is not None]
    assert statistics == sorted(statistics)
    for item in one.items:  # the results do not move either (same data, other order)
        other = next(i for i in two.items if i.id == item.id)
        assert item.slope == pytest.approx(other.slope, abs=1e-4)


def test_few_items_with_dirty_anchors_says_so(tmp_path: Path) -> None:
    # Five items, three with DIF in one focal group: the rule asks for 4 anchors, only 2 are clean.
    rng = np.random.default_rng(31)
    n = 700
    slopes = np.array([1.2, 1.0, 1.4, 0.9, 1.1])
    b = np.array([-0.8, -0.2, 0.1, 0.5, 0.9])
    site = np.repeat(["east", "west"], n)
    theta = rng.normal(0.0, 1.0, 2 * n)
    shift = np.where(site[:, None] == "west", np.array([0.0, 0.0, 1.0, -1.0, 1.0]), 0.0)
    p = 1 / (1 + np.exp(-slopes * (theta[:, None] - b - shift)))
    x = (rng.random(p.shape) < p).astype(int)
    frame = pd.DataFrame(x, columns=[f"Q{j + 1}" for j in range(5)])
    frame.insert(0, "site", site)
    frame.insert(0, "id", [f"P{i}" for i in range(2 * n)])
    path = tmp_path / "five.csv"
    frame.to_csv(path, index=False)
    bundle = calibrate_data(read_responses(path, group_column="site"), name="five", reference_group="east").bundle
    warnings = " ".join(bundle.quality.warnings)
    assert "but the anchor rule asks for 4" in warnings
    assert "anchor items that the screening found significant" in warnings


def test_few_items_is_judged_against_the_items_open_to_the_group(tmp_path: Path) -> None:
    # Five items, so the minimum is min(5, 5) = 5; one item is left out for "west" by a reviewer.
    rng = np.random.default_rng(5)
    theta = rng.normal(size=800)
    p = 1 / (1 + np.exp(-(theta[:, None] - np.linspace(-1, 1, 5))))
    frame = pd.DataFrame((rng.random(p.shape) < p).astype(int), columns=[f"Q{j + 1}" for j in range(5)])
    frame.insert(0, "site", np.repeat(["east", "west"], 400))
    frame.insert(0, "id", [f"P{i}" for i in range(800)])
    path = tmp_path / "five.csv"
    frame.to_csv(path, index=False)
    override = [PolicyOverride("Q3", "west", "excluded", "the item's picture differs in the west edition")]
    bundle = calibrate_data(
        read_responses(path, group_column="site"), name="five", reference_group="east", overrides=override
    ).bundle
    assert bundle.scoring.min_items_answered == 5
    scorer = BundleScorer(bundle)
    x = frame[[f"Q{j + 1}" for j in range(5)]].to_numpy(dtype=float).copy()
    result = scorer.score(x, list(frame["site"]))
    west = frame["site"].to_numpy() == "west"
    assert not any("few_items" in result.flags[i] for i in np.flatnonzero(west))  # before: every west respondent
    x[0, :2] = np.nan  # an east respondent with 3 of 5 items is still flagged
    assert "few_items" in scorer.score(x[:1], ["east"]).flags[0]


def test_an_ml_theta_held_at_the_bound_is_flagged_unless_the_pattern_is_extreme(tmp_path: Path) -> None:
    # Independent route: scipy's bounded minimiser on the 2PL likelihood written out with the bundle's item
    # parameters, over [-30, 30]: every one of the 32 patterns whose maximum lies beyond the bound (1.5 here)
    # and that is not all-wrong or all-right carries theta_at_bound, and no other pattern does.
    from scipy.optimize import minimize_scalar
    from scipy.special import log_expit

    rng = np.random.default_rng(5)
    theta = rng.normal(size=800)
    p = 1 / (1 + np.exp(-(theta[:, None] - np.linspace(-1, 1, 5))))
    frame = pd.DataFrame((rng.random(p.shape) < p).astype(int), columns=[f"Q{j + 1}" for j in range(5)])
    frame.insert(0, "id", [f"P{i}" for i in range(800)])
    path = tmp_path / "five.csv"
    frame.to_csv(path, index=False)
    bundle = calibrate_data(read_responses(path), name="five").bundle
    narrow = bundle.model_copy(update={"scoring": bundle.scoring.model_copy(update={"ml_bound": 1.5})})
    scorer = BundleScorer(narrow)
    patterns = ((np.arange(32)[:, None] >> np.arange(5)) & 1).astype(float)
    group = next(iter(scorer.plans))
    result = scorer.score(patterns, [group] * 32, method="ml")
    params = scorer.plans[group].params
    a, c = params.slopes, params.intercepts[:, 0]

    def minus_log_lik(t: float, pattern: np.ndarray) -> float:
        z = a * t + c
        return -float(np.sum(pattern * log_expit(z) + (1 - pattern) * log_expit(-z)))

    for pattern, flags, estimate in zip(patterns, result.flags, result.theta, strict=True):
        extreme = pattern.sum() in (0, 5)
        beyond = abs(minimize_scalar(minus_log_lik, bounds=(-30, 30), args=(pattern,), method="bounded").x) > 1.5
        assert ("theta_at_bound" in flags) == (beyond and not extreme)
        assert ("extreme_pattern" in flags) == extreme
        assert abs(estimate) <= 1.5
    assert sum("theta_at_bound" in f for f in result.flags) > 0  # the bound is reached by some patterns
    assert not any("theta_at_bound" in f for f in scorer.score(patterns, [group] * 32, method="eap").flags)


def test_headline_figures_say_whose_they_are(dif_free: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    assert (
        main(
            [
                "calibrate",
                str(dif_free),
                "--name",
                "nodif",
                "--store",
                str(tmp_path / "s"),
                "--group-column",
                "site",
                "--reference-group",
                "port-ellery",
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    assert "reference group port-ellery: alpha" in out
    assert "final model under the item policy: log-likelihood" in out
    assert "not comparable with the invariance ladder's" in out


def test_evidence_side_by_side_and_bundle_show_prints_quality(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    data = tmp_path / "demo.csv"
    make_demo_responses(2400, seed=20261201).to_csv(data, index=False)
    store = tmp_path / "store"
    assert (
        main(
            [
                "calibrate",
                str(data),
                "--name",
                "demo",
                "--store",
                str(store),
                "--group-column",
                "site",
                "--reference-group",
                "port-ellery",
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    # The built-in uniform DIF item: the IRT test and MH both see it.
    row = next(line for line in out.splitlines() if "NUM06" in line and "marsh-creek" in line and "MH D-DIF" in line)
    assert "excluded" in row and "agree: DIF" in row
    assert "logistic dR2" in out
    assert main(["bundle", "show", "demo@1", "--store", str(store)]) == 0
    shown = capsys.readouterr().out
    for heading in (
        "item quality in group marsh-creek",
        "alpha if deleted",
        "S-X2 (df)",
        "RMSD",
        "largest eigenvalue of the residual PCA",
        "test information, reference group port-ellery",
        "MH D-DIF",
    ):
        assert heading in shown


def test_output_to_a_file_keeps_full_names_and_progress_goes_to_stderr(tmp_path: Path) -> None:
    frame = make_demo_responses(600, seed=2, with_sites=False)
    frame = frame.rename(columns={"NUM01": "numeracy-unit-conversion-with-local-measures-long-name"})
    data = tmp_path / "long.csv"
    frame.to_csv(data, index=False)
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "calibration.cli",
            "calibrate",
            str(data),
            "--name",
            "long",
            "--store",
            str(tmp_path / "store"),
        ],
        capture_output=True,
        text=True,
        check=False,
        env={**os.environ, "COLUMNS": "80"},
    )
    assert done.returncode == 0, done.stderr
    assert "numeracy-unit-conversion-with-local-measures-long-name" in done.stdout
    assert "\u2026" not in done.stdout  # no ellipsis anywhere
    assert "s] calibrating 24 items, 600 respondents" in done.stderr and "s] done" in done.stderr


def test_semicolon_delimited_file_reads_like_a_comma_one(tmp_path: Path) -> None:
    frame = make_demo_responses(300, seed=6, with_sites=False)
    comma, semicolon = tmp_path / "c.csv", tmp_path / "s.csv"
    frame.to_csv(comma, index=False)
    frame.to_csv(semicolon, index=False, sep=";")
    one, two = read_responses(comma), read_responses(semicolon)
    assert one.item_ids == two.item_ids
    np.testing.assert_array_equal(one.responses, two.responses)


def test_missing_data_code_is_named_as_such(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    frame = make_demo_responses(300, seed=6, with_sites=False)
    frame.loc[[4, 17], "DIG02"] = 99
    data = tmp_path / "codes.csv"
    frame.to_csv(data, index=False)
    assert main(["calibrate", str(data), "--name", "c", "--store", str(tmp_path / "s")]) == 2
    err = capsys.readouterr().err
    assert (
        "item 'DIG02': code 99 (row 5 (line 6), row 18 (line 19)) lies far above the item's other codes 0..3: "
        "it looks like a missing-data code"
    ) in err
    assert "4-98" not in err and "95" not in err  # before: 95 unused categories listed


def test_scoring_a_grouped_bundle_without_group_column_names_the_option(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    _old_store(tmp_path / "store")
    frame = pd.DataFrame({"id": ["a", "b"], "region": ["north", "south"], "Q1": [1, 0], "Q2": [0, 1]})
    path = tmp_path / "new.csv"
    frame.to_csv(path, index=False)
    assert (
        main(
            [
                "score",
                str(path),
                "--bundle",
                "two-regions@1",
                "--store",
                str(tmp_path / "store"),
                "--out",
                str(tmp_path / "o.csv"),
            ]
        )
        == 2
    )
    err = capsys.readouterr().err
    assert "name the column that holds each respondent's group with --group-column" in err
    assert "perhaps --group-column region" in err and "--ignore-columns" not in err


def test_unknown_groups_are_all_listed_with_id_and_line(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    _old_store(tmp_path / "store")
    frame = pd.DataFrame({"id": ["a", "b", "c"], "region": ["north", "west", "east"], "Q1": [1, 0, 1]})
    path = tmp_path / "new.csv"
    frame.to_csv(path, index=False)
    assert (
        main(
            [
                "score",
                str(path),
                "--bundle",
                "two-regions@1",
                "--store",
                str(tmp_path / "store"),
                "--group-column",
                "region",
                "--out",
                str(tmp_path / "o.csv"),
            ]
        )
        == 2
    )
    err = capsys.readouterr().err
    assert "2 respondent(s) with a group that bundle two-regions@1 does not know" in err
    assert "row 2 (line 3), id 'b', column 'region': group 'west' is not in the bundle" in err
    assert "row 3 (line 4), id 'c', column 'region': group 'east' is not in the bundle" in err


def test_unknown_anchor_is_an_input_error_before_any_work(
    dif_free: Path, tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    code = main(
        [
            "calibrate",
            str(dif_free),
            "--name",
            "x",
            "--store",
            str(tmp_path / "s"),
            "--group-column",
            "site",
            "--anchors",
            "NUM01,num02,NOPE",
        ]
    )
    assert code == 2
    err = capsys.readouterr().err
    assert "anchor 'num02' is not an item of the data (did you mean 'NUM02'?)" in err
    assert "anchor 'NOPE' is not an item of the data" in err
    assert "calibrating" not in err  # no progress: nothing was fitted


def test_identical_calibration_is_not_published_twice(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    data = tmp_path / "d.csv"
    make_demo_responses(500, seed=8, with_sites=False).to_csv(data, index=False)
    store = tmp_path / "store"
    args = ["calibrate", str(data), "--name", "same", "--store", str(store)]
    assert main([*args, "--alias", "production"]) == 0
    assert main([*args, "--alias", "production"]) == 0
    assert "identical to the published same@1" in capsys.readouterr().out
    assert DirectoryStore(store).versions("same") == [1]
    assert main([*args, "--republish"]) == 0
    assert DirectoryStore(store).versions("same") == [1, 2]
    assert DirectoryStore(store).aliases("same")["production"].version == 1  # never moved by a no-op


def test_score_file_details(tmp_path: Path) -> None:
    data = tmp_path / "d.csv"
    make_demo_responses(500, seed=8, with_sites=False).to_csv(data, index=False)
    store = tmp_path / "store"
    assert main(["calibrate", str(data), "--name", "d", "--store", str(store)]) == 0
    out = tmp_path / "scores.csv"
    previous = os.umask(0o022)
    try:
        assert main(["score", str(data), "--bundle", "d", "--store", str(store), "--out", str(out)]) == 0
    finally:
        os.umask(previous)
    assert out.stat().st_mode & 0o777 == 0o644  # before: 0600 whatever the umask
    text = out.read_text().splitlines()
    header = text[0].split(",")
    assert "person_fit_lz_star" in header
    first = dict(zip(header, text[1].split(","), strict=True))
    assert first["scale_score"].isdigit()  # 0 decimals: "379", not "379.000000"
    assert len(first["scale_se"].split(".")[1]) == 1  # the SE keeps one more place
    frame = pd.read_csv(out, keep_default_na=False)
    misfit = frame["flags"].str.contains("person_misfit")
    assert (frame.loc[misfit, "person_fit_lz_star"] < -1.645).all()


def test_serve_without_the_service_extras_says_what_to_install(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture
) -> None:
    monkeypatch.setitem(sys.modules, "fastapi", None)  # as if the extra were not installed
    assert main(["serve", "--store", "somewhere"]) == 2
    assert "pip install 'equitheta[service]'" in capsys.readouterr().err


def test_help_and_version_load_no_numerical_package() -> None:
    probe = (
        "import sys, contextlib, io\n"
        "from calibration.cli import main\n"
        "with contextlib.suppress(SystemExit), contextlib.redirect_stdout(io.StringIO()):\n"
        "    main(['--version'])\n"
        "with contextlib.suppress(SystemExit), contextlib.redirect_stdout(io.StringIO()):\n"
        "    main(['calibrate', '--help'])\n"
        "print(sorted(m for m in ('numpy', 'pandas', 'scipy', 'pydantic') if m in sys.modules))\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]"


def test_options_show_help_and_defaults() -> None:
    done = subprocess.run(
        [sys.executable, "-m", "calibration.cli", "calibrate", "--help"],
        capture_output=True,
        text=True,
        check=True,
        env={**os.environ, "COLUMNS": "200"},
    )
    assert "--report-mean REPORT_MEAN" in done.stdout and "(default: 500.0)" in done.stdout
    assert "--min-group-size" in done.stdout and "(default: 30)" in done.stdout
    assert "--scale-location" not in done.stdout


def test_schema_1_bundles_still_read(tmp_path: Path) -> None:
    # A bundle written by the schema-1 code (invented data): it verifies against its own bytes and
    # reads with the renamed fields.
    bundle = from_bytes((DATA / "bundle_schema_v1.json").read_bytes(), source="bundle_schema_v1.json")
    assert bundle.schema_version == "1"
    assert bundle.dif is not None and {r.dif_class for r in bundle.dif.observed} <= {"A", "B-", "B+", "C-", "C+"}
    south = bundle.quality.by_group["south"].dimensionality
    assert south is not None and south.residual_pca_first_eigenvalue is not None
    assert BundleScorer(bundle).plans["south"].columns.size == len(bundle.items) - 1
    assert PipelineSettings().min_group_size == 30


def test_runaway_estimates_are_refused_naming_the_item_and_nothing_is_published(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    # Invented data: Q0 is a deterministic step function of the other items, so its ML slope runs away.
    rng = np.random.default_rng(3)
    theta = rng.normal(size=1500)
    p = 1 / (1 + np.exp(-(theta[:, None] - np.linspace(-1, 1, 7))))
    x = (rng.random(p.shape) < p).astype(int)
    frame = pd.DataFrame(np.column_stack([(x.sum(axis=1) >= 4).astype(int), x]), columns=[f"Q{j}" for j in range(8)])
    frame.insert(0, "id", range(1500))
    data = tmp_path / "step.csv"
    frame.to_csv(data, index=False)
    store = tmp_path / "store"
    assert main(["calibrate", str(data), "--name", "step", "--store", str(store), "--max-iter", "300"]) == 2
    err = capsys.readouterr().err
    assert "cannot be published (item 'Q0': slope" in err and "is outside -20..20" in err
    assert "include=no" in err
    assert DirectoryStore(store).names() == []
