"""Tests of report_kit.audit.verify on hand-built runs with a stand-in ``analyse``.

The stand-in analysis computes a difference in means with the csv module and
plain Python arithmetic (the textbook definition: mean of the treated minus
mean of the controls), independent of report-kit's statistics.
"""

from __future__ import annotations

import csv
import hashlib
import shutil
import zipfile
from pathlib import Path

import pytest
import yaml

from report_kit.audit.archive import archive_run
from report_kit.errors import DataError, UsageError
from report_kit.inputs.model import InputFile
from report_kit.audit.provenance import RunRecord, write_manifest, write_results_json, write_ro_crate
from report_kit.audit.verify import VerifyReport, format_verify_text, verify_run

DESIGN = """\
spec_version: 1
title: Invented water-filter pilot
data:
  units: data/units.csv
  id: household
design:
  mechanism: complete
  treatment: assigned
outcomes:
  - column: litres
"""
UNITS = "household,assigned,litres\nh1,1,12.5\nh2,0,9.0\nh3,1,14.0\nh4,0,10.0\nh5,1,11.0\nh6,0,9.5\n"
RUN_ID = "20261201T120000Z-0f0f0f0f"


def analyse(project: Path) -> dict:
    """Stand-in analysis: difference in means of every outcome."""
    spec = yaml.safe_load((project / "design.yaml").read_text())
    with open(project / spec["data"]["units"], newline="") as fh:
        rows = list(csv.DictReader(fh))
    z = spec["design"]["treatment"]
    estimates = []
    for outcome in spec["outcomes"]:
        col = outcome["column"]
        treated = [float(r[col]) for r in rows if r[z] == "1"]
        control = [float(r[col]) for r in rows if r[z] == "0"]
        estimates.append({"outcome": col, "estimand": "ATE", "estimator": "unadjusted", "subgroup": None,
                          "estimate": sum(treated) / len(treated) - sum(control) / len(control),
                          "n_treated": len(treated), "n_control": len(control)})
    return {"schema": "report-kit/results/1", "design": {"n_units": len(rows)}, "estimates": estimates}


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _make_run(tmp_path: Path, *, copies: bool = True) -> Path:
    project = tmp_path / "water-filters"
    (project / "data").mkdir(parents=True)
    (project / "design.yaml").write_text(DESIGN)
    (project / "data" / "units.csv").write_text(UNITS)
    run = project / "runs" / RUN_ID
    (run / "tables").mkdir(parents=True)
    write_results_json(run / "results.json", analyse(project))
    (run / "tables" / "estimates.csv").write_text("outcome,estimate\nlitres,3.0\n")
    if copies:
        (run / "inputs" / "data").mkdir(parents=True)
        shutil.copy(project / "design.yaml", run / "inputs" / "design.yaml")
        shutil.copy(project / "data" / "units.csv", run / "inputs" / "data" / "units.csv")
    record = RunRecord(
        project_dir=project, run_id=RUN_ID, spec_sha256=_sha(project / "design.yaml"),
        inputs=(InputFile(path="data/units.csv", sha256=_sha(project / "data" / "units.csv"), rows=6),),
        id_column="household", seeds={}, argv=(), started="2026-12-01T12:00:00Z",
        ended="2026-12-01T12:00:02Z", renderer="builtin")
    write_manifest(run, record)
    write_ro_crate(run, record)
    return run


def test_stand_in_analysis_matches_a_hand_computation(tmp_path):
    run = _make_run(tmp_path)
    # (12.5 + 14 + 11)/3 - (9 + 10 + 9.5)/3 = 37.5/3 - 28.5/3 = 3.0
    assert analyse(run.parent.parent)["estimates"][0]["estimate"] == pytest.approx(3.0, abs=1e-12)


