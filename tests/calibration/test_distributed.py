"""Scoring on Dask (a real dask.distributed LocalCluster of 2 worker processes) against in-process scoring.

The outside reference is the in-process `equitheta score` of the same file (itself checked against
quadrature elsewhere): the CSV output must be byte-identical, the Parquet output equal to the printed
digits. Bad cells and repeated ids are named by file, partition and row; a worker killed mid-job leaves
Dask to rerun its tasks and the output complete.
"""

from __future__ import annotations

import os
import re
import signal
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

distributed = pytest.importorskip("distributed")

from calibration.bundle import DirectoryStore  # noqa: E402
from calibration.cli import main  # noqa: E402
from calibration.distributed.scoring import score_file_on_dask  # noqa: E402
from calibration.errors import InputError  # noqa: E402
from tests.helpers import example_bundle  # noqa: E402

ITEMS = [f"T{j}" for j in range(1, 7)]


def responses(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    answers = rng.integers(0, 2, size=(n, 6)).astype(float)
    answers[rng.random(answers.shape) < 0.1] = np.nan
    frame = pd.DataFrame(answers, columns=ITEMS).astype("Int64")
    frame.insert(0, "mode", np.where(rng.random(n) < 0.5, "paper", "tablet"))
    frame.insert(0, "id", [f"r{i:06d}" for i in range(n)])
    return frame


@pytest.fixture(scope="module")
def cluster() -> Iterator[str]:
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as local:
        yield local.scheduler_address


@pytest.fixture
def store(tmp_path: Path) -> Path:
    path = tmp_path / "store"
    DirectoryStore(path).put_version(example_bundle())
    return path


def in_process(path: Path, store: Path, out: Path) -> pd.DataFrame:
    args = ["score", str(path), "--bundle", "pantry-checkout", "--store", str(store), "--group-column", "mode"]
    assert main([*args, "--out", str(out)]) == 0
    return pd.read_csv(out, keep_default_na=False)


def test_csv_partitions_score_byte_for_byte_as_in_process(tmp_path: Path, store: Path, cluster: str) -> None:
    data = tmp_path / "answers.csv"
    responses(6000, 1).to_csv(data, index=False)
    in_process(data, store, tmp_path / "local.csv")
    bundle = DirectoryStore(store).get("pantry-checkout", 1)
    seen = []
    result = score_file_on_dask(
        data,
        bundle,
        tmp_path / "dask.csv",
        scheduler=cluster,
        partition_bytes=20_000,
        progress=lambda done, total: seen.append((done, total)),
        group_column="mode",
    )
    assert result.n_partitions >= 5 and seen[-1] == (result.n_partitions, result.n_partitions)
    assert (tmp_path / "dask.csv").read_bytes() == (tmp_path / "local.csv").read_bytes()
    assert result.n_rows == 6000
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no parts left behind


def test_parquet_row_groups_score_as_in_process(tmp_path: Path, store: Path, cluster: str) -> None:
    data = tmp_path / "answers.parquet"
    responses(5000, 2).to_parquet(data, index=False, row_group_size=700)
    local = in_process(data, store, tmp_path / "local.csv")
    bundle = DirectoryStore(store).get("pantry-checkout", 1)
    result = score_file_on_dask(
        data, bundle, tmp_path / "scores", scheduler=cluster, partition_rows=1500, group_column="mode"
    )
    assert result.n_partitions == 3  # 8 row groups of 700 (the last 100) gathered to at least 1,500 rows
    parts = sorted((tmp_path / "scores").glob("part-*.parquet"))
    assert len(parts) == 3
    scored = pd.concat([pd.read_parquet(p) for p in parts], ignore_index=True)
    assert list(scored["id"]) == list(local["id"])
    np.testing.assert_allclose(scored["theta"], local["theta"], atol=5e-7)  # the CSV prints 6 decimals
    np.testing.assert_allclose(scored["se"], local["se"], atol=5e-7)
    assert list(scored["excluded_items"].fillna("")) == list(local["excluded_items"])
    assert (scored["items_answered"] == local["items_answered"]).all()


def test_bad_cells_and_repeated_ids_are_named_by_partition_and_row(tmp_path: Path, store: Path, cluster: str) -> None:
    frame = responses(3000, 3)
    frame["T2"] = frame["T2"].astype(object)
    frame.loc[2500, "T2"] = "x"
    frame.loc[2600, "T4"] = 7
    data = tmp_path / "bad.csv"
    frame.to_csv(data, index=False)
    bundle = DirectoryStore(store).get("pantry-checkout", 1)
    out = tmp_path / "never.csv"
    with pytest.raises(InputError) as err:
        score_file_on_dask(data, bundle, out, scheduler=cluster, partition_bytes=15_000, group_column="mode")
    text = str(err.value)
    assert "bad.csv, partition" in text and "column 'T2'" in text and "column 'T4'" in text
    assert "rows counted from the partition's start" in text
    assert not out.exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".")]

    repeated = responses(3000, 4)
    repeated.loc[2900, "id"] = repeated.loc[10, "id"]
    data = tmp_path / "twice.csv"
    repeated.to_csv(data, index=False)
    with pytest.raises(
        InputError, match=r"id 'r000010' appears 2 times: twice.csv, partition 1 of \d+ .*row 11"
    ) as err:
        score_file_on_dask(data, bundle, out, scheduler=cluster, partition_bytes=15_000, group_column="mode")
    assert not out.exists()
    # The workers send a hash per id; only the partitions holding a repeated hash are read again, for the ids.
    second = re.search(r" and twice.csv, partition (\d+) of \d+.*?row (\d+)", str(err.value))
    assert second is not None and int(second.group(1)) > 1


