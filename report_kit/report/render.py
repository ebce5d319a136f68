"""Render executed notebooks to ``report.html`` and ``report.pdf``.

Owns the renderers, registered by name:

* ``builtin`` (default): nbconvert's ``basic`` HTML (inputs hidden) wrapped in
  our own page and stylesheet, images inlined, then PDF with weasyprint. Needs
  no system tools.
* ``quarto``: when ``quarto`` is on PATH, the combined executed notebook is
  rendered by calling ``quarto render`` as a subprocess.
"""

from __future__ import annotations

import html
import json
import logging
import re
import shutil
import subprocess
import warnings
from datetime import datetime, timezone
from pathlib import Path
from urllib.parse import urlsplit
from urllib.request import url2pathname

from report_kit.errors import UsageError
from report_kit.report.notebooks import TEMPLATE_DIR, ReportError, run_id_of

log = logging.getLogger(__name__)

STYLESHEET = TEMPLATE_DIR / "report.css"


def combine(notebooks: list[Path]):
    """One notebook holding the cells of all executed notebooks, in order."""
    import nbformat

    parts = [nbformat.read(p, as_version=4) for p in notebooks]
    combined = nbformat.v4.new_notebook(metadata=parts[0].metadata)
    for part in parts:
        combined.cells.extend(c for c in part.cells if _shows_something(c))
    return combined


def _heading_only(cell) -> str | None:
    text = cell.source.strip()
    if cell.cell_type == "markdown" and text.startswith("#") and "\n" not in text:
        return text
    return None


def _first_html(cell) -> tuple[int, str] | None:
    import mistune

    for i, out in enumerate(cell.get("outputs", [])):
        data = out.get("data", {})
        if "text/html" in data:
            return i, "".join(data["text/html"])
        if "text/markdown" in data:
            return i, mistune.html("".join(data["text/markdown"]))
        if out.get("output_type") in ("display_data", "execute_result", "stream"):
            return None
    return None


def keep_headings_with_content(notebook):
    """Fold each heading-only Markdown cell into the first output of the next cell.

    The PDF then never ends a page with a lone section heading: heading and its
    first block share one ``break-inside: avoid`` box.
    """
    import mistune
    import nbformat

    cells = list(notebook.cells)
    kept = []
    i = 0
    while i < len(cells):
        heading = _heading_only(cells[i])
        nxt = cells[i + 1] if i + 1 < len(cells) else None
        first = _first_html(nxt) if heading and nxt is not None and nxt.cell_type == "code" else None
        if first is None:
            kept.append(cells[i])
            i += 1
            continue
        index, body = first
        out = nxt.outputs[index]
        # a long table may break across pages: keep the heading with its caption only
        keep = "rk-keep-loose" if "rk-long" in body else "rk-keep"
        merged = f'<div class="{keep}">{mistune.html(heading)}{body}</div>'
        nxt.outputs[index] = nbformat.v4.new_output("display_data", data={"text/html": merged},
                                                     metadata=out.get("metadata", {}))
        kept.append(nxt)
        i += 2
    notebook.cells = kept
    return notebook


def _shows_something(cell) -> bool:
    """Markdown cells and code cells with outputs; parameter cells and silent code are dropped."""
    tags = cell.metadata.get("tags", [])
    if "parameters" in tags or "injected-parameters" in tags:
        return False
    return cell.cell_type == "markdown" or bool(cell.get("outputs"))


def body_html(notebook) -> str:
    """The notebook as an HTML fragment: outputs and Markdown only, no code, no prompts."""
    from nbconvert import HTMLExporter

    exporter = HTMLExporter(template_name="basic", exclude_input=True, exclude_input_prompt=True,
                            exclude_output_prompt=True, anchor_link_text="")
    body, _ = exporter.from_notebook_node(keep_headings_with_content(notebook))
    return body


_H2 = re.compile(r"<h2(?: [^>]*)?>(.*?)</h2>", re.S)
_TAG = re.compile(r"<[^>]+>")