def test_untouched_run_verifies(tmp_path):
    run = _make_run(tmp_path)
    seen = []

    def recording(project):
        seen.append(project)
        return analyse(project)

    report = verify_run(run, analyse=recording)
    assert report.ok is True
    assert (report.input_mismatches, report.result_differences, report.integrity_problems) == ((), (), ())
    assert report.rerun_inputs == ({"path": "design.yaml", "source": "run copy"},
                                   {"path": "data/units.csv", "source": "run copy"})
    assert report.run_id == RUN_ID
    # the re-run happened in a temporary copy of the project, not in the project itself
    assert seen and seen[0] != run.parent.parent and seen[0].name == "water-filters"
    assert format_verify_text(report).endswith("VERIFIED\n")


def test_tiny_floating_point_differences_are_tolerated(tmp_path):
    run = _make_run(tmp_path)

    def nudged(factor):
        def inner(project):
            results = analyse(project)
            results["estimates"][0]["estimate"] *= factor
            return results
        return inner

    assert verify_run(run, analyse=nudged(1 + 1e-12)).ok
    report = verify_run(run, analyse=nudged(1 + 1e-6))
    assert not report.ok
    (diff,) = report.result_differences
    assert diff["field"] == "estimate" and diff["problem"] == "value differs"
    assert diff["relative_difference"] == pytest.approx(1e-6, rel=1e-3)
    assert diff["label"] == "estimates[outcome=litres, estimand=ATE, estimator=unadjusted]"
    text = format_verify_text(report)
    assert "Results that differ (1; tolerance 1e-09 relative):" in text
    assert text.endswith("NOT VERIFIED: differences listed above\n")
    assert verify_run(run, analyse=nudged(1 + 1e-6), rel_tol=1e-5).ok


def test_changed_project_data_is_named_and_the_copy_still_reproduces(tmp_path):
    run = _make_run(tmp_path)
    (run.parent.parent / "data" / "units.csv").write_text(UNITS.replace("h6,0,9.5", "h6,0,8.5"))
    report = verify_run(run, analyse=analyse)
    assert not report.ok
    (mismatch,) = report.input_mismatches
    assert mismatch["path"] == "data/units.csv" and mismatch["problem"] == "changed"
    assert mismatch["expected_sha256"] == hashlib.sha256(UNITS.encode()).hexdigest()
    assert report.result_differences == ()          # the run's own copy reproduces results.json
    assert "  data/units.csv: changed (recorded " in format_verify_text(report)


def test_without_copies_the_rerun_uses_the_project_and_shows_the_change(tmp_path):
    run = _make_run(tmp_path, copies=False)
    (run.parent.parent / "data" / "units.csv").write_text(UNITS.replace("h6,0,9.5", "h6,0,8.5"))
    report = verify_run(run, analyse=analyse)
    assert report.rerun_inputs[1] == {"path": "data/units.csv", "source": "project folder"}
    (diff,) = report.result_differences
    # control mean drops by 1/3, so the estimate rises from 3.0 to 3 + 1/3
    assert (diff["recorded"], diff["rerun"]) == (pytest.approx(3.0), pytest.approx(10 / 3))
    (run.parent.parent / "data" / "units.csv").unlink()
    report = verify_run(run, analyse=analyse)
    assert report.input_mismatches[0]["problem"] == "missing"
    assert "data/units.csv is neither in the run folder nor in the project folder" in report.rerun_error
    assert not report.ok


def test_edited_run_folder_is_an_integrity_problem(tmp_path):
    run = _make_run(tmp_path)
    (run / "tables" / "estimates.csv").write_text("outcome,estimate\nlitres,4.0\n")
    (run / "extra.txt").write_text("x")
    report = verify_run(run, analyse=analyse)
    problems = {(p["path"], p["problem"]) for p in report.integrity_problems}
    assert problems == {("tables/estimates.csv", "changed"), ("extra.txt", "not in manifest")}
    assert not report.ok


def test_failed_rerun_is_reported_not_raised(tmp_path):
    run = _make_run(tmp_path)

    def broken(project):
        raise DataError("data/units.csv: column 'litres' has text in row 3")

    report = verify_run(run, analyse=broken)
    assert not report.ok
    assert report.rerun_error == "the re-run failed: DataError: data/units.csv: column 'litres' has text in row 3"


