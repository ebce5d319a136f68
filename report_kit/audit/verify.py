"""Verify a run: inputs unchanged, run folder intact, analysis reproduces ``results.json``.

Owns :func:`verify_run` (``report-kit verify RUN`` and ``verify FILE.zip``)
and :func:`format_verify_text`. A verification

1. checks every file of the run folder against the SHA-256 in ``manifest.json``
   (and, for an archive, every member against ``checksums.sha256``);
2. checks ``design.yaml`` and each recorded input of the project folder
   (``run_dir.parent.parent``) against the recorded SHA-256;
3. rebuilds the project in a temporary folder from the run's input copies
   (or the project's files where no matching copy exists), calls ``analyse``
   on it and compares the result with ``results.json``: exactly, or within
   ``rel_tol`` relative (``abs_tol`` absolute) for numbers;
4. for a run made with ``--compare-to``, re-derives ``changes.json`` from the
   compared run when that run folder is still next to this one (else says so
   in ``changes_check``).

Differences are returned in a :class:`VerifyReport`; nothing is raised for
them (the command line maps ``ok=False`` to exit code 3).
"""

from __future__ import annotations

import shutil
import tempfile
import zipfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from report_kit.validate import Record, tolerance
from report_kit.audit.archive import compared_run_of, safe_extract, verify_checksums
from report_kit.audit.compare import CHANGES_NAME, compare_runs, diff_results
from report_kit.errors import ReportKitError, UsageError
from report_kit.audit.planlock import LOCK_NAME
from report_kit.audit.provenance import (
    INPUTS_DIR, MANIFEST_NAME, RESULTS_NAME, RO_CRATE_NAME, SPEC_NAME, check_relative_path,
    load_json_file, sha256_file, to_json_value,
)

__all__ = ["VerifyReport", "verify_run", "format_verify_text", "REL_TOL", "ABS_TOL"]

#: Default tolerances for numbers whose floating-point summation order may differ.
REL_TOL = 1e-9
ABS_TOL = 1e-12   # common practice: a floor for values that should be exactly zero

Analyse = Callable[[Path], dict]


@dataclass(frozen=True, kw_only=True)
class VerifyReport(Record):
    """Outcome of verifying one run (folder or archive).

    ``ok`` is True only when every list is empty and the re-run succeeded.
    ``input_mismatches``: ``{path, problem, expected_sha256, actual_sha256}``
    for project files that differ from the recording. ``result_differences``:
    ``{label, section, key, field, problem, recorded, rerun, relative_difference}``.
    ``integrity_problems``: run-folder files (or archive members) that differ
    from ``manifest.json`` (or ``checksums.sha256``). ``rerun_inputs``:
    ``{path, source}`` telling which file each input of the re-run came from.
    ``changes_check``: None without ``changes.json``; else ``"re-derived"``,
    ``"differs"`` (then also listed in ``result_differences``) or a sentence
    saying why it could not be re-derived.
    """

    ok: bool
    target: str
    run_id: str
    input_mismatches: tuple[dict, ...]
    result_differences: tuple[dict, ...]
    integrity_problems: tuple[dict, ...] = ()
    rerun_inputs: tuple[dict, ...] = ()
    rerun_error: str | None = None
    changes_check: str | None = None
    rel_tol: float = REL_TOL
    abs_tol: float = ABS_TOL



def _is_run_dir(path: Path) -> bool:
    return path.is_dir() and (path / RESULTS_NAME).is_file() and (path / MANIFEST_NAME).is_file()


def verify_run(target: Path | str, *, analyse: Analyse, rel_tol: float = REL_TOL,
               abs_tol: float = ABS_TOL) -> VerifyReport:
    """Verify a run folder or a report-kit archive (``.zip``).

    ``analyse(project_dir) -> dict`` re-runs the analysis of a project folder
    and returns the results dict (``report_kit.pipeline.analyse_project``).
    Raises :class:`UsageError` when ``target`` is neither a run folder nor a
    zip, or an archive is unsafe to extract; every difference found is
    reported in the returned :class:`VerifyReport` instead.
    """
    if not callable(analyse):
        raise TypeError(f"`analyse` must be callable; got {type(analyse).__name__}")
    rel_tol, abs_tol = tolerance("rel_tol", rel_tol), tolerance("abs_tol", abs_tol)
    path = Path(target)
    if path.is_file():
        if not zipfile.is_zipfile(path):
            raise UsageError(f"{target}: not a run folder or a .zip archive")
        return _verify_zip(path, analyse, rel_tol, abs_tol)
    if not _is_run_dir(path):
        raise UsageError(f"{target}: not a run folder (expected {RESULTS_NAME} and {MANIFEST_NAME} inside) "
                         "or a .zip archive")
    return _verify_dir(path, analyse, rel_tol, abs_tol, target=str(target), extra=())