def test_a_killed_worker_leaves_a_complete_output(tmp_path: Path, store: Path) -> None:
    # A worker process is killed (SIGKILL) while the job runs; its nanny starts a new one and the
    # scheduler runs the lost tasks again. Every id appears exactly once in the output.
    data = tmp_path / "answers.csv"
    responses(60_000, 5).to_csv(data, index=False)
    bundle = DirectoryStore(store).get("pantry-checkout", 1)
    killed = []
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as local:
        pids = [nanny.process.process.pid for nanny in local.workers.values()]

        def kill_one(done: int, total: int) -> None:
            if done == 2 and not killed:
                os.kill(pids[0], signal.SIGKILL)
                killed.append(pids[0])

        result = score_file_on_dask(
            data,
            bundle,
            tmp_path / "scores",
            scheduler=local.scheduler_address,
            partition_bytes=40_000,
            progress=kill_one,
            group_column="mode",
        )
    assert killed and result.n_partitions > 10
    scored = pd.concat([pd.read_parquet(p) for p in sorted((tmp_path / "scores").glob("part-*.parquet"))])
    assert len(scored) == 60_000 and scored["id"].is_unique
    assert set(scored["id"]) == {f"r{i:06d}" for i in range(60_000)}


def test_calibration_on_dask_equals_in_process(tmp_path: Path, cluster: str) -> None:
    # A 2-group calibration (2PL and graded items, 5% missing) with the E-step and the SEs summed over
    # 6 partitions of the file held by 2 workers, against calibrate_groups on the whole table in this
    # process: the same estimates, latent densities and SEs to 1e-6.
    from calibration.distributed.calibration import calibrate_file_on_dask
    from calibration.estimation import EMSettings, calibrate_groups
    from tests.helpers import simulate_responses

    rng = np.random.default_rng(8)
    n, items = 4000, 6
    a = rng.uniform(0.8, 1.8, items)
    b = np.full((items, 2), np.nan)
    b[:3, 0] = rng.normal(0, 1, 3)
    b[3:] = np.sort(rng.normal(0, 1, (3, 2)), axis=1)
    groups = np.where(rng.random(n) < 0.45, "north", "south")
    x = simulate_responses(a, b, rng.normal(size=n) + 0.4 * (groups == "north"), rng)
    x[rng.random(x.shape) < 0.05] = np.nan
    frame = pd.DataFrame(x, columns=[f"I{j}" for j in range(items)]).astype("Int64")
    frame.insert(0, "region", groups)
    frame.insert(0, "id", [f"p{i}" for i in range(n)])
    data = tmp_path / "calibration.csv"
    frame.to_csv(data, index=False)
    settings = EMSettings(tolerance=1e-7)
    with distributed.Client(cluster) as client:
        result = calibrate_file_on_dask(
            client, data, group_column="region", reference_group="south", settings=settings, partition_bytes=10_000
        )
    assert result.n_partitions >= 5 and result.group_names == ("south", "north")
    k = np.array([2, 2, 2, 3, 3, 3])
    np.testing.assert_array_equal(result.n_categories, k)
    local = calibrate_groups(x, k, (groups == "north").astype(np.int64), 2, settings=settings)
    fit = result.fit
    np.testing.assert_allclose(fit.tables, local.tables, atol=1e-6)
    np.testing.assert_allclose(fit.latent_mean, local.latent_mean, atol=1e-6)
    np.testing.assert_allclose(fit.latent_sd, local.latent_sd, atol=1e-6)
    np.testing.assert_allclose(fit.slot_se, local.slot_se, atol=1e-6)
    assert fit.log_likelihood == pytest.approx(local.log_likelihood, abs=1e-6)
    assert fit.n_persons == n


