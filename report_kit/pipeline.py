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
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from report_kit.audit import provenance
from report_kit.analysis import Analysis, add_points_to_weigh, analyse
from report_kit.inputs.data import load_study
from report_kit.inference.distributed import ChunkMapFn, OnChunk, counting_chunk_map, dask_chunk_map, scheduler_address
from report_kit.errors import SpecError, UsageError
from report_kit.inputs.model import Study
from report_kit.audit.planlock import LOCK_NAME
from report_kit.inputs.spec import SPEC_FILENAME, load_spec
from report_kit.runfolder import (
    finish_run, output_error, remove_stale_partials, reserve_run, stop_on_signals,
)

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
    """The deterministic analysis step (the assignment check and the plan-lock status included)."""
    from report_kit.audit.planlock import plan_deviations
    from report_kit.design.assignment import assignment_check_status

    result = analyse(study, assignment_check=assignment_check_status(study), chunk_map=chunk_map)
    plan = plan_deviations(study.spec.project_dir)
    result.results["plan"] = plan
    add_points_to_weigh(study, result.results, plan=plan)
    return result


def write_changes(run_dir: Path, compare_to: Path, run_id: str) -> dict:
    """``changes.json``: what changed since the compared run (beside results.json).

    It depends on a second run folder, so it is not part of ``results.json``;
    ``report-kit verify`` re-derives it when the compared run is still next to
    this one (see docs/results.md).
    """
    from report_kit.audit.compare import CHANGES_NAME, compare_runs

    changes = compare_runs(Path(compare_to), run_dir).to_dict()
    changes["run_b"] = run_id
    provenance.write_json(run_dir / CHANGES_NAME, changes)
    return changes


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
                progress: Progress = _quiet, on_run_id: Progress = _quiet, kernel=None,
                on_chunk: OnChunk | None = None) -> RunOutcome:
    """Analyse a project, execute the report notebook, render, record provenance.

    ``on_chunk(done, total)`` is called after each chunk of randomization draws
    (the command line draws a progress bar with it).

    ``kernel``: an entered :class:`report_kit.report.notebooks.ReportKernel`
    started before this call (the command line does), or None to start one
    when the notebook runs. SIGTERM and SIGHUP stop the run like Ctrl-C; an
    ``OSError`` while writing becomes :class:`report_kit.errors.OutputError`
    (see :mod:`report_kit.runfolder`).
    """
    from report_kit.report import render

    started = datetime.now(timezone.utc)
    render.require_renderer(options.renderer)
    study = load_project(project)
    if options.compare_to is not None:
        _check_previous_run(options.compare_to)
    runs = study.spec.project_dir / "runs"
    with stop_on_signals():
        try:
            run_dir, result = _build_run(study, options, started, runs, progress, on_run_id, kernel, on_chunk)
        except OSError as err:
            raise output_error(err, runs) from err
    pdf = run_dir / "report.pdf"
    return RunOutcome(run_dir=run_dir, report_html=run_dir / "report.html",
                      report_pdf=pdf if pdf.exists() else None, results=result.results)


def _build_run(study: Study, options: RunOptions, started: datetime, runs: Path, progress: Progress,
               on_run_id: Progress, kernel=None, on_chunk: OnChunk | None = None) -> tuple[Path, Analysis]:
    """Reserve a run id, build the run in its partial folder, rename it into place."""
    from report_kit.report import notebooks
    from report_kit.report import render

    for stale in remove_stale_partials(runs):
        progress(f"removed {stale.name} left by a stopped run")
    run_id, tmp = reserve_run(runs, make_run_id(study, started))
    final = runs / run_id
    handler = None
    try:
        on_run_id(str(final))
        progress(f"design spec and data valid: {len(study.frame)} units, {len(study.inputs)} input file(s)")
        handler = _log_to(tmp / "run.log")
        log.info("report-kit run of %s (run id %s)", study.spec.project_dir, run_id)
        progress("analysing (estimates, randomization tests, checks)")
        with chunk_map_for(options, on_chunk) as chunk_map:
            result = run_analysis(study, chunk_map=chunk_map)
        write_analysis(tmp, result)
        copy_inputs(study, tmp)
        if options.compare_to is not None:
            write_changes(tmp, options.compare_to, run_id)
        progress("executing the report notebook")
        executed = notebooks.execute_all(tmp, study.spec.project_dir, progress=progress, kernel=kernel)
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
            renderer=options.renderer, compared_to=compared_record(options.compare_to),
        )
        provenance.write_manifest(tmp, record)
        provenance.write_ro_crate(tmp, record)
        finish_run(tmp, final)
    except BaseException:
        if handler is not None:
            _close_log(handler)
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return final, result


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


def compared_record(run_dir: Path | None) -> dict | None:
    """What the manifest records of the run compared with: its id and the SHA-256 of its results."""
    if run_dir is None:
        return None
    run_dir = Path(run_dir).resolve()
    return {"run_id": run_dir.name, "results_sha256": provenance.sha256_file(run_dir / "results.json")}


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