def _verify_zip(zip_path: Path, analyse: Analyse, rel_tol: float, abs_tol: float) -> VerifyReport:
    with tempfile.TemporaryDirectory(prefix="report-kit-verify-") as tmp:
        run_dir = safe_extract(zip_path, Path(tmp) / "archive")
        problems = tuple({"where": "archive", **p} for p in verify_checksums(run_dir.parent.parent))
        problems += tuple(compared_run_problems(run_dir))
        return _verify_dir(run_dir, analyse, rel_tol, abs_tol, target=str(zip_path), extra=problems)


def compared_run_problems(run_dir: Path) -> list[dict]:
    """Problems with the run this run was compared with, as an archive must hold it.

    Nothing when the run was not compared. Otherwise the compared run must be
    beside it with the ``results.json`` recorded at comparison time, and the
    changes between the two runs must be derivable (``compare_runs``).
    """
    manifest = load_json_file(run_dir / MANIFEST_NAME, what="manifest")
    recorded = manifest.get("compared_to")
    if not isinstance(recorded, dict):
        return []
    where = f"runs/{recorded.get('run_id')}"
    expected = recorded.get("results_sha256")
    compared = compared_run_of(run_dir, manifest)
    if compared is None:
        return [{"where": "compared run", "path": where, "problem": "missing: the changes since the compared run "
                 "cannot be re-derived", "expected_sha256": expected, "actual_sha256": None}]
    actual = sha256_file(compared / RESULTS_NAME)
    if actual != expected:
        return [{"where": "compared run", "path": f"{where}/{RESULTS_NAME}", "problem": "differs from the run "
                 "that was compared", "expected_sha256": expected, "actual_sha256": actual}]
    try:
        compare_runs(compared, run_dir)
    except ReportKitError as err:
        return [{"where": "compared run", "path": where, "problem": f"changes cannot be re-derived: {err}",
                 "expected_sha256": None, "actual_sha256": None}]
    return []


def _recorded_inputs(manifest: dict, where: Path) -> list[tuple[str, str | None]]:
    """(path, sha256) of design.yaml and of each recorded input table."""
    design = manifest.get("design") or {}
    out = [(SPEC_NAME, design.get("sha256"))]
    for entry in manifest.get("inputs") or []:
        if not isinstance(entry, dict) or not isinstance(entry.get("path"), str):
            raise UsageError(f"{where}: malformed `inputs` entry {entry!r}")
        check_relative_path(entry["path"], what=f"input path in {where}")
        out.append((entry["path"], entry.get("sha256")))
    return out


def _integrity(run_dir: Path, manifest: dict) -> list[dict]:
    problems, listed = [], set()
    for entry in manifest.get("outputs") or []:
        if not isinstance(entry, dict) or not isinstance(entry.get("path"), str):
            problems.append({"where": "run folder", "path": repr(entry), "problem": "malformed manifest entry",
                             "expected_sha256": None, "actual_sha256": None})
            continue
        rel, expected = entry["path"], entry.get("sha256")
        listed.add(rel)
        check_relative_path(rel, what="output path in manifest.json")
        file = run_dir / rel
        actual = sha256_file(file) if file.is_file() else None
        if actual != expected:
            problems.append({"where": "run folder", "path": rel, "problem": "missing" if actual is None else "changed",
                             "expected_sha256": expected, "actual_sha256": actual})
    for path in sorted(run_dir.rglob("*")):
        rel = path.relative_to(run_dir).as_posix()
        if path.is_file() and rel not in listed and rel not in (MANIFEST_NAME, RO_CRATE_NAME):
            problems.append({"where": "run folder", "path": rel, "problem": "not in manifest",
                             "expected_sha256": None, "actual_sha256": sha256_file(path)})
    return problems


def _input_mismatches(project: Path, recorded: list[tuple[str, str | None]]) -> list[dict]:
    out = []
    for rel, expected in recorded:
        file = project / rel
        actual = sha256_file(file) if file.is_file() else None
        if actual is None or (expected is not None and actual != expected):
            out.append({"path": rel, "problem": "missing" if actual is None else "changed",
                        "expected_sha256": expected, "actual_sha256": actual})
    return out


