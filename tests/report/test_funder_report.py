"""The report a funder reads, end to end on the example runs: PDF headline, digits, flow figure,
escaping, byte-stable outputs and a real browser."""

from __future__ import annotations

import html
import json
import math
import re
import shutil
from pathlib import Path

import pytest
import yaml

from tests.conftest import EXAMPLES, copy_project

LEAD = ("neyman", "blocked_neyman", "paired", "cr2")


def pdf_text(path: Path, pages: slice = slice(None)) -> str:
    from pypdf import PdfReader

    text = " ".join(page.extract_text() or "" for page in PdfReader(str(path)).pages[pages])
    return re.sub(r"\s+", " ", text)


def rounded(value: float, se: float) -> str:
    """The headline rule written out independently: two significant figures of the SE fix the decimals."""
    k = min(6, 1 - math.floor(math.log10(se)))
    return f"{round(value, k):,.{max(k, 0)}f}".replace("-", "\u2212")


def lead_rows(results: dict) -> dict[str, dict]:
    rows = {}
    for r in results["estimates"]:
        if r["estimand"] in ("ATE", "ITT") and not r["subgroup"] and r["estimator"] == "unadjusted" \
                and r["method"] in LEAD:
            rows.setdefault(r["outcome"], r)
    return rows


@pytest.mark.parametrize("name", EXAMPLES)
def test_headline_numbers_in_the_pdf_equal_results_json(example_runs, name):
    project, run_dir, _ = example_runs[name]
    results = json.loads((run_dir / "results.json").read_text())
    spec = yaml.safe_load((project / "design.yaml").read_text())
    first_pages = pdf_text(run_dir / "report.pdf", slice(0, 2))
    tests = {t["outcome"]: t for t in results["tests"]}
    rows = lead_rows(results)
    primary = [o["column"] for o in spec["outcomes"] if o.get("family", "primary") == "primary"]
    assert primary
    for column in primary:
        row = rows[column]
        se = row["std_error"]
        effect = rounded(row["estimate"], se)
        assert ("+" + effect if row["estimate"] >= 0 else effect) in first_pages
        for key in ("ci_low", "ci_high", "mean_treated", "mean_control"):
            assert rounded(row[key], se) in first_pages, key
        p = tests[column]["p_value"]
        assert (f"p = {p:.3f}" if p >= 0.001 else "p < 0.001") in first_pages
        assert f"{row['std_effect']:.2f}" in first_pages
        assert row["std_effect_method"] == "hedges_g" and "Hedges' g" in first_pages


def visible_text(page: str) -> str:
    page = re.sub(r"data:[a-z/+]+;base64,[A-Za-z0-9+/=]+", "", page)
    page = re.sub(r"<style>.*?</style>", "", page, flags=re.S)
    return html.unescape(re.sub(r"<[^>]+>", " ", page))


@pytest.mark.parametrize("name", EXAMPLES)
def test_no_digit_string_longer_than_20_characters(example_runs, name):
    _, run_dir, _ = example_runs[name]
    long_number = re.compile(r"\d[\d,.]{20,}")
    assert long_number.findall(visible_text((run_dir / "report.html").read_text())) == []
    assert long_number.findall(pdf_text(run_dir / "report.pdf")) == []


@pytest.mark.parametrize("name", EXAMPLES)
def test_flow_figure_is_in_the_run_folder_and_the_report(example_runs, name):
    _, run_dir, _ = example_runs[name]
    svg = run_dir / "figures" / "participant_flow.svg"
    png = run_dir / "figures" / "participant_flow.png"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert svg.read_text().lstrip().startswith("<?xml")
    page = (run_dir / "report.html").read_text()
    assert "Participant flow (CONSORT-style stages)" in page


