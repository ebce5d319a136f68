"""Tests of report_kit.audit.planlock: design.lock and the deviations from the locked plan.

Expected change lists are written by hand from the two YAML texts of each test.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from report_kit.errors import SpecError, UsageError
from report_kit.audit.planlock import diff_specs, format_deviations_text, lock_plan, plan_deviations

PLAN = """\
spec_version: 1
title: "Invented reading-club trial"
data:
  units: data/units.csv
  id: pupil_id
design:
  mechanism: blocked
  treatment: assigned
  block: school
analysis:
  alpha: 0.05
  covariates: [baseline_score]
outcomes:
  - column: score_endline
    family: primary
  - column: attendance
    family: secondary
"""


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    folder = tmp_path / "reading-club"
    folder.mkdir()
    (folder / "design.yaml").write_text(PLAN, encoding="utf-8")
    return folder


def test_lock_records_hash_and_exact_text(project):
    lock = lock_plan(project)
    assert lock == project / "design.lock"
    content = json.loads(lock.read_text(encoding="utf-8"))
    assert content["schema"] == "report-kit/plan-lock/1"
    # Reference digest: hashlib over the file's bytes.
    assert content["design_sha256"] == hashlib.sha256(PLAN.encode("utf-8")).hexdigest()
    assert content["design_text"] == PLAN
    assert content["design"]["analysis"] == {"alpha": 0.05, "covariates": ["baseline_score"]}
    assert content["runs_before_lock"] == []
    assert content["locked_at"].endswith("Z")


def test_lock_accepts_the_design_file_itself(project):
    assert lock_plan(project / "design.yaml") == project / "design.lock"


def test_lock_is_never_replaced_silently(project):
    lock_plan(project)
    with pytest.raises(UsageError, match="design.lock already exists; the plan is locked"):
        lock_plan(project)
    (project / "design.yaml").write_text(PLAN.replace("0.05", "0.1"), encoding="utf-8")
    lock_plan(project, force=True)
    assert plan_deviations(project)["changes"] == []


def test_lock_lists_runs_that_already_exist(project):
    run = project / "runs" / "20261201T000000Z-00000000"
    run.mkdir(parents=True)
    (run / "results.json").write_text("{}\n")
    (project / "runs" / ".partial-x").mkdir()
    content = json.loads(lock_plan(project).read_text())
    assert content["runs_before_lock"] == ["20261201T000000Z-00000000"]
    assert "after 1 earlier run" in format_deviations_text(plan_deviations(project))


def test_no_lock(project):
    dev = plan_deviations(project)
    assert dev["locked"] is False
    assert dev["changes"] == []
    assert dev["current_sha256"] == hashlib.sha256(PLAN.encode()).hexdigest()
    assert format_deviations_text(dev).startswith("No plan lock exists for this project")


def test_unchanged_plan_has_no_deviations(project):
    lock_plan(project)
    dev = plan_deviations(project)
    assert (dev["locked"], dev["text_changed"], dev["lock_intact"], dev["changes"]) == (True, False, True, [])
    assert "No deviations: design.yaml is unchanged since the lock." in format_deviations_text(dev)


def test_comment_only_edit_is_not_a_deviation(project):
    lock_plan(project)
    (project / "design.yaml").write_text("# reviewed by the team\n" + PLAN, encoding="utf-8")
    dev = plan_deviations(project)
    assert dev["text_changed"] is True
    assert dev["changes"] == []
    assert "only in comments or layout" in format_deviations_text(dev)


def test_deviations_list_each_changed_key_path(project):
    lock_plan(project)
    edited = (PLAN.replace("alpha: 0.05", "alpha: 0.1")
              .replace("[baseline_score]", "[baseline_score, age]")
              .replace("    family: secondary", "    family: primary")
              .replace("  block: school\n", "")
              + "subgroups: [gender]\n")
    (project / "design.yaml").write_text(edited, encoding="utf-8")
    dev = plan_deviations(project)
    assert dev["changes"] == [
        {"key": "design.block", "old": "school", "new": None, "kind": "removed"},
        {"key": "analysis.alpha", "old": 0.05, "new": 0.1, "kind": "changed"},
        {"key": "analysis.covariates", "old": ["baseline_score"], "new": ["baseline_score", "age"],
         "kind": "changed"},
        {"key": "outcomes[column=attendance].family", "old": "secondary", "new": "primary", "kind": "changed"},
        {"key": "subgroups", "old": None, "new": ["gender"], "kind": "added"},
    ]
    text = format_deviations_text(dev)
    assert "5 deviation(s) from the locked plan:" in text
    assert "  - analysis.alpha (changed): 0.05 -> 0.1" in text
    assert "  - design.block (removed): school -> (absent)" in text
    assert "  - analysis.covariates (changed): [baseline_score] -> [baseline_score, age]" in text


def test_outcome_added_removed_and_reordered(project):
    lock_plan(project)
    edited = PLAN.replace(
        "  - column: score_endline\n    family: primary\n  - column: attendance\n    family: secondary\n",
        "  - column: attendance\n    family: secondary\n  - column: wellbeing\n    family: exploratory\n")
    (project / "design.yaml").write_text(edited, encoding="utf-8")
    keys = [(c["key"], c["kind"]) for c in plan_deviations(project)["changes"]]
    assert keys == [("outcomes[column=score_endline]", "removed"), ("outcomes[column=wellbeing]", "added")]
    reordered = PLAN.replace(
        "  - column: score_endline\n    family: primary\n  - column: attendance\n    family: secondary\n",
        "  - column: attendance\n    family: secondary\n  - column: score_endline\n    family: primary\n")
    (project / "design.yaml").write_text(reordered, encoding="utf-8")
    assert plan_deviations(project)["changes"] == [
        {"key": "outcomes (order)", "old": ["score_endline", "attendance"],
         "new": ["attendance", "score_endline"], "kind": "changed"}]


def test_type_changes_count_even_when_values_compare_equal():
    # In Python 1 == 1.0 == True; in a pre-analysis plan they are different entries.
    assert diff_specs({"a": 1}, {"a": 1.0}) == [{"key": "a", "old": 1, "new": 1.0, "kind": "changed"}]
    assert diff_specs({"a": True}, {"a": 1}) == [{"key": "a", "old": True, "new": 1, "kind": "changed"}]
    with pytest.raises(TypeError, match="`old` and `new` must both be mappings"):
        diff_specs([], {})


def test_tampered_lock_is_reported(project):
    lock = lock_plan(project)
    content = json.loads(lock.read_text())
    content["design_text"] = content["design_text"].replace("0.05", "0.01")
    lock.write_text(json.dumps(content))
    dev = plan_deviations(project)
    assert dev["lock_intact"] is False
    assert "edited after locking" in format_deviations_text(dev)


def test_errors_name_the_file(project, tmp_path):
    with pytest.raises(UsageError, match="not a project folder"):
        lock_plan(tmp_path / "nowhere")
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(SpecError, match=r"empty/design.yaml: no design spec"):
        plan_deviations(empty)
    (project / "design.lock").write_text("[1, 2]")
    with pytest.raises(SpecError, match="a plan lock must hold a JSON object; got list"):
        plan_deviations(project)
    (project / "design.lock").unlink()
    (project / "design.yaml").write_text("- just\n- a list\n")
    with pytest.raises(SpecError, match="the design spec must be a mapping of keys; got list"):
        lock_plan(project)
    with pytest.raises(TypeError, match="`force` must be True or False; got 'yes'"):
        lock_plan(project, force="yes")


def test_plan_is_in_results_and_a_later_lock_does_not_break_verify(project_copy):
    """results.json holds the plan section; locking after a run leaves that run verifiable."""
    from report_kit.audit.verify import verify_run
    from report_kit.pipeline import RunOptions, analyse_project, run_project

    example = project_copy("quiet-hours")
    run = run_project(example, RunOptions(pdf=False))
    assert run.results["plan"]["locked"] is False and run.results["plan"]["changes"] == []
    lock_plan(example)
    assert analyse_project(example)["plan"]["locked"] is True  # a new analysis sees the lock
    report = verify_run(run.run_dir, analyse=analyse_project)
    assert report.ok, report.result_differences


def test_data_changed_since_the_lock(project):
    data = project / "data"
    data.mkdir()
    (data / "units.csv").write_text("pupil_id,assigned\n1,0\n", encoding="utf-8")
    lock_plan(project)
    content = json.loads((project / "design.lock").read_text(encoding="utf-8"))
    # Reference digest: hashlib over the file's bytes.
    assert content["inputs"] == {"data/units.csv": hashlib.sha256(b"pupil_id,assigned\n1,0\n").hexdigest()}
    assert plan_deviations(project)["data_changed"] == []
    (data / "units.csv").write_text("pupil_id,assigned\n1,1\n", encoding="utf-8")
    assert plan_deviations(project)["data_changed"] == ["data/units.csv"]


def test_lock_without_fingerprints_reports_no_data_status(project):
    lock_plan(project)
    path = project / "design.lock"
    content = json.loads(path.read_text(encoding="utf-8"))
    del content["inputs"]
    path.write_text(json.dumps(content), encoding="utf-8")
    assert plan_deviations(project)["data_changed"] is None
