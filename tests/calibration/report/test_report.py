"""The report page opened in a real headless browser (Debian's chromium), its sections and escaping, and the
reviewer workflow from the decisions file back into a calibration."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pandas as pd
import pytest

from calibration.bundle import Bundle, DirectoryStore
from calibration.cli import main
from calibration.demo import make_demo_responses
from calibration.report.evidence import cells_for_review
from calibration.report.page import render_report
from tests.helpers import ARTIFACTS, EXAMPLES, headless_chromium


def _example(name: str = "bundle_v2.json") -> Bundle:
    return Bundle.model_validate_json((EXAMPLES / name).read_text())


def test_the_report_opens_in_chromium_without_errors_and_every_flagged_cell_has_its_plot(tmp_path: Path) -> None:
    # The example's second cycle (invented): two delivery modes, T4 left out for tablet, linked to version 1.
    bundle = _example()
    page = tmp_path / "report.html"
    page.write_text(render_report(bundle), encoding="utf-8")
    cells = cells_for_review(bundle)
    assert cells  # the example has flagged cells to show
    ARTIFACTS.mkdir(exist_ok=True)
    with headless_chromium() as driver:
        driver.get(page.as_uri())
        errors = [e for e in driver.get_log("browser") if e["level"] in ("SEVERE", "WARNING")]
        assert errors == []
        for cell in cells:
            figure = driver.find_elements(
                "css selector", f'.item-cell[data-item="{cell.item}"][data-group="{cell.group}"] figure svg'
            )
            assert len(figure) == 1 and figure[0].size["width"] > 200  # drawn, not an empty box
        assert driver.find_element("css selector", "#information svg").size["height"] > 100
        assert driver.find_element("css selector", "#link h2").text == "Link to pantry-checkout@1"
        driver.save_screenshot(str(ARTIFACTS / "report.png"))
    assert (ARTIFACTS / "report.png").stat().st_size > 10_000


def test_every_section_is_there_and_every_text_is_escaped() -> None:
    bundle = _example("bundle.json")
    document = json.loads(bundle.model_dump_json())
    document["items"][0]["id"] = "<script>alert(1)</script>"
    for cell in document["items"][0]["policy"].values():
        cell["reason"] = 'say "<b>hi</b>"'
    hostile = Bundle.model_validate(document)
    page = render_report(hostile)
    assert "<script>alert(1)</script>" not in page and "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "<b>hi</b>" not in page
    for section in ("overview", "ladder", "anchors", "policy", "flagged", "information", "quality", "summed"):
        assert f'<section id="{section}">' in page
    assert "report the SE with every score" in page and "not a verdict" in page
    # Nothing is fetched: no external source, link, style import or font (SVG namespace URIs name, not load;
    # url(#...) points inside the page).
    assert not re.search(r'(src|href)="https?:|url\((?!#)|@import', page)
    assert render_report(hostile) == page  # the same bundle gives the same page


def test_reviewer_decisions_go_back_into_a_calibration_and_the_report_shows_them(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    data = tmp_path / "responses.csv"
    make_demo_responses(1500, seed=12).to_csv(data, index=False)
    store = tmp_path / "store"
    base = ["--store", str(store)]
    assert main(["calibrate", str(data), "--name", "skills", *base, "--group-column", "site"]) == 0
    decisions = tmp_path / "decisions.csv"
    assert main(["review", "skills@1", *base, "--out", str(decisions)]) == 0
    frame = pd.read_csv(decisions, keep_default_na=False)
    assert list(frame.columns[:5]) == ["item", "group", "proposed", "status", "note"] and len(frame) >= 1
    assert (frame["status"] == frame["proposed"]).all() and (frame["note"] == "").all()
    # The reviewer keeps every proposal but one: the first cell is decided otherwise, with a note.
    first = frame.index[0]
    decided = "invariant" if frame.loc[first, "proposed"] != "invariant" else "excluded"
    frame.loc[first, "status"] = decided
    frame.loc[first, "note"] = "content panel 2026-11: the wording is fine at this site"
    frame.to_csv(decisions, index=False)
    capsys.readouterr()
    assert (
        main(
            [
                "calibrate",
                str(data),
                "--name",
                "skills",
                *base,
                "--group-column",
                "site",
                "--policy-overrides",
                str(decisions),
            ]
        )
        == 0
    )
    bundle = DirectoryStore(store).get("skills", 2)
    item, group = frame.loc[first, "item"], frame.loc[first, "group"]
    cell = next(i for i in bundle.items if i.id == item).policy[group]
    assert cell.status == decided and cell.proposed_status == frame.loc[first, "proposed"]
    assert cell.reason == "reviewer override: content panel 2026-11: the wording is fine at this site"
    untouched = [(r.item, r.group) for r in frame.itertuples() if r.Index != first]
    for other_item, other_group in untouched:  # kept as proposed, no note: no decision recorded
        assert next(i for i in bundle.items if i.id == other_item).policy[other_group].proposed_status is None
    page = render_report(bundle)
    section = re.search(r'<section id="reviewed">.*?</section>', page, re.S)
    assert section is not None and "content panel 2026-11" in section.group(0) and item in section.group(0)