def _pick_source(run_dir: Path, project: Path, rel: str, sha: str | None) -> tuple[Path | None, str]:
    copy = run_dir / INPUTS_DIR / rel
    if copy.is_file() and (sha is None or sha256_file(copy) == sha):
        return copy, "run copy"
    if (project / rel).is_file():
        return project / rel, "project folder"
    return None, "unavailable"


def _copy_lock(run_dir: Path, project: Path, rebuilt: Path) -> dict | None:
    """Give the re-run the plan lock the run had (not a hashed input; it makes the ``plan`` section).

    A run folder with input copies kept the lock when there was one, so only its
    copy counts: a lock made after the run must not change the re-run. Only a
    run without copies falls back to the project's lock.
    """
    kept_copies = (run_dir / INPUTS_DIR).is_dir()
    sources = (((run_dir / INPUTS_DIR / LOCK_NAME, "run copy"),) if kept_copies
               else ((project / LOCK_NAME, "project folder"),))
    for source, kind in sources:
        if source.is_file():
            rebuilt.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(source, rebuilt / LOCK_NAME)
            return {"path": LOCK_NAME, "source": kind}
    return None


def _rerun(run_dir: Path, project: Path, recorded, analyse: Analyse):
    """Re-run in a temporary project folder; return (sources, results or None, error or None)."""
    sources = []
    with tempfile.TemporaryDirectory(prefix="report-kit-rerun-") as tmp:
        rebuilt = Path(tmp) / (project.name or "project")
        for rel, sha in recorded:
            source, kind = _pick_source(run_dir, project, rel, sha)
            sources.append({"path": rel, "source": kind})
            if source is None:
                return sources, None, f"cannot re-run: {rel} is neither in the run folder nor in the project folder"
            target = rebuilt / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(source, target)
        lock = _copy_lock(run_dir, project, rebuilt)
        if lock is not None:
            sources.append(lock)
        try:
            results = analyse(rebuilt)
        except ReportKitError as err:
            return sources, None, f"the re-run failed: {type(err).__name__}: {err}"
    if not isinstance(results, dict):
        return sources, None, f"the re-run returned {type(results).__name__}, not a results dict"
    try:
        return sources, to_json_value(results), None
    except UsageError as err:
        return sources, None, f"the re-run returned results that cannot be stored as JSON: {err}"


def _differences(recorded: dict, rerun: dict, rel_tol: float, abs_tol: float) -> list[dict]:
    diff = diff_results(recorded, rerun, rel_tol=rel_tol, abs_tol=abs_tol)
    out = [{"label": c.label, "section": c.section, "key": dict(c.key), "field": c.field,
            "problem": "value differs", "recorded": c.old, "rerun": c.new,
            "relative_difference": c.relative_difference} for c in diff.changed]
    for problem, records, side in (("missing from the re-run", diff.removed, "recorded"),
                                   ("only in the re-run", diff.added, "rerun")):
        for r in records:
            entry = {"label": r.label, "section": r.section, "key": dict(r.key), "field": None,
                     "problem": problem, "recorded": None, "rerun": None, "relative_difference": None}
            entry[side] = r.values
            out.append(entry)
    return out


def _check_changes(run_dir: Path) -> tuple[str | None, list[dict]]:
    """Re-derive ``changes.json`` from the compared run, when it is next to this run."""
    path = run_dir / CHANGES_NAME
    if not path.is_file():
        return None, []
    recorded = load_json_file(path, what="changes file")
    compared = run_dir.parent / str(recorded.get("run_a"))
    if not isinstance(recorded.get("run_a"), str) or not (compared / RESULTS_NAME).is_file():
        return (f"not re-derived: the compared run {recorded.get('run_a')!r} is not next to this run "
                "(verify it beside its runs/ folder to re-derive the changes section)"), []
    rederived = compare_runs(compared, run_dir).to_dict()
    rederived["run_b"] = recorded.get("run_b")
    if to_json_value(rederived) == recorded:
        return "re-derived", []
    return "differs", [{"label": CHANGES_NAME, "section": "changes", "key": {"run_a": recorded["run_a"]},
                        "field": None, "problem": "does not re-derive from the compared run",
                        "recorded": None, "rerun": None, "relative_difference": None}]


