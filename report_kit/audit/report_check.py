"""Check that a run's report shows what its ``results.json`` holds: render it again and compare.

Owns :func:`check_report` (``report-kit verify RUN --report``). The report
notebook reads only the run folder (``results.json``, ``changes.json``, the
recorded ``inputs/design.yaml``), and the HTML is byte-stable, so executing the
templates again on a copy of the run folder must give the same ``report.html``
and the same ``tables/*.csv`` byte for byte. A difference means the report (or
a table) was edited after the run, or it was made by other templates or other
library versions; the first differing line is shown.
"""

from __future__ import annotations

import re
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

from report_kit.audit.provenance import INPUTS_DIR, RESULTS_NAME, SPEC_NAME
from report_kit.errors import UsageError
from report_kit.validate import Record

__all__ = ["ReportCheck", "check_report", "format_report_check"]

#: What the notebook and the renderer write; removed from the copy before rendering it again.
_MADE_BY_REPORT = ("report.html", "report.pdf", "tables", "figures", "notebooks")


@dataclass(frozen=True, kw_only=True)
class ReportCheck(Record):
    """Outcome of rendering a run's report again.

    ``differences``: ``{file, problem, recorded, rendered}`` per file that
    differs (``recorded``/``rendered``: the first differing line as text,
    shortened), ``problem`` one of ``differs``, ``missing`` (recorded but not
    made again), ``extra`` (made again but not recorded).
    """

    run_dir: str
    files_compared: int
    differences: tuple[dict, ...]

    @property
    def ok(self) -> bool:
        return not self.differences


def check_report(run_dir: Path | str, *, kernel=None) -> ReportCheck:
    """Execute the report templates again on a copy of ``run_dir`` and compare HTML and tables byte for byte.

    Built-in renderer, HTML only (the PDF is printed from that HTML). The copy
    is named like the run's build folder (``.partial-<run id>``), so paths in
    the notebook resolve to the run id exactly as when the run was made.
    """
    from report_kit.inputs.spec import load_spec
    from report_kit.report import notebooks, render

    run_dir = Path(run_dir)
    if not (run_dir / RESULTS_NAME).is_file() or not (run_dir / "report.html").is_file():
        raise UsageError(f"{run_dir}: --report needs a run folder with {RESULTS_NAME} and report.html")
    with tempfile.TemporaryDirectory(prefix="report-kit-report-check-") as tmp:
        copy = Path(tmp) / "runs" / f".partial-{run_dir.name}"
        shutil.copytree(run_dir, copy, ignore=shutil.ignore_patterns(*_MADE_BY_REPORT))
        spec_path = copy / INPUTS_DIR / SPEC_NAME
        project_dir = run_dir.resolve().parent.parent
        spec = load_spec(spec_path if spec_path.is_file() else project_dir)
        executed = notebooks.execute_all(copy, project_dir, kernel=kernel)
        render.render_report(executed, copy, title=spec.title, renderer="builtin", pdf=False)
        recorded, rendered = _report_files(run_dir), _report_files(copy)
        differences = []
        for name in sorted(set(recorded) | set(rendered)):
            if name not in rendered:
                differences.append({"file": name, "problem": "missing", "recorded": None, "rendered": None})
            elif name not in recorded:
                differences.append({"file": name, "problem": "extra", "recorded": None, "rendered": None})
            else:
                old, new = recorded[name].read_bytes(), rendered[name].read_bytes()
                if old != new:
                    before, after = _first_difference(old, new, str(copy), str(run_dir.resolve()))
                    differences.append({"file": name, "problem": "differs", "recorded": before,
                                        "rendered": after})
    return ReportCheck(run_dir=str(run_dir), files_compared=len(set(recorded) & set(rendered)),
                       differences=tuple(differences))


def _report_files(folder: Path) -> dict[str, Path]:
    files = {"report.html": folder / "report.html"} if (folder / "report.html").is_file() else {}
    tables = folder / "tables"
    if tables.is_dir():
        files.update({f"tables/{p.name}": p for p in sorted(tables.glob("*.csv"))})
    return files


def _first_difference(old: bytes, new: bytes, copy_path: str, run_path: str) -> tuple[str, str]:
    """Where two texts first differ, as plain text around that place (tags removed); the copy's path reads as the run's."""
    a = old.decode("utf-8", errors="replace")
    b = new.decode("utf-8", errors="replace").replace(copy_path, run_path)
    at = next((k for k, (x, y) in enumerate(zip(a, b)) if x != y), min(len(a), len(b)))
    return _around(a, at), _around(b, at)


def _around(text: str, at: int, width: int = 60) -> str:
    """About ``width`` characters of plain text before and after position ``at``."""
    before = _plain(text[max(0, at - 4 * width): at])[-width:]
    after = _plain(text[at: at + 4 * width])[:width]
    return f"…{before}{after}…"


def _plain(text: str) -> str:
    text = re.sub(r"<[^>]*>|^[^<]*>|<[^>]*$", " ", text)   # whole tags and tags cut by the window
    return re.sub(r"\s+", " ", text)


def format_report_check(check: ReportCheck) -> str:
    """A few lines for the command line."""
    if check.ok:
        return (f"report: rendered again from results.json; report.html and {check.files_compared - 1} table(s) "
                "are identical")
    lines = [f"report: {len(check.differences)} file(s) differ from a fresh rendering of results.json"]
    for d in check.differences:
        if d["problem"] == "differs":
            lines.append(f"  !! {d['file']}: recorded \"{d['recorded']}\" / rendered again \"{d['rendered']}\"")
        else:
            lines.append(f"  !! {d['file']}: {'not made again' if d['problem'] == 'missing' else 'not in the run'}")
    return "\n".join(lines)
