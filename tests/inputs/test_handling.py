"""Tests of report_kit.inputs.handling: the declared options for missing covariates,
missing subgroup values and blocks holding one arm only.

Expected counts are read off the small invented tables below by hand.
"""

from __future__ import annotations

import pytest

from report_kit.errors import DataError, SpecError
from report_kit.inputs.handling import MISSING_LEVEL, POOLED_BLOCK
from report_kit.pipeline import load_project, run_analysis
from tests.bad_inputs.builder import Case, units_with

BLOCKED = {"design.mechanism": "blocked", "design.block": "district"}
#: S5-S8 (district south) all treated: south holds one arm only.
SOUTH_ONE_ARM = units_with(("S6,0,", "S6,1,"), ("S8,0,", "S8,1,"))
#: Three districts: north mixed; east (S5, S6) all treated; west (S7, S8) all control.
EAST_WEST = units_with(("S5,1,14,260,south", "S5,1,14,260,east"), ("S6,0,10,170,south", "S6,1,10,170,east"),
                       ("S7,1,13,230,south", "S7,0,13,230,west"), ("S8,0,12,160,south", "S8,0,12,160,west"))


def _load(tmp_path, **kw):
    return load_project(Case(name="h", code=0, words=(), **kw).build(tmp_path))


def test_single_arm_blocks_error_is_the_default_and_names_the_option(tmp_path):
    with pytest.raises(DataError, match="one arm only.*design.single_arm_blocks: drop or pool"):
        _load(tmp_path, spec=BLOCKED, units=SOUTH_ONE_ARM)


def test_single_arm_blocks_drop_leaves_their_units_out(tmp_path):
    study = _load(tmp_path, spec={**BLOCKED, "design.single_arm_blocks": "drop"}, units=SOUTH_ONE_ARM)
    assert sorted(study.frame["school"]) == ["S1", "S2", "S3", "S4"]
    (record,) = study.handling
    assert record["key"] == "design.single_arm_blocks" and record["value"] == "drop"
    assert (record["n_units"], record["blocks"], record["changes_plan"]) == (4, ["south"], True)
    assert "1 block(s), 4 unit(s)" in record["statement"]


def test_single_arm_blocks_pool_makes_one_block_with_both_arms(tmp_path):
    study = _load(tmp_path, spec={**BLOCKED, "design.single_arm_blocks": "pool"}, units=EAST_WEST)
    blocks = dict(zip(study.frame["school"], study.frame["district"]))
    assert [blocks[s] for s in ("S5", "S6", "S7", "S8")] == [POOLED_BLOCK] * 4
    assert blocks["S1"] == "north" and len(study.frame) == 8
    (record,) = study.handling
    assert record["blocks"] == ["east", "west"] and record["n_units"] == 4
    results = run_analysis(study).results
    assert results["design"]["n_blocks"] == 2
    assert results["data_handling"][0]["value"] == "pool"


def test_pooling_blocks_of_the_same_arm_is_still_an_error(tmp_path):
    with pytest.raises(DataError, match=r"one arm only in 'district': \(pooled\)"):
        _load(tmp_path, spec={**BLOCKED, "design.single_arm_blocks": "pool"}, units=SOUTH_ONE_ARM)


def test_single_arm_blocks_needs_blocks(tmp_path):
    with pytest.raises(SpecError, match="design.single_arm_blocks: given, but mechanism 'complete' has no blocks"):
        _load(tmp_path, spec={"design.single_arm_blocks": "drop"})


def test_nothing_handled_means_no_record_and_a_plan_unchanged(tmp_path):
    study = _load(tmp_path, spec={**BLOCKED, "design.single_arm_blocks": "drop"})
    (record,) = study.handling
    assert (record["n_units"], record["changes_plan"]) == (0, False)
    assert "data_handling" not in run_analysis(_load(tmp_path / "plain")).results


def test_missing_covariates_drop_units(tmp_path):
    units = units_with(("S3,1,9,", "S3,1,,"), ("S4,0,11,", "S4,0,,"))
    with pytest.raises(DataError, match="analysis.missing_covariates: mean_indicator or drop_units"):
        _load(tmp_path / "a", units=units)
    study = _load(tmp_path / "b", spec={"analysis.missing_covariates": "drop_units"}, units=units)
    assert sorted(study.frame["school"]) == ["S1", "S2", "S5", "S6", "S7", "S8"]
    assert study.handling[0]["ids"] == ["S3", "S4"]