def number_sections(body: str) -> tuple[str, str]:
    """Number the ``<h2>`` sections of a fragment and build the table of contents.

    Returns ``(body, toc)``: each section heading becomes
    ``<h2 id="sec-N"><span class="rk-secno">N</span> title</h2>`` and ``toc`` is an
    ordered list linking to them (the PDF adds page numbers with CSS
    ``target-counter``). The heading text is already escaped by the Markdown step.
    """
    entries: list[tuple[int, str]] = []

    def heading(match: re.Match) -> str:
        text = _TAG.sub("", match.group(1)).replace("¶", "").strip()
        entries.append((len(entries) + 1, text))
        n = len(entries)
        return f'<h2 id="sec-{n}"><span class="rk-secno">{n}</span> {text}</h2>'

    numbered = _H2.sub(heading, body)
    items = "".join(f'<li><a href="#sec-{n}"><span class="rk-secno">{n}</span> {text}</a></li>'
                    for n, text in entries)
    toc = f'<nav class="rk-toc" aria-label="Contents"><p class="rk-toc-title">Contents</p><ol>{items}</ol></nav>'
    return numbered, toc if entries else ""


def insert_toc(body: str, toc: str, *, after_sections: int = 2) -> str:
    """Place the contents list before section ``after_sections + 1`` (page 1 keeps the headline)."""
    marker = f'<h2 id="sec-{after_sections + 1}">'
    at = body.find(marker)
    if not toc:
        return body
    if at < 0:
        return toc + body
    start = body.rfind('<div class="rk-keep', 0, at)
    cut = start if start >= 0 and body.find("</div>", start, at) < 0 else at
    return body[:cut] + toc + body[cut:]


def page_html(title: str, body: str, *, stamp: str) -> str:
    """Wrap a fragment in the report page (our stylesheet inlined)."""
    css = STYLESHEET.read_text(encoding="utf-8")
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<meta name=\"generator\" content=\"report-kit\"><title>{html.escape(title)}</title>"
        f"<style>{css}</style></head><body><main class=\"rk-report\">"
        f"<header class=\"rk-head\"><p class=\"rk-kicker\">Randomized experiment report</p>"
        f"<h1>{html.escape(title)}</h1><p class=\"rk-stamp\">{html.escape(stamp)}</p></header>"
        f"{body}<footer class=\"rk-foot\">Generated by report-kit · {html.escape(stamp)}</footer>"
        "</main></body></html>\n"
    )


def run_stamp(run_dir: Path) -> str:
    """``Run <id> · 02 December 2026, 09:15 UTC``: the time is the run's own (its id starts with it).

    Taken from the run id rather than the clock, so rendering the same run
    folder again (``verify --report``) gives the same bytes.
    """
    run_id = run_id_of(run_dir)
    try:
        started = datetime.strptime(run_id[:16], "%Y%m%dT%H%M%SZ").replace(tzinfo=timezone.utc)
    except ValueError:   # a run folder renamed by hand: say when it was rendered instead
        started = datetime.now(timezone.utc)
    return f"Run {run_id} · {started.strftime('%d %B %Y, %H:%M UTC')}"


def render_builtin(notebooks: list[Path], run_dir: Path, *, title: str, pdf: bool) -> None:
    stamp = run_stamp(run_dir)
    body, toc = number_sections(body_html(combine(notebooks)))
    page = page_html(title, insert_toc(body, toc), stamp=stamp)
    (run_dir / "report.html").write_text(page, encoding="utf-8")
    if pdf:
        write_pdf(run_dir / "report.html", run_dir / "report.pdf")


def fetch_allowed(url: str, root: Path) -> bool:
    """Whether the PDF renderer may load ``url``: inline ``data:`` or a file inside ``root``.

    Anything else (``http:``, ``https:``, ``ftp:``, files outside the run
    folder) is refused, so rendering a report never reaches the network or
    reads another file of the machine, whatever the HTML contains.
    """
    scheme = urlsplit(url).scheme.lower()
    if scheme == "data":
        return True
    if scheme != "file":
        return False
    path = Path(url2pathname(urlsplit(url).path)).resolve()
    return path == root.resolve() or root.resolve() in path.parents


