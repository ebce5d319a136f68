"""User text reaches report.html only as text; the PDF renderer fetches nothing outside the run folder."""

from __future__ import annotations

from html.parser import HTMLParser
from pathlib import Path

import pytest

from report_kit.report import esc, table_html
from report_kit.report.render import fetch_allowed

HOSTILE = {
    "script": "<script>alert('x')</script>",
    "image": "<img src=http://127.0.0.1:9/track.png>",
    "link": "[read more](http://127.0.0.1:9/page)",
    "template": "{{ 7 * 7 }} {% raw %}",
    "markdown": "**bold** _under_ `code` # not a heading",
    "dollars": "cost in $\\frac{$ and x",  # not TeX: matplotlib must draw it as text (no mathtext)
}


class _Page(HTMLParser):
    """Tags with their attributes, and the text a reader sees."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def _parse(page: str) -> _Page:
    parser = _Page()
    parser.feed(page)
    return parser


def test_esc_leaves_no_markup_in_html_or_markdown():
    import mistune

    for text in HOSTILE.values():
        safe = esc(text)
        assert not set("<>[]()`*_{}") & set(safe)
        # read as Markdown (the say() path) and as HTML, the reader sees exactly the text
        for rendered in (mistune.html(safe), f"<p>{safe}</p>"):
            page = _parse(rendered)
            assert [t for t, _ in page.tags] == ["p"]
            assert "".join(page.text).strip() == text
    assert esc(None) == ""


def test_table_cells_are_text():
    import pandas as pd

    page = _parse(table_html(pd.DataFrame({HOSTILE["script"]: [HOSTILE["image"]]}), caption=HOSTILE["link"]))
    assert {t for t, _ in page.tags} <= {"div", "p", "table", "thead", "tbody", "tr", "th", "td"}
    assert HOSTILE["image"] in page.text and HOSTILE["script"] in page.text


@pytest.mark.parametrize(("url", "allowed"), [
    ("data:image/png;base64,AAAA", True),
    ("http://127.0.0.1:9/x.png", False),
    ("https://127.0.0.1:9/x.css", False),
    ("ftp://127.0.0.1/x", False),
    ("file:///etc/hostname", False),
])
def test_pdf_fetches_only_inline_data_and_run_files(tmp_path, url, allowed):
    assert fetch_allowed(url, tmp_path) is allowed
    inside = tmp_path / "figures" / "a.png"
    assert fetch_allowed(inside.as_uri(), tmp_path)
    assert not fetch_allowed((tmp_path / ".." / "elsewhere.png").resolve().as_uri(), tmp_path)


def _hostile_project(project: Path) -> None:
    import yaml

    spec = project / "design.yaml"
    content = yaml.safe_load(spec.read_text(encoding="utf-8"))
    content["title"] = f"{HOSTILE['script']} {HOSTILE['template']}"
    content["summary"] = " ".join(HOSTILE.values())
    content["outcomes"][0]["label"] = f"{HOSTILE['image']} {HOSTILE['link']}"
    content["outcomes"][1]["label"] = HOSTILE["markdown"]
    content["outcomes"][0]["label"] += " " + HOSTILE["dollars"]  # primary: in two figures
    spec.write_text(yaml.safe_dump(content, sort_keys=False), encoding="utf-8")


def test_hostile_spec_text_is_shown_as_text(project_copy):
    from report_kit.inputs.spec import load_spec
    from report_kit.pipeline import run_project

    project = project_copy("quiet-hours")
    _hostile_project(project)
    spec = load_spec(project)
    assert HOSTILE["script"] in spec.title and HOSTILE["link"] in spec.summary  # the edit took
    outcome = run_project(project)
    page = _parse(outcome.report_html.read_text(encoding="utf-8"))
    assert "script" not in [t for t, _ in page.tags]
    sources = [a.get("src", "") for t, a in page.tags if t == "img"]
    assert sources and all(s.startswith("data:image/") for s in sources)
    assert not [a for t, a in page.tags if t == "a" and "127.0.0.1" in (a.get("href") or "")]
    text = "".join(page.text)
    for value in HOSTILE.values():
        assert value in text, value
    assert outcome.report_pdf is not None and outcome.report_pdf.stat().st_size > 0