def test_page_one_of_the_funder_report(example_runs):
    _, run_dir, _ = example_runs["tutoring-clubs"]
    page_one = pdf_text(run_dir / "report.pdf", slice(0, 1))
    for text in ("RK-EX-2026-0417", "Mean, tutoring club", "mean, no club", "points", "Points to weigh"):
        assert text in page_one, text
    everything = pdf_text(run_dir / "report.pdf")
    assert "Contents" in everything and "Table 1." in everything and "Figure 1." in everything


HOSTILE = "<script>alert(1)</script> & <b>bold</b>"


def hostile_copy(base: Path) -> Path:
    project = copy_project("quiet-hours", base)
    spec = yaml.safe_load((project / "design.yaml").read_text())
    spec["title"] = f"Quiet hour {HOSTILE}"
    spec["summary"] = f"Summary {HOSTILE}"
    spec["outcomes"][0]["label"] = f"Visits {HOSTILE}"
    spec["outcomes"][0]["unit"] = "visits <i>per</i> branch"
    spec["design"]["arm_labels"] = {"control": "usual <u>hours</u>", "treated": "quiet hour"}
    spec["registration"] = {"id": "RK-<1>", "address": "javascript:alert(1)"}
    (project / "design.yaml").write_text(yaml.safe_dump(spec, sort_keys=False))
    return project


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    """The same hostile project run twice (HTML only), in two folders."""
    from report_kit.pipeline import RunOptions, run_project

    runs = []
    for i in range(2):
        project = hostile_copy(tmp_path_factory.mktemp(f"same{i}"))
        runs.append(run_project(project, RunOptions(pdf=False)).run_dir)
    return runs


def test_user_text_is_escaped_in_the_html(two_runs):
    page = (two_runs[0] / "report.html").read_text()
    for raw in ("<script>alert(1)</script>", "<b>bold</b>", "<i>per</i>", "<u>hours</u>", "RK-<1>"):
        assert raw not in page
    assert "&lt;script&gt;" in page
    assert 'href="javascript' not in page


def normalise(text: str, run_dir: Path) -> str:
    text = text.replace(str(run_dir.parent.parent), "PROJECT").replace(run_dir.name, "RUN")
    text = re.sub(r"\d{2} \w+ \d{4}, \d{2}:\d{2} UTC", "TIME", text)
    text = re.sub(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?(Z|[+-]\d{2}:\d{2})?", "TIME", text)
    return re.sub(r'"duration": [0-9.e-]+', '"duration": 0', text)


def test_outputs_are_byte_stable_apart_from_run_id_and_time(two_runs):
    a, b = two_runs
    svgs = sorted(p.name for p in (a / "figures").glob("*.svg"))
    assert svgs and svgs == sorted(p.name for p in (b / "figures").glob("*.svg"))
    for name in svgs:
        assert (a / "figures" / name).read_bytes() == (b / "figures" / name).read_bytes(), name
    for name in sorted(p.name for p in (a / "figures").glob("*.png")):
        assert (a / "figures" / name).read_bytes() == (b / "figures" / name).read_bytes(), name
    assert normalise((a / "report.html").read_text(), a) == normalise((b / "report.html").read_text(), b)
    for nb in sorted((a / "notebooks").glob("*.ipynb")):
        assert normalise(nb.read_text(), a) == normalise((b / "notebooks" / nb.name).read_text(), b), nb.name
    assert ".partial-" not in (a / "notebooks" / "report.ipynb").read_text()


def test_report_opens_in_a_real_browser_offline(example_runs, tmp_path):
    from tests.report.cdp import chromium_path, open_offline

    executable = chromium_path()
    if executable is None:
        pytest.skip("chromium is not installed here (.ci/run installs it where apt is available)")
    _, run_dir, _ = example_runs["tutoring-clubs"]
    shot = run_dir.parent.parent / "report-screenshot.png"
    try:
        problems = open_offline(executable, run_dir / "report.html", shot)
    except (OSError, TimeoutError, ConnectionError) as err:
        pytest.skip(f"chromium cannot be run here: {err}")
    assert problems == []
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    shutil.copy(shot, tmp_path / "report-screenshot.png")