def _offline_fetcher(root: Path):
    """A weasyprint URL fetcher that loads only what :func:`fetch_allowed` allows."""
    import weasyprint.urls as urls

    def refuse(url: str) -> None:
        log.warning("PDF: refused to load %s (only data: URLs and files of the run folder)", url[:200])
        raise ValueError(f"report-kit renders offline; refused {url[:200]}")

    if hasattr(urls, "URLFetcher"):  # weasyprint >= 68: a fetcher class
        class RunFolderFetcher(urls.URLFetcher):
            def fetch(self, url, headers=None):
                if not fetch_allowed(url, root):
                    refuse(url)
                return super().fetch(url, headers)

        return RunFolderFetcher(allowed_protocols={"data", "file"}, allow_redirects=False)

    def fetcher(url: str):  # older weasyprint: a function
        if not fetch_allowed(url, root):
            refuse(url)
        return urls.default_url_fetcher(url)

    return fetcher


def write_pdf(html_path: Path, pdf_path: Path) -> None:
    """PDF from the self-contained HTML with weasyprint; nothing outside the HTML's folder is fetched."""
    logging.getLogger("weasyprint").setLevel(logging.ERROR)
    logging.getLogger("fontTools").setLevel(logging.ERROR)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)  # weasyprint's notice about optional HarfBuzz-Subset
        import weasyprint

        weasyprint.HTML(filename=str(html_path), url_fetcher=_offline_fetcher(html_path.parent)).write_pdf(
            str(pdf_path))


def quarto_available() -> bool:
    return shutil.which("quarto") is not None


def require_renderer(renderer: str) -> None:
    """Refuse now, before any work: an unknown ``renderer`` (ValueError: library misuse) or one
    that cannot run on this machine (:class:`UsageError`)."""
    if renderer not in RENDERERS:
        raise ValueError(f"`renderer` must be one of {set(RENDERERS)}; got {renderer!r}")
    if renderer == "quarto" and not quarto_available():
        raise UsageError("--renderer quarto: `quarto` is not on PATH; install it or use the built-in renderer")


def render_quarto(notebooks: list[Path], run_dir: Path, *, title: str, pdf: bool) -> None:
    """Render the combined notebook with ``quarto render`` (HTML; PDF via weasyprint of it)."""
    import nbformat

    from report_kit.report.view import esc

    require_renderer("quarto")
    nb = combine(notebooks)
    # the title as a JSON string (valid YAML) of entities: quarto reads it as Markdown, shows it as text
    nb.cells.insert(0, nbformat.v4.new_raw_cell(f"---\ntitle: {json.dumps(esc(title))}\nexecute:\n  enabled: false\n"
                                                f"echo: false\nembed-resources: true\n---"))
    source = run_dir / "report.ipynb"
    nbformat.write(nb, source)
    try:
        done = subprocess.run(["quarto", "render", source.name, "--to", "html", "--output", "report.html"],
                              cwd=run_dir, capture_output=True, text=True, check=False)
    finally:
        source.unlink(missing_ok=True)
    if done.returncode != 0:
        raise ReportError(f"quarto render failed (exit {done.returncode}): {done.stderr.strip()[-800:]}")
    if pdf:
        write_pdf(run_dir / "report.html", run_dir / "report.pdf")


RENDERERS = {"builtin": render_builtin, "quarto": render_quarto}


def render_report(notebooks: list[Path], run_dir: Path, *, title: str, renderer: str = "builtin",
                  pdf: bool = True) -> None:
    """Render with the named renderer; ``renderer`` must be one of :data:`RENDERERS`."""
    require_renderer(renderer)
    RENDERERS[renderer](notebooks, run_dir, title=title, pdf=pdf)