def test_without_the_dask_extra_the_command_says_what_to_install(
    tmp_path: Path, store: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import sys

    data = tmp_path / "answers.csv"
    responses(50, 6).to_csv(data, index=False)
    monkeypatch.setitem(sys.modules, "dask.distributed", None)  # as if the extra were not installed
    args = ["score", str(data), "--bundle", "pantry-checkout", "--store", str(store), "--group-column", "mode"]
    assert main([*args, "--out", str(tmp_path / "s.csv"), "--engine", "dask"]) == 2
    assert "pip install 'equitheta[dask]'" in capsys.readouterr().err
    assert not (tmp_path / "s.csv").exists()


def dif_file(path: Path, n: int, seed: int) -> Path:
    """Two sites, 2PL and graded items, 5% missing; item I2 is easier for site 'north' (uniform DIF)."""
    from tests.helpers import simulate_responses

    rng = np.random.default_rng(seed)
    a = np.array([1.2, 0.9, 1.5, 1.1, 1.3, 0.8, 1.0])
    b = np.full((7, 2), np.nan)
    b[:4, 0] = [-0.5, 0.2, 0.0, 0.8]
    b[4:] = [[-0.8, 0.4], [-0.2, 0.9], [-1.0, 0.1]]
    sites = np.where(rng.random(n) < 0.4, "north", "south")
    x = simulate_responses(a, b, rng.normal(size=n) + 0.3 * (sites == "north"), rng)
    easier = (sites == "north") & (rng.random(n) < 0.3)
    x[easier, 2] = 1.0
    x[rng.random(x.shape) < 0.05] = np.nan
    frame = pd.DataFrame(x, columns=[f"I{j}" for j in range(7)]).astype("Int64")
    frame.insert(0, "site", sites)
    frame.insert(0, "id", [f"p{i:05d}" for i in range(n)])
    frame.to_csv(path, index=False)
    return path


def numbers_apart(a: object, b: object, path: str = "") -> list[tuple[str, object, object]]:
    """Every place where two bundle dumps differ (numbers by more than 1e-6), apart from the time stamp."""
    if isinstance(a, dict) and isinstance(b, dict):
        keys = (set(a) | set(b)) - {"created_at"}
        return [d for k in sorted(keys) for d in numbers_apart(a.get(k), b.get(k), f"{path}/{k}")]
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        return [d for i, (u, v) in enumerate(zip(a, b, strict=True)) for d in numbers_apart(u, v, f"{path}[{i}]")]
    if isinstance(a, float) and isinstance(b, float):
        return [] if abs(a - b) <= 1e-6 else [(path, a, b)]
    return [] if a == b else [(path, a, b)]


def test_the_calibration_pipeline_on_dask_equals_in_process(tmp_path: Path, cluster: str) -> None:
    # The whole calibration (checks, DIF screening and tests, anchors, ladder, policy, the final fit with
    # SEs, quality) with the file held in 6+ partitions by 2 workers and an evidence sample that holds
    # every respondent, against calibrate_data on the file read in this process: the same unpublished
    # bundle (no hash yet), every number to 1e-6, apart from the time stamp.
    from calibration.distributed.calibration import DaskTable
    from calibration.estimation import EMSettings
    from calibration.io import read_responses
    from calibration.pipeline import PipelineSettings, calibrate_data

    data = dif_file(tmp_path / "sites.csv", 3000, 11)
    settings = PipelineSettings(em=EMSettings(tolerance=1e-7))
    local = calibrate_data(read_responses(data, group_column="site"), name="sites", settings=settings)
    with distributed.Client(cluster) as client:
        table = DaskTable.open(client, data, group_column="site", partition_bytes=8_000)
        assert len(table.partitions) >= 6 and table.group_sizes["south"] + table.group_sizes["north"] == 3000
        sample = table.sample(None)
        assert table.sample_record is None and sample.ids == tuple(f"p{i:05d}" for i in range(3000))
        spread = calibrate_data(
            sample, name="sites", settings=settings, reference_group=table.largest_group(), whole=table
        )
    assert [i.id for i in local.bundle.items if i.policy["north"].status != "invariant"] == ["I2"]  # DIF found
    assert numbers_apart(local.bundle.model_dump(mode="json"), spread.bundle.model_dump(mode="json")) == []


def test_evidence_on_a_sample_and_the_final_fit_on_every_respondent(tmp_path: Path, cluster: str) -> None:
    # About 600 of each site's respondents carry the DIF stage and the quality checks; the final fit runs
    # on all 6,000. Its estimates must equal calibrate_groups on the whole table in this process with the
    # bundle's policy applied (excluded cells not administered), to 1e-5 (both converged to 1e-8).
    from calibration.distributed.calibration import DaskTable
    from calibration.estimation import EMSettings, calibrate_groups
    from calibration.io import read_responses
    from calibration.pipeline import PipelineSettings, calibrate_data

    data = dif_file(tmp_path / "sites.csv", 6000, 12)
    settings = PipelineSettings(em=EMSettings(tolerance=1e-8))
    with distributed.Client(cluster) as client:
        table = DaskTable.open(client, data, group_column="site", partition_bytes=20_000)
        sample = table.sample(600, seed=5)
        again = table.sample(600, seed=5)
        outcome = calibrate_data(sample, name="sites", settings=settings, reference_group="south", whole=table)
    assert sample.ids == again.ids and 900 < sample.n_persons < 1500
    bundle = outcome.bundle
    assert bundle.provenance.n_respondents == 6000
    assert bundle.provenance.n_respondents_by_group == table.group_sizes
    assert "600" in str(bundle.provenance.settings["evidence_sample"])
    assert any("random sample of" in w and "every respondent" in w for w in bundle.quality.warnings)
    whole = read_responses(data, group_column="site")
    north = np.array([g == "north" for g in whole.groups or ()])
    x = whole.responses.copy()
    assert [i.n_responses for i in bundle.items] == list(np.sum(~np.isnan(whole.responses), axis=0))
    for item in bundle.items:
        if item.policy["north"].status == "excluded":
            x[north, whole.item_ids.index(item.id)] = np.nan
    fit = calibrate_groups(x, whole.n_categories, north.astype(np.int64), 2, settings=EMSettings(tolerance=1e-8))
    np.testing.assert_allclose(outcome.fit.tables[0], fit.tables[0], atol=1e-5)
    np.testing.assert_allclose(outcome.fit.latent_mean, fit.latent_mean, atol=1e-5)
    np.testing.assert_allclose(outcome.fit.slot_se[0], fit.slot_se[0], rtol=1e-4)
    assert outcome.fit.n_persons == 6000


def test_calibrate_command_on_dask(tmp_path: Path, cluster: str, capsys: pytest.CaptureFixture[str]) -> None:
    data = dif_file(tmp_path / "sites.csv", 2000, 13)
    common = ["calibrate", str(data), "--name", "sites", "--group-column", "site"]
    assert main([*common, "--store", str(tmp_path / "here")]) == 0
    assert main([*common, "--store", str(tmp_path / "there"), "--engine", "dask", "--scheduler", cluster]) == 0
    here = DirectoryStore(tmp_path / "here").get("sites", 1).model_dump(mode="json")
    there = DirectoryStore(tmp_path / "there").get("sites", 1).model_dump(mode="json")
    assert [d[0] for d in numbers_apart(here, there)] == ["/hash"]
    capsys.readouterr()
    link = [*common, "--store", str(tmp_path / "here"), "--engine", "dask", "--link-to", "sites@1"]
    assert main(link) == 2
    assert "--link-to needs the whole file in this process" in capsys.readouterr().err
    assert main([*common, "--store", str(tmp_path / "here"), "--evidence-sample", "500"]) == 2
    assert "--evidence-sample applies only with --engine dask" in capsys.readouterr().err
    assert main([*common, "--store", str(tmp_path / "here"), "--dask-workers", "3"]) == 2  # was ignored
    assert "--dask-workers applies only with --engine dask" in capsys.readouterr().err
    both = ["--engine", "dask", "--scheduler", cluster, "--dask-workers", "3"]
    assert main([*common, "--store", str(tmp_path / "here"), *both]) == 2
    assert "with --scheduler the scheduler's own workers run it" in capsys.readouterr().err
    score = ["score", str(data), "--bundle", "sites", "--store", str(tmp_path / "here"), "--group-column", "site"]
    assert main([*score, "--out", str(tmp_path / "s.csv"), "--scheduler", cluster]) == 2
    assert "--scheduler applies only with --engine dask" in capsys.readouterr().err
    assert not (tmp_path / "s.csv").exists()


def test_a_bad_calibration_file_is_named_by_partition_and_row(tmp_path: Path, cluster: str) -> None:
    from calibration.distributed.calibration import DaskTable

    frame = pd.read_csv(dif_file(tmp_path / "sites.csv", 2000, 14), dtype=str, keep_default_na=False)
    frame.loc[1800, "I3"] = "2.5"
    frame.loc[1900, "site"] = " "
    frame.loc[1950, "id"] = "p00007"
    frame.to_csv(tmp_path / "bad.csv", index=False)
    with distributed.Client(cluster) as client, pytest.raises(InputError) as err:
        DaskTable.open(client, tmp_path / "bad.csv", group_column="site", partition_bytes=8_000)
    text = str(err.value)
    assert "bad.csv, partition" in text and "column 'I3'" in text and "column 'site': no group given" in text
    frame.loc[1800, "I3"], frame.loc[1900, "site"] = "1", "north"
    frame.loc[1500, "I5"] = "9"  # a missing-data code among 0..2: named with its partition
    frame.to_csv(tmp_path / "bad.csv", index=False)
    with distributed.Client(cluster) as client, pytest.raises(InputError) as err:
        DaskTable.open(client, tmp_path / "bad.csv", group_column="site", partition_bytes=8_000)
    assert re.search(r"id 'p00007' appears 2 times: bad.csv, partition 1 of \d+ .*row 8", str(err.value))
    frame.loc[1950, "id"] = "p01950"
    frame.to_csv(tmp_path / "bad.csv", index=False)
    with distributed.Client(cluster) as client, pytest.raises(InputError) as err:
        DaskTable.open(client, tmp_path / "bad.csv", group_column="site", partition_bytes=8_000)
    assert re.search(r"item 'I5': code 9 \(bad.csv, partition \d+ of \d+ .*\) lies far above", str(err.value))


def test_a_worker_killed_during_the_em_leaves_the_fit_complete(tmp_path: Path) -> None:
    # A worker process holding prepared partitions is killed (SIGKILL) after the third EM iteration; its nanny
    # starts a new one and Dask recomputes the lost partitions from the file. The fit ends with the same
    # estimates as calibrate_groups on the whole table in this process (1e-6).
    from calibration.distributed.calibration import DaskTable, Recoding
    from calibration.estimation import EMSettings, calibrate_groups
    from calibration.io import read_responses

    data = dif_file(tmp_path / "sites.csv", 4000, 15)
    settings = EMSettings(tolerance=1e-7)
    killed: list[int] = []
    with (
        distributed.LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as local,
        distributed.Client(local) as client,
    ):
        pids = [nanny.process.process.pid for nanny in local.workers.values()]

        def kill_one(iteration: int, _: float) -> None:
            if iteration >= 3 and not killed:
                os.kill(pids[0], signal.SIGKILL)
                killed.append(pids[0])

        table = DaskTable.open(client, data, group_column="site", partition_bytes=8_000)
        recoding = Recoding(np.arange(7), {}, ("south", "north"))
        k, models = table.template.n_categories, table.template.models
        fit = table.fit(recoding, k, models, settings=settings, progress=kill_one)
    whole = read_responses(data, group_column="site")
    north = np.array([g == "north" for g in whole.groups or ()], dtype=np.int64)
    expected = calibrate_groups(whole.responses, whole.n_categories, north, 2, settings=settings)
    assert killed
    np.testing.assert_allclose(fit.tables, expected.tables, atol=1e-6)
    np.testing.assert_allclose(fit.slot_se, expected.slot_se, atol=1e-6)
