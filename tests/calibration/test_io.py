"""Bad input gets a clear error naming row, column and value; good input reads exactly."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibration.io import InputError, ScoringInput, read_for_scoring, read_item_spec, read_responses


def write(tmp_path: Path, text: str, name: str = "responses.csv") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_reads_codes_and_missing(tmp_path: Path) -> None:
    path = write(tmp_path, "id,Q1,Q2,Q3\na,1,0,2\nb,0,,1\nc,1,1,0\n")
    data = read_responses(path)
    assert data.item_ids == ("Q1", "Q2", "Q3")
    np.testing.assert_array_equal(data.n_categories, [2, 2, 3])
    assert data.models == ("2pl", "2pl", "grm")
    assert np.isnan(data.responses[1, 1])
    assert len(data.source_sha256) == 64


def test_non_numeric_cell_names_row_line_column_and_value(tmp_path: Path) -> None:
    path = write(tmp_path, "id,Q1,Q2\na,1,0\nb,x,1\n")
    with pytest.raises(InputError) as err:
        read_responses(path)
    assert "row 2 (line 3), column 'Q1': value 'x' is not a category code" in str(err.value)


@pytest.mark.parametrize("value", ["-1", "1.5", "inf"])
def test_negative_fractional_or_infinite_codes_are_refused(tmp_path: Path, value: str) -> None:
    path = write(tmp_path, f"id,Q1,Q2\na,1,0\nb,{value},1\nc,0,1\n")
    with pytest.raises(InputError, match=rf"column 'Q1': value '{value}'"):
        read_responses(path)


def test_empty_file_and_header_only(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="the file is empty"):
        read_responses(write(tmp_path, ""))
    with pytest.raises(InputError, match="header but no respondents"):
        read_responses(write(tmp_path, "id,Q1,Q2\n"))


def test_duplicate_ids_name_both_rows(tmp_path: Path) -> None:
    path = write(tmp_path, "id,Q1,Q2\na,1,0\nb,0,1\na,1,1\n")
    with pytest.raises(InputError, match=r"row 3 \(line 4\), column 'id': duplicate id 'a' \(first seen at row 1"):
        read_responses(path)


def test_missing_id_column_lists_the_columns(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no id column 'id'; the columns are: person, Q1"):
        read_responses(write(tmp_path, "person,Q1\na,1\n"))


def test_unobserved_middle_category_is_an_error(tmp_path: Path) -> None:
    path = write(tmp_path, "id,Q1,Q2\na,0,0\nb,3,1\nc,1,1\n")
    with pytest.raises(InputError, match=r"item 'Q1': category 2 has no responses \(codes seen: 0, 1, 3\)"):
        read_responses(path)


def test_item_spec_declares_categories_and_rejects_codes_outside(tmp_path: Path) -> None:
    spec = read_item_spec(write(tmp_path, "item,model,categories\nQ1,grm,3\nQ2,2pl,\n", "spec.csv"))
    path = write(tmp_path, "id,Q1,Q2,age\na,0,0,40\nb,3,1,30\nc,1,1,22\n")
    with pytest.raises(InputError, match=r"row 2 \(line 3\), column 'Q1': category code 3 is outside .* 0..2"):
        read_responses(path, item_spec=spec)
    ok = write(tmp_path, "id,Q1,Q2,age\na,0,0,40\nb,2,1,30\nc,1,1,22\n", "ok.csv")
    data = read_responses(ok, item_spec=spec)
    assert data.item_ids == ("Q1", "Q2")
    assert any("age" in n for n in data.notes)


def test_item_spec_problems_are_listed(tmp_path: Path) -> None:
    with pytest.raises(InputError) as err:
        read_item_spec(
            write(
                tmp_path,
                "item,model,categories,guessing\nQ1,4pl,,\nQ1,2pl,4,\nQ2,3pl,,1.2\nQ3,2pl,,0.2\nQ4,3pl,3,\n",
                "spec.csv",
            )
        )
    text = str(err.value)
    assert "'4pl' is not one of 2pl, 1pl, grm, 3pl, gpcm, pcm" in text
    assert "item 'Q1' is listed twice" in text
    assert "model 2pl needs 2 categories, the spec says 4" in text
    assert "row 3 (line 4), column 'guessing': '1.2' is not a number in [0, 1)" in text
    assert "row 4 (line 5), column 'guessing': only a 3pl item has a lower asymptote (model 2pl)" in text
    assert "model 3pl needs 2 categories, the spec says 3" in text


def test_parquet_reads_like_csv(tmp_path: Path) -> None:
    frame = pd.DataFrame({"id": ["a", "b", "c"], "Q1": [1.0, np.nan, 0.0], "Q2": [0, 1, 1]})
    path = tmp_path / "r.parquet"
    frame.to_parquet(path)
    data = read_responses(path)
    assert np.isnan(data.responses[1, 0])
    np.testing.assert_array_equal(data.responses[:, 1], [0, 1, 1])


def test_scoring_input_refuses_unknown_columns_and_out_of_range_codes(tmp_path: Path) -> None:
    categories = {"Q1": 2, "Q2": 3}
    with pytest.raises(InputError, match="column 'Q9' is not an item of the bundle.*--ignore-columns Q9"):
        read_for_scoring(write(tmp_path, "id,Q1,Q9\na,1,0\n"), item_categories=categories)
    with pytest.raises(InputError, match=r"row 1 \(line 2\), column 'Q2': category code 3 is outside .* 0..2"):
        read_for_scoring(write(tmp_path, "id,Q1,Q2\na,1,3\n"), item_categories=categories)
    data = read_for_scoring(write(tmp_path, "id,Q2,site\na,2,x\n"), item_categories=categories, ignore_columns=["site"])
    assert data.item_ids == ("Q1", "Q2")
    assert np.isnan(data.responses[0, 0]) and data.responses[0, 1] == 2
    assert any("Q1" in n for n in data.notes)


def test_repeated_header_is_refused(tmp_path: Path) -> None:
    # pandas alone would rename the second Q1 to "Q1.1" and calibrate it as another item.
    with pytest.raises(InputError, match="column 'Q1' appears more than once in the header"):
        read_responses(write(tmp_path, "id,Q1,Q2,Q1\na,1,0,1\nb,0,1,1\n"))


def _batches(path: Path, categories: dict[str, int], batch_rows: int) -> list:
    return list(ScoringInput(path, item_categories=categories, batch_rows=batch_rows).batches())


def test_scoring_input_in_small_batches_reads_what_the_whole_file_holds(tmp_path: Path) -> None:
    # Independent route: pandas reads the same file whole. Batches of 3 rows cover every row once,
    # in order, with their rows numbered from the file's start; cells pandas sees as " 1" or "1.0"
    # (text the integer read refuses) send the reader to its text read without losing a row.
    rng = np.random.default_rng(3)
    codes = rng.integers(0, 3, (20, 4)).astype(float)
    codes[rng.random(codes.shape) < 0.2] = np.nan
    lines = ["id,Q1,Q2,Q3,Q4"]
    for i, row in enumerate(codes):
        cells = ["" if np.isnan(v) else str(int(v)) for v in row]
        if i == 13:
            cells[2] = f" {cells[2]} " if cells[2] else "1.0"
            codes[i, 2] = 1.0 if np.isnan(row[2]) else row[2]
        lines.append(f"r{i}," + ",".join(cells))
    path = write(tmp_path, "\n".join(lines) + "\n")
    categories = {"Q1": 3, "Q2": 3, "Q3": 3, "Q4": 3}
    for batch_rows in (3, 7, 64):
        batches = _batches(path, categories, batch_rows)
        assert len(batches) > 1 or batch_rows == 64
        assert [b.first_row for b in batches] == sorted(b.first_row for b in batches)
        ids = [i for b in batches for i in b.ids.to_pylist()]
        assert ids == pd.read_csv(path)["id"].tolist()
        np.testing.assert_array_equal(np.concatenate([b.responses for b in batches]), codes)


def test_a_bad_cell_late_in_the_file_is_named_and_every_problem_counted(tmp_path: Path) -> None:
    rows = [f"r{i},{i % 2},{(i + 1) % 2}" for i in range(30)]
    rows[25] = "r25,x,1"
    rows[27] = "r3,0,1"  # a repeat of row 4's id, in another batch
    path = write(tmp_path, "id,Q1,Q2\n" + "\n".join(rows) + "\n")
    seen = []
    with pytest.raises(InputError) as err:
        for batch in ScoringInput(path, item_categories={"Q1": 2, "Q2": 2}, batch_rows=8).batches():
            seen.append(batch.first_row)
    message = str(err.value)
    assert "row 26 (line 27), column 'Q1': value 'x' is not a category code" in message
    assert "row 28 (line 29), column 'id': duplicate id 'r3' (first seen at row 4 (line 5))" in message
    assert "2 problem(s)" in message
    assert max(seen) < 25  # no batch with or after the bad row was handed out


def test_fixed_decimals_equal_python_formatting() -> None:
    # Reference: Python's own correctly rounded fixed-point formatting (f"{v:.{d}f}").
    from calibration.io.write import fixed_decimals

    rng = np.random.default_rng(9)
    values = np.concatenate(
        [rng.normal(0, 3, 20_000), np.round(rng.normal(0, 1, 20_000), 3), [0.5, 2.675, -0.0, -4e-7, np.nan, np.inf]]
    )
    for decimals in (0, 1, 2, 6):
        expected = ["" if not np.isfinite(v) else f"{v:.{decimals}f}" for v in values]
        assert fixed_decimals(values, decimals).to_pylist() == expected


def test_csv_text_round_trips_through_the_csv_module() -> None:
    # Reference: Python's csv module reads back what the writer quoted.
    import csv
    import io

    from calibration.io.write import csv_line, csv_rows, csv_text

    texts = ["plain", "with,comma", 'with "quote"', "line\nbreak", ""]
    body = csv_line(["id", "note"]) + csv_rows([csv_text(texts), csv_text(["x"] * len(texts))])
    parsed = list(csv.reader(io.StringIO(body.decode())))
    assert parsed == [["id", "note"], *[[t, "x"] for t in texts]]


def test_parquet_with_untrimmed_column_names_reads_for_scoring(tmp_path: Path) -> None:
    # Names are trimmed for matching; the batch reader must still ask Parquet for the stored names.
    frame = pd.DataFrame({" id ": ["a", "b"], "Q1 ": [1, 0], "Q2": [0.0, np.nan]})
    path = tmp_path / "padded.parquet"
    frame.to_parquet(path)
    data = read_for_scoring(path, item_categories={"Q1": 2, "Q2": 2})
    assert data.ids == ("a", "b")
    np.testing.assert_array_equal(data.responses, [[1.0, 0.0], [0.0, np.nan]])


def test_rows_without_a_group_are_listed_with_what_to_do(tmp_path: Path) -> None:
    # Calibration and scoring both list the rows whose group cell is empty, then say once what to do.
    path = write(tmp_path, "id,Q1,Q2,site\na,1,0,north\nb,0,1,\nc,1,1,\n")
    advice = r"2 rows have no group in column 'site': every respondent needs one .* leave those rows out of the file"
    with pytest.raises(InputError, match=r"row 2 \(line 3\), column 'site': empty group(.|\n)*" + advice):
        read_responses(path, group_column="site")
    scoring = ScoringInput(path, item_categories={"Q1": 2, "Q2": 2}, group_column="site")
    with pytest.raises(InputError, match=r"row 3 \(line 4\), column 'site': empty group(.|\n)*" + advice):
        list(scoring.batches())
