"""The ``run`` recipe: project folder in, complete run folder out.

Each step is a named function; :func:`run_project` reads like the list of
steps. The run is built in a hidden temporary folder next to the final one and
renamed into place only when every step succeeded, so a failed run leaves no
run folder behind and never touches an earlier run or ``data/``.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import shutil
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from report_kit.audit import provenance
from report_kit.analysis import Analysis, analyse
from report_kit.inputs.data import load_study
from report_kit.inference.distributed import ChunkMapFn, OnChunk, counting_chunk_map, dask_chunk_map, scheduler_address
from report_kit.errors import SpecError, UsageError
from report_kit.inputs.model import Study
from report_kit.audit.planlock import LOCK_NAME
from report_kit.inputs.spec import SPEC_FILENAME, load_spec

log = logging.getLogger(__name__)

Progress = Callable[[str], None]


def _quiet(_: str) -> None:
    return None


@dataclass(frozen=True, kw_only=True)
class RunOptions:
    renderer: str = "builtin"           # "builtin" | "quarto"
    compare_to: Path | None = None
    argv: tuple[str, ...] = ()
    pdf: bool = True
    workers: int | None = None          # local Dask cluster of this many worker processes
    scheduler: str | None = None        # an existing Dask scheduler (else $REPORT_KIT_SCHEDULER)


@dataclass(frozen=True, kw_only=True)
class RunOutcome:
    run_dir: Path
    report_html: Path
    report_pdf: Path | None
    results: dict


def project_dir_of(path: Path | str) -> Path:
    """Check that ``path`` is a project folder (holds design.yaml) and return it resolved."""
    path = Path(path)
    if not path.exists():
        raise SpecError(f"{path}: no such project folder")
    if path.is_file() and path.name == SPEC_FILENAME:
        path = path.parent
    if not path.is_dir() or not (path / SPEC_FILENAME).exists():
        raise SpecError(f"{path}: not a project folder (no {SPEC_FILENAME} inside); "
                        "create one with `report-kit new PATH`")
    return path.resolve()


def load_project(project: Path | str) -> Study:
    """Validate the spec and the data of a project folder."""
    spec = load_spec(project_dir_of(project))
    return load_study(spec)


def analyse_project(project: Path | str) -> dict:
    """Load, validate and analyse a project; return the ``results.json`` dict."""
    return run_analysis(load_project(project)).results


def run_analysis(study: Study, *, chunk_map: ChunkMapFn | None = None) -> Analysis:
    """The deterministic analysis step (the assignment check included)."""
    from report_kit.design.assignment import assignment_check_status

    return analyse(study, assignment_check=assignment_check_status(study), chunk_map=chunk_map)


@contextlib.contextmanager
def chunk_map_for(options: RunOptions, on_chunk: OnChunk | None = None):
    """The chunk map a run uses: Dask when ``workers``/``scheduler`` (or the environment) ask for it.

    Yields ``None`` (the library default) when nothing asks for Dask or for
    progress, so a plain run imports nothing extra.
    """
    if options.workers is not None or scheduler_address(options.scheduler) is not None:
        with dask_chunk_map(options.scheduler, options.workers, on_chunk=on_chunk) as chunk_map:
            yield chunk_map
    elif on_chunk is not None:
        yield counting_chunk_map(on_chunk)
    else:
        yield None


def make_run_id(study: Study, now: datetime) -> str:
    """UTC timestamp plus a short hash of the spec and input fingerprints."""
    h = hashlib.sha256(provenance.sha256_file(study.spec.path).encode())
    for f in study.inputs:
        h.update(f.sha256.encode())
    return f"{now.strftime('%Y%m%dT%H%M%SZ')}-{h.hexdigest()[:8]}"


def run_project(project: Path | str, options: RunOptions = RunOptions(), *,
                progress: Progress = _quiet, on_run_id: Progress = _quiet,
                on_chunk: OnChunk | None = None) -> RunOutcome:
    """Analyse a project, execute the report notebooks, render, record provenance.

    ``on_chunk(done, total)`` is called after each chunk of randomization draws
    (the command line draws a progress bar with it).
    """
    from report_kit.report import notebooks
    from report_kit.report import render

    started = datetime.now(timezone.utc)
    render.require_renderer(options.renderer)
    study = load_project(project)
    if options.compare_to is not None:
        _check_previous_run(options.compare_to)
    run_id = make_run_id(study, started)
    runs = study.spec.project_dir / "runs"
    final = runs / run_id
    on_run_id(str(final))
    progress(f"design spec and data valid: {len(study.frame)} units, {len(study.inputs)} input file(s)")
    runs.mkdir(exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".partial-{run_id}-", dir=runs))
    handler = _log_to(tmp / "run.log")
    try:
        log.info("report-kit run of %s (run id %s)", study.spec.project_dir, run_id)
        progress("analysing (estimates, randomization tests, checks)")
        with chunk_map_for(options, on_chunk) as chunk_map:
            result = run_analysis(study, chunk_map=chunk_map)
        write_analysis(tmp, result)
        copy_inputs(study, tmp)
        progress("executing report notebooks")
        executed = notebooks.execute_all(tmp, study.spec.project_dir, compare_to=options.compare_to,
                                         progress=progress)
        progress(f"rendering HTML{' and PDF' if options.pdf else ''} ({options.renderer} renderer)")
        render.render_report(executed, tmp, title=study.spec.title, renderer=options.renderer,
                             pdf=options.pdf)
        progress("writing provenance (manifest, RO-Crate)")
        _close_log(handler)
        record = provenance.RunRecord(
            project_dir=study.spec.project_dir, run_id=run_id,
            spec_sha256=provenance.sha256_file(study.spec.path), inputs=study.inputs,
            id_column=study.spec.data.id,
            seeds={"design": study.spec.design.seed, "analysis": study.spec.analysis.seed},
            argv=tuple(options.argv), started=_iso(started), ended=_iso(datetime.now(timezone.utc)),
            renderer=options.renderer,
        )
        provenance.write_manifest(tmp, record)
        provenance.write_ro_crate(tmp, record)
        tmp.rename(final)
    except BaseException:
        _close_log(handler)
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    pdf = final / "report.pdf"
    return RunOutcome(run_dir=final, report_html=final / "report.html",
                      report_pdf=pdf if pdf.exists() else None, results=result.results)


def write_analysis(run_dir: Path, result: Analysis) -> None:
    """results.json (canonical bytes) plus the arrays the report plots."""
    provenance.write_results_json(run_dir / "results.json", result.results)
    if result.arrays:
        folder = run_dir / "analysis"
        folder.mkdir(exist_ok=True)
        for name, array in sorted(result.arrays.items()):
            np.save(folder / f"{name.replace('::', '__')}.npy", np.ascontiguousarray(array), allow_pickle=False)


def copy_inputs(study: Study, run_dir: Path) -> None:
    """Keep a copy of design.yaml and each input table under ``inputs/`` (for diff and archive)."""
    dest = run_dir / provenance.INPUTS_DIR
    dest.mkdir()
    shutil.copy2(study.spec.path, dest / SPEC_FILENAME)
    lock = study.spec.project_dir / LOCK_NAME
    if lock.is_file():
        shutil.copy2(lock, dest / LOCK_NAME)
    for f in study.inputs:
        target = dest / f.path
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(study.spec.project_dir / f.path, target)


def _check_previous_run(run_dir: Path) -> None:
    if not (Path(run_dir) / "results.json").is_file():
        raise UsageError(f"{run_dir}: --compare-to needs a run folder (with results.json)")


def _iso(moment: datetime) -> str:
    return moment.strftime("%Y-%m-%dT%H:%M:%SZ")


def _log_to(path: Path) -> logging.Handler:
    handler = logging.FileHandler(path, encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("report_kit")
    root.setLevel(logging.INFO)
    root.addHandler(handler)
    return handler


def _close_log(handler: logging.Handler) -> None:
    logging.getLogger("report_kit").removeHandler(handler)
    handler.close()

