"""`design.rerandomization` at the command line: assign, check, and clear errors for bad specs and data.

The reference for the drawn assignment is the recorded column of the invented
rooftop-shade project; the spec errors must name the key path.
"""

from __future__ import annotations

import pandas as pd
import yaml
from click.testing import CliRunner

from report_kit.cli import main


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def fails_cleanly(result, code: int = 1) -> str:
    assert result.exit_code == code, result.output
    assert "Traceback" not in result.output and result.output.count("report-kit: error:") == 1, result.output
    return result.output


def edit_spec(project, change):
    path = project / "design.yaml"
    doc = yaml.safe_load(path.read_text(encoding="utf-8"))
    change(doc)
    path.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")


def buildings(project):
    return project / "data" / "buildings.csv"


def test_assign_and_check_reproduce_the_rerandomized_assignment(project_copy):
    project = project_copy("rooftop-shade")
    assert invoke("check", project).exit_code == 0
    result = invoke("assign", project)
    assert result.exit_code == 0, result.output
    drawn = pd.read_csv(project / "data" / "assignment.csv")
    recorded = pd.read_csv(buildings(project))
    assert drawn["shade"].tolist() == recorded.sort_values("building")["shade"].tolist()


def test_check_finds_an_assignment_the_criterion_rejects(project_copy):
    project = project_copy("rooftop-shade")
    frame = pd.read_csv(buildings(project))
    one, zero = int(frame.index[frame["shade"] == 1][0]), int(frame.index[frame["shade"] == 0][0])
    frame.loc[[one, zero], "shade"] = [0, 1]  # swap a treated and a control unit
    frame.to_csv(buildings(project), index=False)
    out = fails_cleanly(invoke("check", project))
    assert frame.loc[one, "building"] in out and frame.loc[zero, "building"] in out


def test_spec_errors_name_the_rerandomization_keys(project_copy):
    project = project_copy("rooftop-shade")
    edit_spec(project, lambda d: d["design"]["rerandomization"].update(max_distance=-1))
    assert "max_distance" in fails_cleanly(invoke("check", project))
    project = project_copy("quiet-hours")
    edit_spec(project, lambda d: d["design"].update(mechanism="bernoulli", probability=0.5,
                                                    rerandomization={"covariates": ["visits_before"],
                                                                     "max_distance": 1.0}))
    assert "design.rerandomization" in fails_cleanly(invoke("check", project))


def test_missing_or_bad_covariate_names_file_key_and_row(project_copy):
    project = project_copy("rooftop-shade")
    edit_spec(project, lambda d: d["design"]["rerandomization"].update(covariates=["kwh_last_summer", "storeys"]))
    out = fails_cleanly(invoke("check", project))
    assert "'storeys'" in out and "design.rerandomization.covariates[1]" in out
    out = fails_cleanly(invoke("assign", project))
    assert "'storeys'" in out and "design.rerandomization.covariates[1]" in out
    frame = pd.read_csv(buildings(project))
    frame.loc[3, "floors"] = None
    frame.to_csv(buildings(project), index=False)
    edit_spec(project, lambda d: d["design"]["rerandomization"].update(covariates=["kwh_last_summer", "floors"]))
    out = fails_cleanly(invoke("check", project))
    assert "'floors'" in out and "Block D" in out


def test_rerandomized_run_by_monte_carlo_when_too_many_to_list(project_copy):
    # more assignments than analysis.max_exact: acceptable ones are sampled by the accept/reject rule;
    # the report renders and results.json says the acceptance rate is an estimate and the count unknown
    import json

    project = project_copy("rooftop-shade")
    edit_spec(project, lambda d: d["analysis"].update(max_exact=1000, randomizations=500))
    result = invoke("run", project)
    assert result.exit_code == 0, result.output
    (run_dir,) = (project / "runs").iterdir()
    results = json.loads((run_dir / "results.json").read_text(encoding="utf-8"))
    design = results["design"]
    assert design["n_assignments"] is None and design["inference_method"] == "monte_carlo"
    assert design["rerandomization"]["acceptance_rate_method"] == "monte_carlo"
    assert int(design["rerandomization"]["candidates"]) > 500
    assert results["tests"][0]["method"] == "monte_carlo" and "detail" not in results["tests"][0]
    assert "acceptable assignments were drawn at random" in (run_dir / "report.html").read_text(encoding="utf-8")
