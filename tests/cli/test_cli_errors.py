"""Bad input at the command line: a clear message naming file, row and field, a non-zero exit, no traceback.

Each test is a bug found by feeding broken copies of the example projects to
`report-kit check` / `run` / `assign`; the comment says what happened before.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import yaml
from click.testing import CliRunner

from report_kit.cli import main
from report_kit.pipeline import analyse_project


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def fails_cleanly(result, code: int = 1) -> str:
    """The exit code is ``code`` and the output is a report-kit error, not a crash."""
    assert result.exit_code == code, result.output
    assert "Traceback" not in result.output and "internal error" not in result.output, result.output
    assert result.output.count("report-kit: error:") == 1, result.output
    return result.output


def branches(project):
    return project / "data" / "branches.csv"


def design_seed(project) -> int:
    return yaml.safe_load((project / "design.yaml").read_text(encoding="utf-8"))["design"]["seed"]


def edit_spec(project, change):
    path = project / "design.yaml"
    doc = yaml.safe_load(path.read_text(encoding="utf-8"))
    change(doc)
    path.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")


def to_xlsx(project, frame):
    frame.to_excel(project / "data" / "branches.xlsx", index=False)
    edit_spec(project, lambda d: d["data"].update(units="data/branches.xlsx"))


# --------------------------------------------------------------------------- unreadable tables


def test_empty_csv(project_copy):
    project = project_copy()
    branches(project).write_bytes(b"")
    assert "branches.csv: the file is empty" in fails_cleanly(invoke("check", project))


def test_header_only_csv(project_copy):
    # was: internal error (IndexError: single positional indexer is out-of-bounds)
    project = project_copy()
    branches(project).write_text("branch,quiet_hour,visits_before,visits_after,satisfaction\n")
    assert "branches.csv: has a header (branch, quiet_hour" in fails_cleanly(invoke("check", project))
    assert "but no data rows" in fails_cleanly(invoke("run", project, "--no-pdf"))
    assert not list((project / "runs").glob("*"))


def test_binary_garbage(project_copy):
    # was: a tokenizer message about fields on line 3
    project = project_copy()
    branches(project).write_bytes(bytes(range(256)) * 4)
    assert "branches.csv: contains binary data (a NUL byte on line 1)" in fails_cleanly(invoke("check", project))


def test_latin1_csv_names_the_line(project_copy):
    # was: "'utf-8' codec can't decode byte 0xe9 in position 160" without a line or a remedy
    project = project_copy()
    text = branches(project).read_text(encoding="utf-8").replace("Elmstead", "Elmst\u00e9ad")
    branches(project).write_bytes(text.encode("latin-1"))
    line = 1 + text.splitlines().index(next(ln for ln in text.splitlines() if ln.startswith("Elmst")))
    out = fails_cleanly(invoke("check", project))
    assert f"branches.csv: is not UTF-8 text (byte 0xe9 on line {line}" in out and "save it as UTF-8" in out


def test_utf16_csv(project_copy):
    project = project_copy()
    branches(project).write_bytes(branches(project).read_text().encode("utf-16"))
    assert "branches.csv: is UTF-16 text; save it as UTF-8" in fails_cleanly(invoke("check", project))


def test_duplicated_column_names(project_copy):
    # was: "column 'visits_before' ... not found — did you mean 'visits_after'?" (pandas renamed the copy)
    project = project_copy()
    text = branches(project).read_text()
    branches(project).write_text(text.replace("visits_before,visits_after", "visits_after,visits_after", 1))
    out = fails_cleanly(invoke("check", project))
    assert "branches.csv: duplicate column name(s) in the header: visits_after" in out


def test_row_with_extra_values(project_copy):
    # was: pandas took the first column as an index; the error blamed quiet_hour with ids np.float64(424.0)
    project = project_copy()
    lines = branches(project).read_text().splitlines()
    lines[3] += ",oops,again"
    branches(project).write_text("\n".join(lines) + "\n")
    out = fails_cleanly(invoke("check", project))
    assert "branches.csv: the header (line 1) names 5 column(s) but line 4 has 7 value(s)" in out
    assert "np.float64" not in out


def test_truncated_row(project_copy):
    # was: accepted; the missing cells silently became missing outcomes
    project = project_copy()
    lines = branches(project).read_text().splitlines()
    lines[2] = lines[2].split(",")[0] + ",1"
    branches(project).write_text("\n".join(lines) + "\n")
    assert "but line 3 has 2 value(s)" in fails_cleanly(invoke("check", project))


def test_semicolon_separated_csv(project_copy):
    project = project_copy()
    branches(project).write_text(branches(project).read_text().replace(",", ";"))
    out = fails_cleanly(invoke("check", project))
    assert "id column 'branch' (data.id) not found; the header looks separated by ';'" in out


def test_excel_file_that_is_csv(project_copy):
    # was: "cannot read the table: File is not a zip file"
    project = project_copy()
    shutil.copy(branches(project), project / "data" / "branches.xlsx")
    edit_spec(project, lambda d: d["data"].update(units="data/branches.xlsx"))
    out = fails_cleanly(invoke("check", project))
    assert "branches.xlsx: is not an Excel .xlsx workbook (it looks like text, perhaps CSV" in out


def test_units_path_is_a_folder(project_copy):
    # was: "file not found" for a folder that exists
    project = project_copy()
    (project / "data" / "folder.csv").mkdir()
    edit_spec(project, lambda d: d["data"].update(units="data/folder.csv"))
    assert "folder.csv: is a folder, not a file (named by data.units" in fails_cleanly(invoke("check", project))


def test_missing_merge_table(project_copy):
    project = project_copy()
    edit_spec(project, lambda d: d["data"].update(merge=["data/endline.csv"]))
    out = fails_cleanly(invoke("check", project))
    assert "endline.csv: file not found (named by data.merge[0] in design.yaml)" in out


# --------------------------------------------------------------------------- ids


def test_excel_ids_mixing_numbers_and_text(project_copy):
    # was: internal error (TypeError: '<' not supported between instances of 'int' and 'str')
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame["branch"] = pd.Series([1, "b", 2, "d", 3, "f", 4, "h", 5, "j", 6, "l"], dtype=object)
    to_xlsx(project, frame)
    edit_spec(project, lambda d: d["design"].pop("seed"))  # new ids: the seed no longer applies
    done = invoke("check", project)
    assert done.exit_code == 0 and "12 units" in done.output, done.output


def test_id_with_a_trailing_space_is_a_duplicate(project_copy):
    # was: accepted 'Alder ' and 'Alder' as two units
    project = project_copy()
    text = branches(project).read_text()
    second = text.splitlines()[2].split(",")[0]
    branches(project).write_text(text.replace(f"\n{second},", "\nAlder ,", 1))
    out = fails_cleanly(invoke("check", project))
    assert "column 'branch': duplicated ids at line 2 (id 'Alder'), line 3 (id 'Alder')" in out


def test_merge_ids_numbers_and_text(project_copy):
    # was: every merged id reported as unknown ('1', '2' and 'x') because 1 != '1'
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame["branch"] = range(1, 13)
    frame.drop(columns="satisfaction").to_csv(branches(project), index=False)
    (project / "data" / "extra.csv").write_text("branch,satisfaction\n1,3.5\n2,4.0\nx,2.0\n")
    edit_spec(project, lambda d: d["data"].update(merge=["data/extra.csv"]))
    out = fails_cleanly(invoke("check", project))
    assert "extra.csv: ids not present in" in out and "line 4 (id 'x')" in out
    assert "(id '1')" not in out


# --------------------------------------------------------------------------- values


def test_merge_table_without_rows_for_some_units(project_copy):
    # was: internal error (IntCastingNaNError: Cannot convert non-finite values (NA or inf) to integer)
    project = project_copy("tutoring-clubs")
    end = project / "data" / "endline.csv"
    lines = end.read_text().splitlines()
    end.write_text("\n".join(lines[:1] + lines[4:]) + "\n")
    out = fails_cleanly(invoke("check", project))
    assert "endline.csv: no row for 3 unit(s) of" in out and "line 2 (id 'P1001')" in out
    assert "column 'attended' (compliance.received) needs a value for every unit" in out


def test_infinite_outcome(project_copy):
    # was: "`y` must be finite wherever `observed` is true" from the attrition step, without file or row
    project = project_copy()
    text = branches(project).read_text().splitlines()
    cells = text[3].split(",")
    cells[3] = "inf"
    text[3] = ",".join(cells)
    branches(project).write_text("\n".join(text) + "\n")
    out = fails_cleanly(invoke("check", project))
    assert "column 'visits_after' (outcomes[0].column) must hold finite numbers" in out
    assert f"found inf at line 4 (id '{cells[0]}')" in out


def test_outcome_outside_its_range(project_copy):
    # was: "outcome 'satisfaction' has observed values outside its declared range" without file or row
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame.loc[2, "satisfaction"] = 7.0
    frame.to_csv(branches(project), index=False)
    out = fails_cleanly(invoke("check", project))
    assert "column 'satisfaction' has value(s) outside its declared range [1, 5]" in out
    assert f"line 4 (id '{frame.loc[2, 'branch']}', satisfaction = 7.0)" in out


def test_missing_covariate_with_adjustment(project_copy):
    # was (at run time only): "covariate(s) ['visits_before'] have missing values ..." without rows
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame.loc[[1, 5], "visits_before"] = np.nan
    frame.to_csv(branches(project), index=False)
    out = fails_cleanly(invoke("check", project))
    assert "column 'visits_before' (analysis.covariates[0]) is missing for 2 unit(s)" in out
    assert f"line 3 (id '{frame.loc[1, 'branch']}')" in out and "analysis.adjust: false" in out
    edit_spec(project, lambda d: d["analysis"].update(adjust=False))
    assert invoke("check", project).exit_code == 0


def test_treatment_written_as_true_false_or_decimal(project_copy):
    project = project_copy()
    frame = pd.read_csv(branches(project))
    for coded in (frame["quiet_hour"].map({1: "TRUE", 0: "FALSE"}), frame["quiet_hour"].astype(float)):
        frame.assign(quiet_hour=coded).to_csv(branches(project), index=False)
        done = invoke("check", project)
        assert done.exit_code == 0 and "assignment reproduced" in done.output, done.output


def test_blank_treatment_is_named(project_copy):
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame.loc[0, "quiet_hour"] = np.nan
    frame.to_csv(branches(project), index=False)
    out = fails_cleanly(invoke("check", project))
    assert "column 'quiet_hour' (design.treatment) must be exactly 0 or 1; found blank at line 2 (id 'Alder')" in out


def test_excel_block_labels_mixing_numbers_and_text(project_copy):
    # was (at run time): "`block` labels must be all numbers or all text; got a mixture", no file
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame["town"] = pd.Series([1, "north"] * 6, dtype=object)
    frame["quiet_hour"] = [1, 0, 0, 1] * 3
    to_xlsx(project, frame)
    edit_spec(project, lambda d: d.update(design={"mechanism": "blocked", "treatment": "quiet_hour", "block": "town"}))
    assert invoke("check", project).exit_code == 0
    results = analyse_project(project)
    assert results["design"]["n_blocks"] == 2


def test_matched_pair_of_three_units(project_copy):
    project = project_copy("arrival-signs")
    routes = project / "data" / "routes.csv"
    frame = pd.read_csv(routes)
    frame.loc[2, "pair"] = "pair-01"
    frame.to_csv(routes, index=False)
    out = fails_cleanly(invoke("check", project))
    assert "matched pairs need exactly two units, one treated, per pair" in out
    assert "pair-01 (3 unit(s), 2 treated), pair-02 (1 unit(s), 0 treated)" in out
    assert "line 4 (id 'R02a', signs = 1)" in out


# --------------------------------------------------------------------------- design.yaml


@pytest.mark.parametrize(("text", "expected"), [
    ("", "the design spec is empty"),
    ("# only a comment\n", "the design spec is empty"),
])
def test_empty_spec(project_copy, text, expected):
    project = project_copy()
    (project / "design.yaml").write_text(text)
    assert expected in fails_cleanly(invoke("check", project))


def test_spec_with_tabs(project_copy):
    project = project_copy()
    spec = project / "design.yaml"
    spec.write_text(spec.read_text().replace("  mechanism", "\tmechanism"))
    out = fails_cleanly(invoke("check", project))
    assert "not valid YAML (line" in out and "YAML indents with spaces, not tabs" in out


def test_spec_with_a_key_twice(project_copy):
    # was: accepted; the second `title:` silently won
    project = project_copy()
    spec = project / "design.yaml"
    spec.write_text(spec.read_text() + "title: again\n")
    assert "the key 'title' appears twice in one mapping (first on line" in fails_cleanly(invoke("check", project))


def test_spec_with_a_number_as_key(project_copy):
    # was: internal error (TypeError: '<' not supported between instances of 'int' and 'str')
    project = project_copy()
    spec = project / "design.yaml"
    spec.write_text(spec.read_text() + "1: 2\n")
    assert "(top level): unknown key '1'" in fails_cleanly(invoke("check", project))


def test_spec_with_nan_alpha(project_copy):
    # was: accepted (NaN passes every JSON Schema bound); the run then failed in the estimate step
    project = project_copy()
    spec = project / "design.yaml"
    spec.write_text(spec.read_text().replace("alpha: 0.05", "alpha: .nan"))
    assert "analysis.alpha: found nan (a number); expected a finite number" in fails_cleanly(invoke("check", project))


def test_spec_not_utf8(project_copy):
    project = project_copy()
    spec = project / "design.yaml"
    spec.write_bytes(spec.read_text().replace("twelve", "tw\u00e9lve").encode("latin-1"))
    out = fails_cleanly(invoke("check", project))
    assert "design.yaml: is not UTF-8 text (byte 0xe9 on line" in out


def test_whole_number_seed_written_with_a_decimal_point(project_copy):
    # was: exit 2 "`seed` must be a non-negative integer; got <seed>.0" (a usage error, no file)
    project = project_copy()
    seed = design_seed(project)
    spec = project / "design.yaml"
    spec.write_text(spec.read_text().replace(f"seed: {seed}", f"seed: {seed}.0"))
    done = invoke("check", project)
    assert done.exit_code == 0 and f"assignment reproduced from design.seed {seed}" in done.output


def test_outcome_that_is_the_treatment(project_copy):
    # was: accepted; the "effect" of treatment on itself was reported with a zero standard error
    project = project_copy()
    edit_spec(project, lambda d: d["outcomes"][0].update(column="quiet_hour"))
    out = fails_cleanly(invoke("check", project))
    assert "outcomes[0].column: 'quiet_hour' is also design.treatment" in out


def test_covariate_that_is_an_outcome(project_copy):
    project = project_copy()
    edit_spec(project, lambda d: d["analysis"].update(covariates=["visits_after"]))
    out = fails_cleanly(invoke("check", project))
    assert "analysis.covariates[0]: 'visits_after' is also outcomes[0].column" in out


def test_seed_that_cannot_draw(project_copy):
    # was: "the study has no treated unit (0 of 12 treated); both arms are needed" without file or key
    project = project_copy()
    edit_spec(project, lambda d: d["design"].update(probability=0.01))
    out = fails_cleanly(invoke("check", project))
    seed = design_seed(project)
    assert f"design.yaml: design.seed {seed}: cannot draw a complete assignment with design.probability 0.01" in out


def test_check_without_treatment_column_points_to_assign(project_copy):
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame.drop(columns="quiet_hour").to_csv(branches(project), index=False)
    out = fails_cleanly(invoke("check", project))
    assert "column 'quiet_hour' (named by design.treatment in design.yaml) not found" in out
    assert "run `report-kit assign`" in out


# --------------------------------------------------------------------------- degenerate but computable


def test_bernoulli_design_analyses(project_copy):
    # was: DataError "`observed` and `null` must be finite" (Westfall–Young met draws with an empty arm)
    project = project_copy()
    edit_spec(project, lambda d: d["design"].update(mechanism="bernoulli", probability=0.5))
    edit_spec(project, lambda d: d["analysis"].update(multiplicity="westfall_young"))
    results = analyse_project(project)
    wy = [m for m in results["multiplicity"] if m["method"] == "westfall_young"]
    assert {m["outcome"] for m in wy} == {"visits_after", "satisfaction"}
    # Each family holds one outcome here, and with one hypothesis the step-down adjustment is the raw
    # p-value itself (identity of the Westfall & Young 1993 algorithm for m = 1).
    for m in wy:
        assert m["p_adjusted"] == pytest.approx(m["p_value"], rel=1e-12)
    # 2 of the 2**12 Bernoulli assignments leave an arm empty (all treated or all control)
    assert any("2 of 4096 assignment draws" in note for note in results["notes"])


def test_outcome_missing_for_a_whole_arm_still_reports(project_copy):
    # was: UsageError "shared null draws cover outcomes ['visits_after']; the family's tested outcomes are []"
    project = project_copy()
    frame = pd.read_csv(branches(project))
    frame.loc[frame["quiet_hour"] == 1, "visits_after"] = np.nan
    frame.to_csv(branches(project), index=False)
    done = invoke("check", project)
    assert done.exit_code == 0, done.output
    results = analyse_project(project)
    test = next(t for t in results["tests"] if t["outcome"] == "visits_after")
    assert test["p_value"] is None
    assert any("visits_after" in note and "undefined" in note for note in results["notes"])
    json.dumps(results, allow_nan=False)  # null, not NaN, where undefined


def test_subprocess_has_no_traceback(project_copy):
    # A real process (not the in-process runner) for one former crash: header-only units table.
    project = project_copy()
    branches(project).write_text("branch,quiet_hour,visits_before,visits_after,satisfaction\n")
    done = subprocess.run([sys.executable, "-m", "report_kit.cli", "check", str(project)],
                          capture_output=True, text=True)
    assert done.returncode == 1 and "Traceback" not in done.stderr and "no data rows" in done.stderr


def test_library_misuse_is_type_or_value_error_and_the_cli_keeps_exit_2(tmp_path):
    """From Python, a wrong argument is a plain TypeError/ValueError; from the command line, exit 2."""
    from report_kit.audit.verify import verify_run
    from report_kit.errors import ReportKitError
    from report_kit.planning.core import planned_power
    from report_kit.validate import finite_number, tolerance

    calls = (
        (lambda: finite_number("x", "abc"), TypeError),
        (lambda: finite_number("x", float("inf")), ValueError),
        (lambda: tolerance("rel_tol", "1"), TypeError),
        (lambda: tolerance("rel_tol", -1), ValueError),
        (lambda: verify_run(tmp_path, analyse="not callable"), TypeError),
        (lambda: planned_power(n_treated=10, n_control=10, alpha=1.5), ValueError),
    )
    for call, kind in calls:
        with pytest.raises(kind) as err:
            call()
        assert not isinstance(err.value, ReportKitError)
    result = CliRunner().invoke(main, ["diff", str(tmp_path), str(tmp_path), "--max-items", "0"])
    assert result.exit_code == 2 and "Traceback" not in result.output