@pytest.mark.parametrize("option, level", [("own_level", MISSING_LEVEL), ("drop", None)])
def test_subgroup_missing(tmp_path, option, level):
    units = units_with(("S2,0,15,180,north", "S2,0,15,180,"))
    with pytest.raises(DataError, match="analysis.subgroup_missing: own_level or drop"):
        _load(tmp_path / "a", spec={"subgroups": ["district"]}, units=units)
    study = _load(tmp_path / "b", spec={"subgroups": ["district"], "analysis.subgroup_missing": option}, units=units)
    value = study.frame.set_index("school").loc["S2", "district"]
    assert value == level if level else value is None or value != value
    assert study.handling[0]["columns"] == {"district": 1}
    estimates = run_analysis(study).results["estimates"]
    subgroups = {e["subgroup"] for e in estimates if e["subgroup"]}
    assert any(MISSING_LEVEL in s for s in subgroups) == (option == "own_level"), subgroups


def test_unknown_option_values_are_spec_errors(tmp_path):
    with pytest.raises(SpecError, match="analysis.missing_covariates: found 'mean' .* expected one of"):
        _load(tmp_path, spec={"analysis.missing_covariates": "mean"})


def test_the_report_states_the_handling_in_methods_and_deviations(tmp_path):
    """End to end (one run): the sentence from results.json reaches the report twice."""
    from click.testing import CliRunner

    from report_kit.cli import main

    project = Case(name="h", code=0, words=(), units=SOUTH_ONE_ARM,
                   spec={**BLOCKED, "design.single_arm_blocks": "drop"}).build(tmp_path)
    result = CliRunner().invoke(main, ["run", str(project), "--no-pdf"])
    assert result.exit_code == 0, result.output
    (run,) = (project / "runs").iterdir()
    report = (run / "report.html").read_text(encoding="utf-8")
    assert report.count("As the plan declares (design.single_arm_blocks: drop)") >= 2
    assert "Data handling declared in the plan changed the analysed units" in report


def test_the_assignment_check_sees_every_unit_as_randomized(tmp_path):
    """Leaving units out (drop_units) must not turn a reproduced assignment into a mismatch."""
    import csv

    from click.testing import CliRunner

    from report_kit.cli import main

    spec = {"design.seed": 2026, "analysis.missing_covariates": "drop_units"}
    project = Case(name="h", code=0, words=(), spec=spec).build(tmp_path)
    runner = CliRunner()
    assert runner.invoke(main, ["assign", str(project)]).exit_code == 0
    drawn = {row["school"]: row["corner"] for row in csv.DictReader((project / "data/assignment.csv").open())}
    rows = list(csv.DictReader((project / "data/units.csv").open()))
    for row in rows:
        row["corner"] = drawn[row["school"]]
    rows[2]["books_before"] = ""   # S3 lacks its baseline covariate: left out of the analysis
    with (project / "data/units.csv").open("w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    result = runner.invoke(main, ["check", str(project)])
    assert result.exit_code == 0, result.output
    assert "7 units" in result.output and "assignment reproduced from design.seed 2026" in result.output


def test_missing_covariates_mean_indicator_keeps_units_and_adjusts(tmp_path):
    # Reference: Lin (2013) regression y ~ 1 + z + Xc + z:Xc with statsmodels OLS, where X is the
    # covariate filled with its mean plus a 0/1 missingness indicator (common practice), Xc centred.
    import numpy as np
    import statsmodels.api as sm

    rng = np.random.default_rng(7)
    n = 24
    corner = np.tile([1, 0], n // 2)
    books = rng.integers(5, 20, n).astype(float)
    minutes = np.round(150 + 6 * books + 40 * corner + rng.normal(0, 15, n))
    text = [f"S{i},{corner[i]},{'' if i in (0, 1, 2, 3, 4, 5) else int(books[i])},{int(minutes[i])},north"
            for i in range(n)]                                       # three gaps in each arm
    units = "school,corner,books_before,minutes,district\n" + "\n".join(text) + "\n"
    study = _load(tmp_path, spec={"analysis.missing_covariates": "mean_indicator"}, units=units)
    assert len(study.frame) == n                                    # every unit stays
    (record,) = study.handling
    assert (record["value"], record["n_units"], record["changes_plan"]) == ("mean_indicator", 6, False)
    results = run_analysis(study).results
    (row,) = [e for e in results["estimates"] if e["estimator"] == "adjusted" and e["subgroup"] is None]
    books = study.frame["books_before"].to_numpy(dtype=float)
    gap = np.isnan(books)
    X = np.column_stack([np.where(gap, np.nanmean(books), books), gap.astype(float)])
    Xc = X - X.mean(axis=0)
    z = study.frame["corner"].to_numpy(dtype=float)
    design = np.column_stack([np.ones(n), z, Xc, z[:, None] * Xc])
    fit = sm.OLS(study.frame["minutes"].to_numpy(dtype=float), design).fit()
    assert row["estimate"] == pytest.approx(fit.params[1], rel=1e-10)
