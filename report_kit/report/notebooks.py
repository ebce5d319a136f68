"""Execute the report notebook with papermill, in one kernel.

Owns: finding the templates (jupytext percent ``.py`` files in
``report_templates/``), assembling them into one notebook section by section
with the parameters (run folder, project folder) injected once, and executing
it into ``notebooks/report.ipynb`` of the run folder, so that the imports are
paid once per run. A failing cell becomes a :class:`ReportError` naming the
template and the error.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import itertools
import os
import shutil
import sys
import tempfile
import threading
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
    path = Path(run_dir) / "results.json"
    if not path.is_file():
        return "two-arm"
    results = json.loads(path.read_text(encoding="utf-8"))
    return "multi-arm" if results.get("design", {}).get("arms") else "two-arm"


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
                template_dir: Path = TEMPLATE_DIR, kernel: ReportKernel | None = None) -> list[Path]:
    """Assemble the templates into ``notebooks/report.ipynb`` and execute it in one kernel.

    Only the templates for this kind of run are assembled: those marked
    ``# report-kit: two-arm`` or ``# report-kit: multi-arm`` (see
    :func:`template_kind`, :func:`run_kind`) and the unmarked ones.
    ``kernel``: a :class:`ReportKernel` started earlier (its start-up and imports
    overlap the analysis); without one, papermill starts a kernel now. Returns
    the executed notebook's path in a list (the renderers take a list).
    """
    out_dir = run_dir / "notebooks"
    out_dir.mkdir(exist_ok=True)
    params = {"run_dir": str(run_dir), "project_dir": str(project_dir)}
    kind = run_kind(run_dir)
    templates = [t for t in template_paths(template_dir) if template_kind(t) in (None, kind)]
    progress(f"  one kernel, {len(templates)} sections: " + ", ".join(t.stem for t in templates))
    notebook = assemble(templates, params)
    _kernel_manager_class()  # imports papermill's kernel stack here, before the warm-up thread starts
    warm = threading.Thread(target=_import_pdf_renderer, name="report-kit-warm-import", daemon=True)
    warm.start()  # this process only waits for the kernel meanwhile
    try:
        return [execute_notebook(notebook, run_dir / REPORT_NOTEBOOK, cwd=run_dir, kernel=kernel)]
    finally:
        warm.join()


def run_id_of(run_dir: Path) -> str:
    """The run id as the final folder will be named (the build folder is ``.partial-<id>``)."""
    name = Path(run_dir).name
    return name[len(".partial-"):] if name.startswith(".partial-") else name


def stabilise(notebook_path: Path, run_dir: Path) -> None:
    """Make an executed notebook depend on its inputs and run id only.

    The temporary build folder (``.partial-<id>``) is replaced by the
    final run folder wherever papermill recorded it (parameters, input and
    output paths), and every cell gets the id ``<notebook>-<index>``.
    Start/end times and durations stay: they are the run's time.
    """
    import nbformat

    run_dir = Path(run_dir)
    final = str(run_dir.parent / run_id_of(run_dir))
    text = notebook_path.read_text(encoding="utf-8").replace(str(run_dir), final)
    nb = nbformat.reads(text, as_version=4)
    for i, cell in enumerate(nb.cells):   # papermill gives its injected cell a random id
        cell["id"] = f"{notebook_path.stem}-{i}"
    nbformat.write(nb, notebook_path)


def _import_pdf_renderer() -> None:
    """Import weasyprint (about a second) while the kernel runs the notebook.

    weasyprint shares no module with the kernel client, so importing it in a
    thread cannot deadlock on an import lock; any failure is left for
    rendering to report with its own message.
    """
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)  # as in render.write_pdf
        try:
            import weasyprint  # noqa: F401
        except Exception:  # noqa: BLE001 - rendering imports it again and reports the error
            return


def execute_notebook(nb, output: Path, *, cwd: Path, kernel: ReportKernel | None = None) -> Path:
    """Execute an assembled notebook with papermill in a kernel of this very interpreter."""
    import nbformat
    import papermill

    source = output.with_suffix(".source.ipynb")
    nbformat.write(nb, source)
    started = {} if kernel is None or kernel.manager is None else {"km": kernel.manager}
    try:
        with _kernel_stderr_to(cwd / "run.log"):
            papermill.execute_notebook(str(source), str(output), kernel_name="python3", progress_bar=False,
                                       log_output=False, cwd=str(cwd), request_save_on_cell_execute=False,
                                       kernel_manager_class=_kernel_manager_class(), **started)
    except papermill.PapermillExecutionError as err:
        section = _section_of(output)
        raise ReportError(f"{section}: report notebook failed in cell {err.exec_count}: "
                          f"{err.ename}: {err.evalue}") from err
    finally:
        source.unlink(missing_ok=True)
        if kernel is not None:
            kernel.copy_log_to(cwd / "run.log")
    stabilise(output, cwd)
    return output


def _section_of(executed: Path) -> str:
    """The template of the cell that failed: papermill writes the notebook, error output included, before
    raising (it also adds its own marker cells, so the cell index of the error does not point at it)."""
    import nbformat

    try:
        cells = nbformat.read(executed, as_version=4).cells
    except (OSError, ValueError):
        return "report notebook"
    for cell in cells:
        if any(out.get("output_type") == "error" for out in cell.get("outputs", [])):
            return cell.metadata.get(SECTION_KEY, "report") + ".py"
    return "report notebook"


#: Imported by a kernel started ahead of time (:class:`ReportKernel`) while the analysis runs.
WARM_IMPORTS = ("pandas", "report_kit.report.view", "report_kit.report.figures", "report_kit.report.figures_checks")


_KERNEL_IDS = itertools.count()


def _kernel_manager_class(warm: tuple[str, ...] = ()):
    """A kernel manager that starts ``ipykernel`` in this interpreter, whatever kernelspecs exist.

    A ``python3`` kernelspec found elsewhere (another environment, the user's
    folder) could start a Python without this report-kit; the report must run
    with the code that made ``results.json``. ``warm`` modules are imported by
    the kernel as it starts (IPython's ``exec_lines``), before it is ready.
    """
    import papermill  # noqa: F401 - its kernel stack, imported once in this thread
    from jupyter_client.kernelspec import KernelSpec
    from jupyter_client.manager import AsyncKernelManager

    argv = [sys.executable, *(["-Xfrozen_modules=off"] if sys.version_info >= (3, 11) else []),
            "-m", "ipykernel_launcher", "-f", "{connection_file}"]
    argv += [f"--IPKernelApp.exec_lines=import {name}" for name in warm]

    class ThisInterpreterKernelManager(AsyncKernelManager):
        def __init__(self, **kwargs):
            # On POSIX the kernel talks over Unix sockets (files <ip>-<port> in the temporary folder,
            # owner-writable only, removed when the kernel shuts down) rather than TCP ports on
            # 127.0.0.1, and does not log its warning about unencrypted TCP into run.log.
            if os.name == "posix":
                kwargs.setdefault("transport", "ipc")
                kwargs.setdefault("ip", os.path.join(tempfile.gettempdir(),
                                                     f"report-kit-kernel-{os.getpid()}-{next(_KERNEL_IDS)}"))
            super().__init__(**kwargs)

        @property
        def kernel_spec(self):
            return KernelSpec(argv=argv, display_name="Python 3", language="python")

    return ThisInterpreterKernelManager


class ReportKernel:
    """A report kernel started ahead of time, importing :data:`WARM_IMPORTS` while the run goes on.

    Use as a context manager around the whole run (the command line enters it
    before importing the analysis, so the kernel's start-up and imports overlap
    the command's own); the kernel is shut down on exit, whatever happened.
    What the kernel writes to stderr is kept and appended to ``run.log`` by
    :meth:`copy_log_to`.
    """

    def __init__(self) -> None:
        self.manager = None
        self._log = tempfile.TemporaryFile()

    def __enter__(self) -> ReportKernel:
        self.manager = _kernel_manager_class(WARM_IMPORTS)(kernel_name="python3")
        try:
            asyncio.run(self.manager.start_kernel(stderr=self._log))
        except Exception:  # noqa: BLE001 - papermill starts its own kernel later instead
            log.warning("could not start the report kernel ahead of time", exc_info=True)
            self.manager = None
        return self

    def __exit__(self, *exc) -> None:
        if self.manager is not None and self.manager.has_kernel:
            asyncio.run(self.manager.shutdown_kernel(now=True))
        self._log.close()

    def copy_log_to(self, path: Path) -> None:
        """Append what the kernel wrote to stderr so far to ``path``."""
        self._log.flush()
        self._log.seek(0)
        with open(path, "ab") as sink:
            shutil.copyfileobj(self._log, sink)
        self._log.seek(0)
        self._log.truncate()


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
