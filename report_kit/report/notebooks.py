"""Execute the report notebooks with papermill.

Owns: finding the templates (jupytext percent ``.py`` files in
``report_templates/``), turning each into a notebook, injecting the
parameters (run folder, project folder, previous run) and executing it into
``notebooks/`` of the run folder. A failing cell becomes a
:class:`ReportError` naming the notebook and the error.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import sys
from collections.abc import Callable
from pathlib import Path

from report_kit.errors import ReportKitError

log = logging.getLogger(__name__)

def _template_dir() -> Path:
    """``report_templates/`` of a source checkout, else the copy shipped in the wheel."""
    source = Path(__file__).resolve().parents[2] / "report_templates"
    if source.is_dir():
        return source
    from importlib import resources

    return Path(str(resources.files("report_kit.templates")))


TEMPLATE_DIR = _template_dir()


class ReportError(ReportKitError):
    """A report notebook failed to execute or render."""


def template_paths(template_dir: Path = TEMPLATE_DIR) -> list[Path]:
    """The notebook templates in report order (sorted by file name)."""
    paths = sorted(template_dir.glob("[0-9][0-9]_*.py"))
    if not paths:
        raise ReportError(f"{template_dir}: no report templates found (expected files like 01_overview.py)")
    return paths


_KIND_MARK = "# report-kit:"


def template_kind(template: Path) -> str | None:
    """The kind of run a template is for (``two-arm`` or ``multi-arm``), or None for every run.

    Declared by a first-lines comment ``# report-kit: multi-arm``.
    """
    with open(template, encoding="utf-8") as fh:
        for _, line in zip(range(5), fh):
            if line.startswith(_KIND_MARK):
                return line[len(_KIND_MARK):].strip()
    return None


def run_kind(run_dir: Path) -> str:
    """``multi-arm`` when the run's ``results.json`` describes arms, else ``two-arm``."""
    results = json.loads((Path(run_dir) / "results.json").read_text(encoding="utf-8"))
    return "multi-arm" if results.get("design", {}).get("arms") else "two-arm"


def execute_all(run_dir: Path, project_dir: Path, *, compare_to: Path | None = None,
                progress: Callable[[str], None] = lambda _: None,
                template_dir: Path = TEMPLATE_DIR) -> list[Path]:
    """Execute every template into ``run_dir/notebooks``; return the executed paths."""
    out_dir = run_dir / "notebooks"
    out_dir.mkdir(exist_ok=True)
    params = {"run_dir": str(run_dir), "project_dir": str(project_dir),
              "compare_to": "" if compare_to is None else str(Path(compare_to).resolve())}
    kind = run_kind(run_dir)
    templates = [t for t in template_paths(template_dir) if template_kind(t) in (None, kind)]
    executed = []
    for i, template in enumerate(templates, 1):
        progress(f"  notebook {i}/{len(templates)}: {template.stem}")
        executed.append(execute_one(template, out_dir / f"{template.stem}.ipynb", params))
    return executed


def execute_one(template: Path, output: Path, params: dict) -> Path:
    """Convert one jupytext template to a notebook and execute it with papermill."""
    import jupytext
    import nbformat
    import papermill

    nb = jupytext.read(template, fmt="py:percent")
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    source = output.with_suffix(".source.ipynb")
    nbformat.write(nb, source)
    try:
        with _kernel_stderr_to(Path(params["run_dir"]) / "run.log"):
            papermill.execute_notebook(str(source), str(output), parameters=params, kernel_name="python3",
                                       progress_bar=False, log_output=False, cwd=str(params["run_dir"]))
    except papermill.PapermillExecutionError as err:
        raise ReportError(f"{template.name}: report notebook failed in cell {err.exec_count}: "
                          f"{err.ename}: {err.evalue}") from err
    finally:
        source.unlink(missing_ok=True)
    return output


@contextlib.contextmanager
def _kernel_stderr_to(path: Path):
    """Send what the kernel process writes to stderr into the run log, not the terminal."""
    sys.stderr.flush()
    saved = os.dup(2)
    with open(path, "ab") as sink:
        os.dup2(sink.fileno(), 2)
        try:
            yield
        finally:
            os.dup2(saved, 2)
            os.close(saved)
