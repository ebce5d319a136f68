"""Tests of report_kit.audit.compare: input diff by unit id, result diff, conclusion changes.

The two fake runs below are written by hand; every expected change is read
off the fixture texts (by construction), not produced by the code under test.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from report_kit.audit.compare import (
    RunDiff, compare_runs, conclusion_changes, diff_results, diff_tables, format_diff_text,
)
from report_kit.errors import DataError, UsageError
from report_kit.inputs.model import InputFile
from report_kit.audit.provenance import RunRecord, write_manifest, write_results_json

DESIGN_A = """\
spec_version: 1
title: Invented savings-nudge pilot
data:
  units: data/units.csv
  id: unit_id
  merge: [data/endline.csv]
analysis:
  alpha: 0.05
  covariates: []
"""
DESIGN_B = DESIGN_A.replace("covariates: []", "covariates: [age]")

UNITS_A = "unit_id,assigned,age\n1,1,30\n2,0,41\n3,1,25\n10,0,52\n"
# unit 2: age 41 -> 44; unit 10: assigned 0 -> 1; unit 3 removed; unit 11 added
UNITS_B = "unit_id,assigned,age\n1,1,30\n2,0,44\n10,1,52\n11,0,38\n"
ENDLINE = "unit_id,saved\n1,120\n2,80\n3,95\n10,60\n"


def _estimate(outcome, estimator, est, low, high, subgroup=None):
    return {"outcome": outcome, "estimand": "ATE", "estimator": estimator, "subgroup": subgroup,
            "estimate": est, "std_error": 0.2, "ci_low": low, "ci_high": high, "df": 10.0,
            "n_treated": 2, "n_control": 2}


def _test(outcome, statistic, p):
    return {"outcome": outcome, "statistic": statistic, "alternative": "two-sided", "null_effect": 0.0,
            "observed": 1.0, "p_value": p, "method": "exact", "draws": None, "mc_std_error": None}


RESULTS_A = {
    "schema": "report-kit/results/1",
    "design": {"mechanism": "complete", "n_units": 4, "assignment_check": "reproduced"},
    "estimates": [_estimate("saved", "unadjusted", 0.5, 0.1, 0.9),
                  _estimate("saved", "adjusted", 0.4, 0.05, 0.75)],
    "tests": [_test("saved", "mean_difference", 0.03), _test("saved", "rank_sum", 0.2),
              _test("saved", "ks", 0.05)],
    "multiplicity": [{"outcome": "saved", "family": "primary", "method": "holm",
                      "p_value": 0.03, "p_adjusted": 0.04}],
    "balance": {"covariates": [{"name": "age", "std_diff": 0.1}],
                "omnibus": {"statistic": 1.0, "p_value": 0.5, "method": "exact"}},
}
RESULTS_B = {
    "schema": "report-kit/results/1",
    "design": {"mechanism": "complete", "n_units": 4, "assignment_check": "mismatch"},
    "estimates": [_estimate("saved", "unadjusted", -0.2, -0.6, 0.2),
                  _estimate("saved", "adjusted", 0.45, 0.1, 0.8),
                  _estimate("saved", "unadjusted", 0.3, -0.1, 0.7, subgroup="gender=f")],
    "tests": [_test("saved", "mean_difference", 0.07), _test("saved", "rank_sum", 0.25),
              _test("saved", "ks", 0.0501)],
    "multiplicity": [{"outcome": "saved", "family": "primary", "method": "holm",
                      "p_value": 0.07, "p_adjusted": 0.06}],
    "balance": {"covariates": [{"name": "age", "std_diff": 0.1}],
                "omnibus": {"statistic": 1.0, "p_value": 0.5, "method": "exact"}},
}


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _make_run(root: Path, name: str, design: str, units: str, results: dict, *,
              manifest: bool = True, copies: bool = True) -> Path:
    run = root / "runs" / name
    (run / "inputs" / "data").mkdir(parents=True)
    files = {"design.yaml": design, "data/units.csv": units, "data/endline.csv": ENDLINE}
    if copies:
        for rel, text in files.items():
            (run / "inputs" / rel).write_text(text)
    inputs = tuple(InputFile(path=rel, sha256=_sha(text), rows=text.count("\n") - 1)
                   for rel, text in files.items() if rel != "design.yaml")
    write_results_json(run / "results.json", {**results, "inputs": [f.to_dict() for f in inputs]})
    if manifest:
        write_manifest(run, RunRecord(
            project_dir=root, run_id=name, spec_sha256=_sha(design), inputs=inputs, id_column="unit_id",
            seeds={}, argv=(), started="2026-12-01T00:00:00Z", ended="2026-12-01T00:00:01Z",
            renderer="builtin"))
    return run


@pytest.fixture()
def runs(tmp_path):
    a = _make_run(tmp_path, "run-a", DESIGN_A, UNITS_A, RESULTS_A)
    b = _make_run(tmp_path, "run-b", DESIGN_B, UNITS_B, RESULTS_B)
    return a, b


def test_inputs_are_compared_row_by_row(runs):
    diff = compare_runs(*runs)
    status = {c.path: c.status for c in diff.inputs}
    assert status == {"design.yaml": "changed", "data/units.csv": "changed", "data/endline.csv": "unchanged"}
    units = next(c for c in diff.inputs if c.path == "data/units.csv")
    assert (units.rows_a, units.rows_b) == (4, 4)
    table = units.table
    assert table.id_column == "unit_id"
    assert table.units_added == ("11",) and table.units_removed == ("3",)
    # ids sort as numbers: 2 before 10
    assert list(table.cells) == [
        {"id": "2", "column": "age", "old": "41", "new": "44"},
        {"id": "10", "column": "assigned", "old": "0", "new": "1"},
    ]
    assert table.changed_by_column == {"assigned": 1, "age": 1}
    assert diff.design_changes == ({"key": "analysis.covariates", "old": [], "new": ["age"], "kind": "changed"},)


def test_results_are_matched_by_key_and_moves_measured(runs):
    diff = compare_runs(*runs)
    moved = {(c.label, c.field): (c.old, c.new) for c in diff.results.changed}
    key = "estimates[outcome=saved, estimand=ATE, estimator=unadjusted]"
    assert moved[(key, "estimate")] == (0.5, -0.2)
    assert moved[("design", "assignment_check")] == ("reproduced", "mismatch")
    assert ("balance.omnibus", "p_value") not in moved
    change = next(c for c in diff.results.changed if c.label == key and c.field == "estimate")
    assert change.difference == pytest.approx(-0.7)
    assert change.relative_difference == pytest.approx(-1.4)
    assert [r.label for r in diff.results.added] == [
        "estimates[outcome=saved, estimand=ATE, estimator=unadjusted, subgroup=gender=f]"]
    assert diff.results.removed == ()


def test_conclusion_changes_are_found(runs):
    diff = compare_runs(*runs)
    assert diff.alpha == 0.05   # from run B's design copy
    found = {(c["kind"], c["label"]) for c in diff.conclusions}
    est = "estimates[outcome=saved, estimand=ATE, estimator=unadjusted]"
    assert found == {
        ("interval_zero", est),
        ("sign", est),
        ("significance", "tests[outcome=saved, statistic=mean_difference, null_effect=0.0]"),
        # p = 0.05 counts as significant at alpha = 0.05 (p <= alpha); 0.0501 does not
        ("significance", "tests[outcome=saved, statistic=ks, null_effect=0.0]"),
        ("significance", "multiplicity[outcome=saved, family=primary, method=holm]"),
    }
    interval = next(c for c in diff.conclusions if c["kind"] == "interval_zero")
    assert (interval["old"], interval["new"]) == ([0.1, 0.9], [-0.6, 0.2])
    assert "excludes zero; now [-0.6, 0.2] includes zero" in interval["message"]


def test_conclusion_rules_on_their_own():
    a = {"tests": [_test("y", "mean_difference", 0.049)], "estimates": [_estimate("y", "unadjusted", 0.0, -1, 1)]}
    b = {"tests": [_test("y", "mean_difference", 0.051)], "estimates": [_estimate("y", "unadjusted", 0.1, -1, 1)]}
    kinds = [c["kind"] for c in conclusion_changes(a, b, 0.05)]
    assert kinds == ["significance", "sign"]           # document order; 0 -> +0.1 is a sign change
    assert [c["kind"] for c in conclusion_changes(a, b, 0.06)] == ["sign"]   # both p <= 0.06
    with pytest.raises(ValueError, match=r"`alpha` must be a number strictly between 0 and 1; got 1.5"):
        conclusion_changes(a, b, 1.5)
    none_p = {"tests": [_test("y", "mean_difference", None)]}
    assert conclusion_changes(a, none_p, 0.05) == []


def test_text_output_puts_conclusions_first(runs):
    text = format_diff_text(compare_runs(*runs))
    lines = text.splitlines()
    assert lines[0] == "Run A: run-a" and lines[1] == "Run B: run-b"
    assert lines[3] == "!! CONCLUSIONS THAT CHANGED (alpha = 0.05): 5 !!"
    assert "  data/units.csv: changed (4 -> 4 rows)" in lines
    assert "      units added (1): 11" in lines
    assert "      units removed (1): 3" in lines
    assert "        unit_id=2  age: 41 -> 44" in lines
    assert "  data/endline.csv: unchanged" in lines
    assert "      analysis.covariates: [] -> [age]" in lines
    assert ("    estimates[outcome=saved, estimand=ATE, estimator=unadjusted] estimate: 0.5 -> -0.2 "
            "(-0.7, -140%)") in lines


def test_json_output_is_plain_json(runs):
    out = compare_runs(*runs).to_dict()
    text = json.dumps(out, allow_nan=False)
    back = json.loads(text)
    assert back["schema"] == "report-kit/diff/1"
    assert back["summary"]["inputs_changed"] == ["design.yaml", "data/units.csv"]
    assert back["summary"]["conclusions_changed"] == 5
    assert back["inputs"][1]["table"]["units_added"] == ["11"]


def test_identical_runs(tmp_path):
    a = _make_run(tmp_path, "run-a", DESIGN_A, UNITS_A, RESULTS_A)
    b = tmp_path / "runs" / "run-b"
    shutil.copytree(a, b)
    diff = compare_runs(a, b)
    assert diff.identical and diff.conclusions == ()
    assert "No differences: same inputs, same results." in format_diff_text(diff)


def test_runs_without_manifest_use_results_inputs_and_design_copy(tmp_path):
    a = _make_run(tmp_path, "run-a", DESIGN_A, UNITS_A, RESULTS_A, manifest=False)
    b = _make_run(tmp_path, "run-b", DESIGN_B, UNITS_B, RESULTS_B, manifest=False)
    diff = compare_runs(a, b)
    units = next(c for c in diff.inputs if c.path == "data/units.csv")
    assert units.table is not None and units.table.units_added == ("11",)


def test_missing_copies_give_a_note_not_an_error(tmp_path):
    a = _make_run(tmp_path, "run-a", DESIGN_A, UNITS_A, RESULTS_A, copies=False)
    b = _make_run(tmp_path, "run-b", DESIGN_B, UNITS_B, RESULTS_B, copies=False)
    units = next(c for c in compare_runs(a, b).inputs if c.path == "data/units.csv")
    assert units.table is None
    assert units.note == "no row-level diff: a run folder holds no copy of this file"


def test_long_cell_lists_are_summarised(tmp_path):
    ids = range(1, 31)
    a = tmp_path / "a.csv"
    b = tmp_path / "b.csv"
    a.write_text("unit_id,y\n" + "".join(f"{i},{i}\n" for i in ids))
    b.write_text("unit_id,y\n" + "".join(f"{i},{i + 100}\n" for i in ids))
    table = diff_tables(a, b, "unit_id", limit=5)
    assert table.n_changed_cells == 30 and len(table.cells) == 5 and table.truncated
    assert [c["id"] for c in table.cells] == ["1", "2", "3", "4", "5"]
    run_a = _make_run(tmp_path / "p", "run-a", DESIGN_A, a.read_text(), RESULTS_A)
    run_b = _make_run(tmp_path / "p", "run-b", DESIGN_A, b.read_text(), RESULTS_A)
    text = format_diff_text(compare_runs(run_a, run_b), max_items=20)
    assert "      cells changed (30; by column: y 30):" in text
    assert "        ... and 10 more (see the JSON output)" in text


def test_typed_tables_compare_values_not_text(tmp_path):
    a = pd.DataFrame({"unit_id": [1, 2, 3], "y": [1.0, np.nan, 3.0], "g": ["x", "y", "z"]})
    b = pd.DataFrame({"unit_id": [3, 2, 1], "y": [3.5, np.nan, 1.0], "g": ["z", "y", "x"]})
    a.to_parquet(tmp_path / "a.parquet")
    b.to_parquet(tmp_path / "b.parquet")
    table = diff_tables(tmp_path / "a.parquet", tmp_path / "b.parquet", "unit_id")
    assert list(table.cells) == [{"id": 3, "column": "y", "old": 3.0, "new": 3.5}]


def test_table_errors(tmp_path):
    (tmp_path / "a.csv").write_text("unit_id,y\n1,2\n1,3\n")
    (tmp_path / "b.csv").write_text("id,y\n1,2\n")
    with pytest.raises(DataError, match="id column 'unit_id' is missing or repeated"):
        diff_tables(tmp_path / "a.csv", tmp_path / "a.csv", "unit_id")
    with pytest.raises(DataError, match="no id column 'unit_id'"):
        diff_tables(tmp_path / "b.csv", tmp_path / "b.csv", "unit_id")
    with pytest.raises(DataError, match="no row-level diff for '.txt' files"):
        (tmp_path / "c.txt").write_text("x")
        diff_tables(tmp_path / "c.txt", tmp_path / "c.txt", "unit_id")


def test_not_a_run_folder(tmp_path, runs):
    with pytest.raises(UsageError, match="RUN_A is not a run folder \\(no results.json inside\\)"):
        compare_runs(tmp_path, runs[1])
    with pytest.raises(ValueError, match=r"`alpha` must be a number strictly between 0 and 1; got 0"):
        compare_runs(*runs, alpha=0)
    with pytest.raises(TypeError, match="`diff` must be a RunDiff; got dict"):
        format_diff_text({})
    assert isinstance(compare_runs(*runs, alpha=0.1), RunDiff)


def test_diff_results_tolerance():
    a = {"estimates": [_estimate("y", "unadjusted", 1.0, 0.5, 1.5)]}
    b = {"estimates": [_estimate("y", "unadjusted", 1.0 + 1e-12, 0.5, 1.5)]}
    assert len(diff_results(a, b).changed) == 1
    assert diff_results(a, b, rel_tol=1e-9).identical
    with pytest.raises(ValueError, match="`rel_tol` must be a finite number >= 0; got -1"):
        diff_results(a, b, rel_tol=-1)


def test_floating_point_noise_is_not_a_change(tmp_path):
    # A move of 1e-13 relative is summation-order noise (same 1e-9 rule as verify); 1e-6 is a change.
    import copy

    noisy = copy.deepcopy(RESULTS_A)
    noisy["estimates"][0]["ci_high"] *= 1 + 1e-13
    a = _make_run(tmp_path, "run-a", DESIGN_A, UNITS_A, RESULTS_A)
    b = _make_run(tmp_path, "run-b", DESIGN_A, UNITS_A, noisy)
    assert compare_runs(a, b).identical
    moved = copy.deepcopy(RESULTS_A)
    moved["estimates"][0]["ci_high"] *= 1 + 1e-6
    c = _make_run(tmp_path, "run-c", DESIGN_A, UNITS_A, moved)
    assert [ch.field for ch in compare_runs(a, c).results.changed] == ["ci_high"]