def test_missing_and_extra_result_entries(tmp_path):
    run = _make_run(tmp_path)

    def fewer(project):
        results = analyse(project)
        results["estimates"] = []
        results["tests"] = [{"outcome": "litres", "statistic": "mean_difference", "null_effect": 0.0}]
        return results

    problems = sorted(d["problem"] for d in verify_run(run, analyse=fewer).result_differences)
    assert problems == ["missing from the re-run", "only in the re-run"]


def test_verify_an_archive(tmp_path):
    run = _make_run(tmp_path)
    zip_path = archive_run(run, tmp_path / "water.zip")
    shutil.rmtree(run.parent.parent)              # the archive alone is enough
    report = verify_run(zip_path, analyse=analyse)
    assert report.ok, format_verify_text(report)
    assert report.target == str(zip_path)


def test_tampered_archive_fails(tmp_path):
    run = _make_run(tmp_path)
    good = archive_run(run, tmp_path / "good.zip")
    bad = tmp_path / "bad.zip"
    with zipfile.ZipFile(good) as src, zipfile.ZipFile(bad, "w") as dst:
        for info in src.infolist():
            data = src.read(info)
            if info.filename == "water-filters/data/units.csv":
                data = data.replace(b"h6,0,9.5", b"h6,0,8.5")
            dst.writestr(info, data)
    report = verify_run(bad, analyse=analyse)
    assert not report.ok
    assert {"where": "archive", "path": "data/units.csv", "problem": "changed"}.items() <= \
        report.integrity_problems[0].items()
    assert report.input_mismatches[0]["path"] == "data/units.csv"


def test_usage_errors(tmp_path):
    run = _make_run(tmp_path)
    with pytest.raises(UsageError, match="not a run folder .* or a .zip archive"):
        verify_run(tmp_path, analyse=analyse)
    (tmp_path / "notes.txt").write_text("x")
    with pytest.raises(UsageError, match="notes.txt: not a run folder or a .zip archive"):
        verify_run(tmp_path / "notes.txt", analyse=analyse)
    with pytest.raises(TypeError, match="`analyse` must be callable; got str"):
        verify_run(run, analyse="analyse_project")
    with pytest.raises(ValueError, match="`rel_tol` must be a finite number >= 0; got -1"):
        verify_run(run, analyse=analyse, rel_tol=-1)


def test_report_to_dict_is_plain(tmp_path):
    report = verify_run(_make_run(tmp_path), analyse=analyse)
    assert isinstance(report, VerifyReport)
    out = report.to_dict()
    assert out["ok"] is True and out["rel_tol"] == 1e-9 and out["input_mismatches"] == []


@pytest.mark.parametrize("copies", [True, False])
def test_rerun_gets_the_plan_lock_the_run_had(tmp_path, copies):
    """A run with input copies kept its lock (or had none): a lock made later is not used.
    A run without copies (older layout) can only use the project's lock."""
    run = _make_run(tmp_path, copies=copies)
    (run.parent.parent / "design.lock").write_text('{"schema": "report-kit/plan-lock/1"}\n')
    seen = []

    def recording(project):
        lock = project / "design.lock"
        seen.append(lock.read_text() if lock.is_file() else None)
        return analyse(project)

    report = verify_run(run, analyse=recording)
    if copies:
        assert seen == [None] and all(s["path"] != "design.lock" for s in report.rerun_inputs)
        (run / "inputs" / "design.lock").write_text('{"schema": "report-kit/plan-lock/1", "kept": 1}\n')
        verify_run(run, analyse=recording)
        assert seen[-1] == '{"schema": "report-kit/plan-lock/1", "kept": 1}\n'
    else:
        assert seen == ['{"schema": "report-kit/plan-lock/1"}\n']
        assert report.rerun_inputs[-1] == {"path": "design.lock", "source": "project folder"}
