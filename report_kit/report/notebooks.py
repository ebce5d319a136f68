"""Execute the report notebook with papermill, in one kernel.

Owns: finding the templates (jupytext percent ``.py`` files in
``report_templates/``), assembling them into one notebook section by section
with the parameters (run folder, project folder) injected once, and executing
it into ``notebooks/report.ipynb`` of the run folder, so that the imports are
paid once per run. A failing cell becomes a :class:`ReportError` naming the
template and the error.
"""

from __future__ import annotations

import contextlib
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
    # Installed: the wheel maps report_templates/ to report_kit/templates/ (a folder without
    # __init__.py, so importlib.resources would give a MultiplexedPath, not a path).
    return Path(__file__).resolve().parents[1] / "templates"


TEMPLATE_DIR = _template_dir()


class ReportError(ReportKitError):
    """A report notebook failed to execute or render."""


def template_paths(template_dir: Path = TEMPLATE_DIR) -> list[Path]:
    """The notebook templates in report order (sorted by file name)."""
    paths = sorted(template_dir.glob("[0-9][0-9]_*.py"))
    if not paths:
        raise ReportError(f"{template_dir}: no report templates found (expected files like 01_overview.py)")
    return paths


#: The one executed notebook kept in the run folder.
REPORT_NOTEBOOK = "notebooks/report.ipynb"
#: Cell metadata key naming the template a cell of the assembled notebook came from.
SECTION_KEY = "report_kit_section"


def assemble(templates: list[Path], params: dict):
    """One notebook from the templates, section by section, the parameters injected once.

    The first cell holds the parameters; each template's own ``parameters``
    cell is dropped. Every cell records its template in
    ``metadata.report_kit_section`` and gets a stable id (``<template>-<n>``),
    so the executed notebook is the same for the same inputs.
    """
    import jupytext
    import nbformat

    nb = nbformat.v4.new_notebook()
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    first = nbformat.v4.new_code_cell("\n".join(f"{k} = {v!r}" for k, v in params.items()))
    first.metadata["tags"] = ["injected-parameters"]
    first.id = "parameters"
    nb.cells.append(first)
    for template in templates:
        part = jupytext.read(template, fmt="py:percent")
        kept = [c for c in part.cells if "parameters" not in c.metadata.get("tags", [])]
        for n, cell in enumerate(kept):
            cell.metadata[SECTION_KEY] = template.stem
            cell.id = f"{template.stem}-{n}"
            nb.cells.append(cell)
    return nb


def execute_all(run_dir: Path, project_dir: Path, *, progress: Callable[[str], None] = lambda _: None,
                template_dir: Path = TEMPLATE_DIR) -> list[Path]:
    """Assemble the templates into ``notebooks/report.ipynb`` and execute it in one kernel.

    Returns the executed notebook's path in a list (the renderers take a list).
    """
    out_dir = run_dir / "notebooks"
    out_dir.mkdir(exist_ok=True)
    params = {"run_dir": str(run_dir), "project_dir": str(project_dir)}
    templates = template_paths(template_dir)
    progress(f"  one kernel, {len(templates)} sections: " + ", ".join(t.stem for t in templates))
    return [execute_notebook(assemble(templates, params), run_dir / REPORT_NOTEBOOK, cwd=run_dir)]


def execute_notebook(nb, output: Path, *, cwd: Path) -> Path:
    """Execute an assembled notebook with papermill in a kernel of this very interpreter."""
    import nbformat
    import papermill

    source = output.with_suffix(".source.ipynb")
    nbformat.write(nb, source)
    try:
        with _kernel_stderr_to(cwd / "run.log"):
            papermill.execute_notebook(str(source), str(output), kernel_name="python3", progress_bar=False,
                                       log_output=False, cwd=str(cwd),
                                       kernel_manager_class=_kernel_manager_class())
    except papermill.PapermillExecutionError as err:
        section = _section_of(output, err.cell_index)
        raise ReportError(f"{section}: report notebook failed in cell {err.exec_count}: "
                          f"{err.ename}: {err.evalue}") from err
    finally:
        source.unlink(missing_ok=True)
    return output


def _section_of(executed: Path, cell_index: int) -> str:
    """The template a failed cell came from (papermill writes the notebook before raising)."""
    import nbformat

    try:
        cells = nbformat.read(executed, as_version=4).cells
        return cells[cell_index].metadata.get(SECTION_KEY, "report") + ".py"
    except (OSError, ValueError, IndexError):
        return "report notebook"


def _kernel_manager_class():
    """A kernel manager that starts ``ipykernel`` in this interpreter, whatever kernelspecs exist.

    A ``python3`` kernelspec found elsewhere (another environment, the user's
    folder) could start a Python without this report-kit; the report must run
    with the code that made ``results.json``.
    """
    from jupyter_client.kernelspec import KernelSpec
    from jupyter_client.manager import AsyncKernelManager

    argv = [sys.executable, *(["-Xfrozen_modules=off"] if sys.version_info >= (3, 11) else []),
            "-m", "ipykernel_launcher", "-f", "{connection_file}"]

    class ThisInterpreterKernelManager(AsyncKernelManager):
        @property
        def kernel_spec(self):
            return KernelSpec(argv=argv, display_name="Python 3", language="python")

    return ThisInterpreterKernelManager


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