def _verify_dir(run_dir: Path, analyse: Analyse, rel_tol: float, abs_tol: float, *,
                target: str, extra: tuple[dict, ...]) -> VerifyReport:
    manifest = load_json_file(run_dir / MANIFEST_NAME, what="manifest")
    recorded_results = load_json_file(run_dir / RESULTS_NAME, what="results file")
    project = run_dir.parent.parent
    recorded_inputs = _recorded_inputs(manifest, run_dir / MANIFEST_NAME)
    integrity = [*extra, *_integrity(run_dir, manifest)]
    mismatches = _input_mismatches(project, recorded_inputs)
    sources, rerun, error = _rerun(run_dir, project, recorded_inputs, analyse)
    differences = [] if rerun is None else _differences(recorded_results, rerun, rel_tol, abs_tol)
    changes_check, changes_differences = _check_changes(run_dir)
    differences += changes_differences
    ok = not (integrity or mismatches or differences or error)
    return VerifyReport(
        ok=ok, target=target, run_id=str(manifest.get("run_id") or run_dir.name),
        input_mismatches=tuple(mismatches), result_differences=tuple(differences),
        integrity_problems=tuple(integrity), rerun_inputs=tuple(sources), rerun_error=error,
        changes_check=changes_check,
        rel_tol=rel_tol, abs_tol=abs_tol,
    )


# ---------------------------------------------------------------------- text form

def _short(sha: str | None) -> str:
    return "none" if sha is None else sha[:12]


def _value(value) -> str:
    return "NA" if value is None else (f"{value:.10g}" if isinstance(value, float) else str(value))


def _difference_line(d: dict) -> str:
    if d["problem"] != "value differs":
        return f"  {d['label']}: {d['problem']}"
    rel = d["relative_difference"]
    tail = "" if rel is None else f" (relative difference {rel:.3g})"
    return f"  {d['label']} {d['field']}: recorded {_value(d['recorded'])}, re-run {_value(d['rerun'])}{tail}"


def _verdict(report: VerifyReport) -> str:
    if report.ok:
        return "VERIFIED"
    only_project_moved = (report.input_mismatches and not report.result_differences
                          and not report.integrity_problems and not report.rerun_error)
    if only_project_moved:
        return ("NOT VERIFIED: the project's input files differ from the ones this run recorded (listed above). "
                "The run folder itself is intact and its results reproduce from its own copies of the inputs; "
                "if the data were corrected on purpose, verify the newer run instead.")
    return "NOT VERIFIED: differences listed above"


def format_verify_text(report: VerifyReport, *, max_items: int = 50) -> str:
    """The verification outcome as readable plain text, verdict on the last line."""
    if not isinstance(report, VerifyReport):
        raise TypeError(f"`report` must be a VerifyReport; got {type(report).__name__}")
    lines = [f"Verifying {report.target} (run {report.run_id})", ""]
    if report.input_mismatches:
        lines.append(f"Inputs that differ from the recorded ones ({len(report.input_mismatches)}):")
        lines += [f"  {m['path']}: {m['problem']} (recorded {_short(m['expected_sha256'])}, "
                  f"now {_short(m['actual_sha256'])})" for m in report.input_mismatches]
    else:
        lines.append("Inputs: design.yaml and every recorded input match their SHA-256.")
    if report.integrity_problems:
        lines.append(f"Files that differ from the manifest or checksums ({len(report.integrity_problems)}):")
        lines += [f"  {p['where']}: {p['path']}: {p['problem']}" for p in report.integrity_problems[:max_items]]
    else:
        lines.append("Run folder: every file matches the manifest.")
    used = ", ".join(f"{s['path']} ({s['source']})" for s in report.rerun_inputs)
    lines.append(f"Re-run from: {used or 'nothing'}")
    if report.rerun_error:
        lines.append(f"Re-run: {report.rerun_error}")
    elif report.result_differences:
        lines.append(f"Results that differ ({len(report.result_differences)}; tolerance {report.rel_tol:g} relative):")
        lines += [_difference_line(d) for d in report.result_differences[:max_items]]
        if len(report.result_differences) > max_items:
            lines.append(f"  ... and {len(report.result_differences) - max_items} more")
    else:
        lines.append(f"Results: the re-run reproduces results.json (numbers within {report.rel_tol:g} relative).")
    if report.changes_check is not None:
        lines.append(f"Changes since the compared run ({CHANGES_NAME}): {report.changes_check}")
    lines += ["", _verdict(report)]
    return "\n".join(lines) + "\n"
