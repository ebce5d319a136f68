"""The audit story end to end: lock, run, correct the data, re-run, diff, verify, archive."""

from __future__ import annotations

import json

import pandas as pd
from click.testing import CliRunner

from report_kit.cli import main
from report_kit.pipeline import analyse_project
from report_kit.audit.provenance import canonical_json_bytes


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def only_run(project, exclude=()):
    runs = [p for p in (project / "runs").iterdir() if p.is_dir() and p not in exclude]
    assert len(runs) == 1, runs
    return runs[0]


def test_results_are_byte_identical_across_runs(project_copy):
    project = project_copy("arrival-signs")
    assert canonical_json_bytes(analyse_project(project)) == canonical_json_bytes(analyse_project(project))


def test_correction_story(project_copy, tmp_path):
    project = project_copy("tutoring-clubs")
    assert invoke("lock", project).exit_code == 0
    first = invoke("run", project, "--no-pdf")
    assert first.exit_code == 0, first.output
    run_a = only_run(project)

    # Correct three cells and drop one unit, in the project's own copy of the data.
    endline = project / "data" / "endline.csv"
    frame = pd.read_csv(endline, dtype=str, keep_default_na=False)
    edits = {("P1005", "reading_endline"): "61.5", ("P1010", "maths_endline"): "44.0",
             ("P1020", "passed_exam"): "1" if frame.set_index("pupil_id").loc["P1020", "passed_exam"] != "1" else "0"}
    for (pid, col), value in edits.items():
        frame.loc[frame["pupil_id"] == pid, col] = value
    frame.to_csv(endline, index=False)
    pupils = project / "data" / "pupils.csv"
    p = pd.read_csv(pupils, dtype=str, keep_default_na=False)
    p[p["pupil_id"] != "P1030"].to_csv(pupils, index=False)
    frame[frame["pupil_id"] != "P1030"].to_csv(endline, index=False)

    second = invoke("run", project, "--no-pdf", "--compare-to", run_a)
    assert second.exit_code == 0, second.output
    run_b = only_run(project, exclude=(run_a,))
    page = (run_b / "report.html").read_text(encoding="utf-8")
    assert "Changes since the previous run" in page and "Deviations from the plan" in page
    assert "No key has changed since the lock" in page

    diff = invoke("diff", run_a, run_b, "--json")
    assert diff.exit_code == 0
    d = json.loads(diff.output)
    tables = {c["path"]: c["table"] for c in d["inputs"] if c["status"] == "changed"}
    cells = {(c["id"], c["column"]) for c in tables["data/endline.csv"]["cells"]}
    assert cells == set(edits)
    assert tables["data/endline.csv"]["units_removed"] == ["P1030"]
    assert tables["data/pupils.csv"]["units_removed"] == ["P1030"]
    assert tables["data/pupils.csv"]["n_changed_cells"] == 0
    assert d["summary"]["results_changed"] > 0
    # The changes section is stored beside results.json and equals `report-kit diff` (the run id aside).
    stored = json.loads((run_b / "changes.json").read_text(encoding="utf-8"))
    assert stored == d and "changes" not in json.loads((run_b / "results.json").read_text(encoding="utf-8"))

    verified = invoke("verify", run_b)
    assert verified.exit_code == 0 and "changes.json): re-derived" in verified.output
    archived = invoke("archive", run_b, "-o", tmp_path / "run_b.zip")
    assert archived.exit_code == 0, archived.output
    from_zip = invoke("verify", tmp_path / "run_b.zip")
    assert from_zip.exit_code == 0 and "changes.json): not re-derived" in from_zip.output

    raw = pupils.read_bytes()
    pupils.write_bytes(raw[:-2] + (b"9" if raw[-2:-1] != b"9" else b"8") + raw[-1:])
    failed = invoke("verify", run_b)
    assert failed.exit_code == 3 and "data/pupils.csv" in failed.output


def test_monte_carlo_path_agrees_with_exact_enumeration(project_copy):
    # Reference: the exact randomization p-values of the same study (all 160,000 assignments
    # enumerated); the Monte Carlo run must agree within 4 of its Monte Carlo standard errors.
    project = project_copy("tutoring-clubs")
    exact = analyse_project(project)
    spec = project / "design.yaml"
    spec.write_text(spec.read_text().replace("max_exact: 200000", "max_exact: 1000"))
    mc = analyse_project(project)
    assert exact["design"]["inference_method"] == "exact" and mc["design"]["inference_method"] == "monte_carlo"
    assert mc["design"]["draws"] == 5000 and mc["design"]["n_assignments"] == "160000"
    for e, m in zip(exact["tests"], mc["tests"]):
        assert m["method"] == "monte_carlo" and m["mc_std_error"] > 0
        assert abs(m["p_value"] - e["p_value"]) <= 4 * m["mc_std_error"] + 1 / 5001
    assert mc["balance"]["omnibus"]["method"] == "monte_carlo"
    assert {m["method"] for m in mc["multiplicity"]} == {"holm", "bh", "westfall_young"}
