"""Multi-arm and factorial runs end to end: results.json rows, determinism, the report's arm sections."""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import nbformat
import numpy as np
import pandas as pd
import pytest
import yaml
from click.testing import CliRunner

from report_kit.audit.provenance import canonical_json_bytes
from report_kit.cli import main
from report_kit.pipeline import analyse_project
from report_kit.report import fmt_p
from report_kit.report.notebooks import REPORT_NOTEBOOK, SECTION_KEY

ROOT = Path(__file__).resolve().parent.parent


def copy(name: str, dest: Path) -> Path:
    target = dest / name
    shutil.copytree(ROOT / "projects" / name, target, ignore=shutil.ignore_patterns("runs"))
    return target


@pytest.fixture(scope="module")
def nudges():
    return analyse_project(ROOT / "projects" / "renewal-nudges")


def test_factorial_results_rows(nudges):
    design = nudges["design"]
    assert [a["arm"] for a in design["arms"]] == ["neither", "text", "call", "both"]
    assert design["factors"] == {"text": ["text", "both"], "call": ["call", "both"]}
    omnibus = [t for t in nudges["tests"] if t["statistic"] == "between_arms"]
    assert [t["outcome"] for t in omnibus] == ["renewed", "visits_after"]
    assert all(t["arm"] is None and t["reference"] is None for t in omnibus)
    contrasts = [t for t in nudges["tests"] if t["arm"] is not None]
    assert {(t["arm"], t["reference"]) for t in contrasts} == {("text", "neither"), ("call", "neither"),
                                                               ("both", "neither")}
    factorial = [e for e in nudges["estimates"] if e["factor"] is not None]
    assert [(e["factor"], e["estimand"]) for e in factorial if e["outcome"] == "renewed"] == [
        ("text", "main effect"), ("call", "main effect"), ("text:call", "interaction")]
    assert all(len(m) == 8 and m["arm"] is not None for m in nudges["multiplicity"])
    main = [t for t in nudges["tests"] if t.get("factor") is not None]
    assert [(t["outcome"], t["factor"], t["statistic"]) for t in main] == [
        ("renewed", "text", "main_effect"), ("renewed", "call", "main_effect"),
        ("visits_after", "text", "main_effect"), ("visits_after", "call", "main_effect")]
    assert all(t["arm"] is None and t["reference"] is None and t["method"] == "monte_carlo" for t in main)
    assert [i["factor"] for i in nudges["intervals"] if i.get("factor")] == ["text", "call", "text", "call"]
    effects = {(e["outcome"], e["factor"]): e["estimate"] for e in factorial if e["estimator"] == "unadjusted"}
    assert all(t["observed"] == pytest.approx(effects[(t["outcome"], t["factor"])], rel=1e-12) for t in main)


def test_factorial_numbers_by_hand(nudges):
    # Reference: plain means of the invented data file (pandas), the definitions of the
    # difference in means and of the factorial main effect (Dasgupta, Pillai & Rubin 2015).
    data = pd.read_csv(ROOT / "projects" / "renewal-nudges" / "data" / "members.csv")
    m = data.groupby("nudge")["renewed"].mean()
    rows = {(e["arm"], e["factor"], e["estimator"]): e for e in nudges["estimates"] if e["outcome"] == "renewed"}
    assert rows[("call", None, "unadjusted")]["estimate"] == pytest.approx(m["call"] - m["neither"])
    assert rows[(None, "text", "unadjusted")]["estimate"] == pytest.approx(
        (m["text"] + m["both"] - m["call"] - m["neither"]) / 2)
    table = {(r["outcome"], r["arm"]): r for r in nudges["arms"]}
    assert table[("renewed", "both")]["mean"] == pytest.approx(m["both"])
    assert table[("renewed", "both")]["label"] == "Text and call"


def test_multi_arm_results_are_deterministic():
    first = canonical_json_bytes(analyse_project(ROOT / "projects" / "water-letters"))
    second = canonical_json_bytes(analyse_project(ROOT / "projects" / "water-letters"))
    assert first == second
    results = json.loads(first)
    assert results["design"]["assignment_check"] == "reproduced"
    flow = {(f["outcome"], f["arm"]): f for f in results["flow"]}
    data = pd.read_csv(ROOT / "projects" / "water-letters" / "data" / "households.csv")
    lost = data[data["use_after"].isna()].groupby("letter").size()
    assert flow[("use_after", "none")]["lost"] == lost.get("none", 0)
    assert results["attrition"]["test"]["statistic"] == "between_arms"


def test_full_run_shows_arm_sections_with_escaped_labels(tmp_path):
    project = copy("renewal-nudges", tmp_path)
    doc = yaml.safe_load((project / "design.yaml").read_text(encoding="utf-8"))
    doc["design"]["arm_labels"]["text"] = "Text & <i>message</i>"
    (project / "design.yaml").write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    result = CliRunner().invoke(main, ["run", str(project)])
    assert result.exit_code == 0, result.output
    (run_dir,) = (project / "runs").iterdir()
    # One kernel: the multi-arm sections (and the unmarked ones) assembled into notebooks/report.ipynb.
    notebook = nbformat.read(run_dir / REPORT_NOTEBOOK, as_version=4)
    sections = list(dict.fromkeys(c.metadata[SECTION_KEY] for c in notebook.cells[1:]))
    assert sections == ["01_arms", "02_arms_effects", "04_arms_checks", "05_changes", "09_provenance"]
    html = (run_dir / "report.html").read_text(encoding="utf-8")
    assert "Factorial effects" in html and "Test across all arms" in html
    assert "Points to weigh" in html and "was not locked before the analysis" in html   # page-1 box, as for two arms
    assert "Text &amp; &lt;i&gt;message&lt;/i&gt;" in html and "<i>message</i>" not in html
    # The adjusted p-values of every contrast, one column per adjustment, as results.json holds them.
    assert "Several outcomes and contrasts" in html and "Westfall–Young" in html
    results = json.loads((run_dir / "results.json").read_text(encoding="utf-8"))
    wide = results["multiplicity_table"]
    assert len(wide) == 6   # 2 outcomes x 3 contrasts
    assert all(fmt_p(row["adjusted"]["bh"]) in html for row in wide)
    for name in ("arms", "factorial", "main_effect_tests", "contrast_tests", "omnibus_tests", "flow",
                 "multiplicity"):
        assert (run_dir / "tables" / f"{name}.csv").is_file()
    assert (pd.read_csv(run_dir / "tables" / "omnibus_tests.csv")["statistic"] == "between_arms").all()
    factorial = pd.read_csv(run_dir / "tables" / "main_effect_tests.csv")
    assert list(factorial["factor"]) == ["text", "call", "text", "call"]
    assert "Randomization tests of the main effects" in html and "no interaction null" in html
    assert (run_dir / "figures" / "cell_means_renewed.png").is_file()
    assert np.isfinite(pd.read_csv(run_dir / "tables" / "factorial.csv")["estimate"]).all()


def small_project(tmp_path, mechanism: str, *, compliance: bool = False, covariates: bool = True) -> Path:
    """An invented 3-arm study of 36 units (12 clusters in 2 blocks) for any multi-arm mechanism."""
    from report_kit.design.arms import draw_arms

    rng = np.random.default_rng(5)
    n = 36
    ids = [f"u{i:02d}" for i in range(n)]
    block = np.repeat(["east", "west"], n // 2)
    cluster = np.repeat([f"c{i:02d}" for i in range(12)], 3)
    kw = {"block": block if "blocked" in mechanism else None,
          "cluster": cluster if "cluster" in mechanism else None}
    arm = np.array(["a", "b", "c"], dtype=object)[draw_arms(mechanism, 3, ids, seed=11, **kw)]
    if mechanism == "bernoulli":
        arm[:3] = ["a", "b", "c"]  # every arm used
    x = rng.normal(size=n)
    y = x + (arm == "b") * 0.5 + (arm == "c") * 1.0 + rng.normal(size=n)
    y[[4, 17]] = np.nan
    frame = pd.DataFrame({"uid": ids, "arm": arm, "blk": block, "cl": cluster, "x": x, "y": y,
                          "took": ((arm != "a") & (rng.random(n) < 0.8)).astype(int)})
    (tmp_path / "data").mkdir()
    frame.to_csv(tmp_path / "data" / "units.csv", index=False)
    design = {"mechanism": mechanism, "treatment": "arm", "arms": ["a", "b", "c"], "contrasts": "pairwise"}
    if "blocked" in mechanism:
        design["block"] = "blk"
    if "cluster" in mechanism:
        design["cluster"] = "cl"
    doc = {"spec_version": 1, "title": "t", "data": {"units": "data/units.csv", "id": "uid"}, "design": design,
           "analysis": {"covariates": ["x"] if covariates else [], "randomizations": 200, "max_exact": 1000},
           "outcomes": [{"column": "y"}]}
    if compliance:
        doc["compliance"] = {"received": "took"}
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")
    return tmp_path


@pytest.mark.parametrize("mechanism", ["complete", "bernoulli", "blocked", "cluster", "blocked_cluster"])
def test_every_multi_arm_mechanism_runs(tmp_path, mechanism):
    results = analyse_project(small_project(tmp_path, mechanism, compliance=True))
    pairs = {(e["arm"], e["reference"]) for e in results["estimates"]}
    assert pairs == {("b", "a"), ("c", "a"), ("c", "b")}
    estimands = {e["estimand"] for e in results["estimates"]}
    assert estimands == {"ITT", "CACE"}
    assert len([t for t in results["tests"] if t["statistic"] == "between_arms"]) == 1
    assert len(results["intervals"]) == 3
    assert all(t["p_value"] is not None and 0 < t["p_value"] <= 1 for t in results["tests"])
    unadjusted = [e for e in results["estimates"] if e["estimator"] == "unadjusted" and e["estimand"] == "ITT"]
    assert all(e["std_error"] is not None and e["std_error"] > 0 for e in unadjusted)


def test_take_up_per_arm(tmp_path):
    project = small_project(tmp_path, "complete", compliance=True)
    results = analyse_project(project)
    data = pd.read_csv(project / "data" / "units.csv")
    rates = {r["arm"]: r["rate"] for r in results["compliance"]["rates"]}
    assert rates == pytest.approx(data.groupby("arm")["took"].mean().to_dict())


def add_subgroup(project: Path, levels=("own", "rent")) -> Path:
    """Add an invented 'tenure' column and declare it as the pre-specified subgroup."""
    data = pd.read_csv(project / "data" / "units.csv")
    data["tenure"] = np.resize(np.array(levels, dtype=object), len(data))
    data.to_csv(project / "data" / "units.csv", index=False)
    doc = yaml.safe_load((project / "design.yaml").read_text())
    doc["subgroups"] = ["tenure"]
    doc["outcomes"][0]["label"] = "Use <b>after</b>"
    (project / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")
    return project


def test_blocked_three_arms_with_a_subgroup_end_to_end(tmp_path):
    # A water-letters-like study (3 arms within 2 blocks, one covariate) with a subgroup whose
    # label carries markup: results rows, identity with the contrasts on the level's units,
    # and the report's subgroup tables with the user text escaped.
    from report_kit.estimation.arms import estimate_contrasts

    project = add_subgroup(small_project(tmp_path, "blocked"), levels=("own", "rent & <i>x</i>"))
    result = CliRunner().invoke(main, ["run", str(project)])
    assert result.exit_code == 0, result.output
    (run_dir,) = (project / "runs").iterdir()
    results = json.loads((run_dir / "results.json").read_text(encoding="utf-8"))
    assert not any("subgroup" in n for n in results["notes"])
    assert results["inference_scope"]["subgroups"]["label"] == "exploratory"
    adjusted = [e for e in results["estimates"] if e["estimator"] == "adjusted"]
    assert len(adjusted) == 3 and {e["method"] for e in adjusted} == {"lin_arms"}
    sub = [e for e in results["estimates"] if e["subgroup"] is not None]
    assert [(e["arm"], e["reference"], e["subgroup"]) for e in sub] == [
        (a, r, f"tenure={g}") for a, r in (("b", "a"), ("c", "a"), ("c", "b")) for g in ("own", "rent & <i>x</i>")]
    assert all(e["estimand"] == "subgroup ATE" and e["role"] == "lead" for e in sub)
    data = pd.read_csv(project / "data" / "units.csv")
    for e in sub:
        part = data[data["tenure"] == e["subgroup"].split("=", 1)[1]]
        rows = estimate_contrasts(part["y"].to_numpy(), part["arm"].to_numpy(dtype=object), arms=["a", "b", "c"],
                                  contrasts="pairwise", mechanism="blocked", block=part["blk"].to_numpy())
        (same,) = [r for r in rows if (r.arm, r.reference) == (e["arm"], e["reference"])]
        assert e["estimate"] == pytest.approx(same.estimate.estimate, rel=1e-12)
        assert e["std_error"] == pytest.approx(same.estimate.std_error, rel=1e-12)
        assert e["mean_treated"] == pytest.approx(part.loc[part["arm"] == e["arm"], "y"].mean())
    diffs = results["subgroup_differences"]
    assert [(d["arm"], d["subgroup"], d["subgroup_reference"], d["label"]) for d in diffs] == [
        (a, "tenure=rent & <i>x</i>", "tenure=own", "exploratory") for a in ("b", "c", "c")]
    est = {(e["arm"], e["reference"], e["subgroup"]): e for e in sub}
    for d in diffs:
        first, second = est[(d["arm"], d["reference"], d["subgroup_reference"])], est[(d["arm"], d["reference"],
                                                                                        d["subgroup"])]
        assert d["estimate"] == pytest.approx(second["estimate"] - first["estimate"], rel=1e-12)
        assert d["std_error"] == pytest.approx(math.hypot(first["std_error"], second["std_error"]), rel=1e-12)
    html = (run_dir / "report.html").read_text(encoding="utf-8")
    assert "Contrasts within subgroups" in html and "Differences between subgroups, per contrast" in html
    assert "tenure=rent &amp; &lt;i&gt;x&lt;/i&gt;" in html and "<i>x</i>" not in html
    assert "Use &lt;b&gt;after&lt;/b&gt;" in html and "Use <b>after</b>" not in html
    assert len(pd.read_csv(run_dir / "tables" / "subgroups.csv")) == 6
    assert len(pd.read_csv(run_dir / "tables" / "contrasts_y.csv")) == 6   # 3 unadjusted + 3 adjusted, no subgroups


def test_diff_names_the_contrast_that_changed(tmp_path):
    from report_kit.audit.compare import diff_results

    project = small_project(tmp_path, "complete", covariates=False)
    before = analyse_project(project)
    data = pd.read_csv(project / "data" / "units.csv")
    data.loc[data["arm"] == "c", "y"] += 1.0
    data.to_csv(project / "data" / "units.csv", index=False)
    after = analyse_project(project)
    changed = {c.label for c in diff_results(before, after).changed if c.section == "estimates"}
    assert any("arm=c" in label and "reference=a" in label for label in changed)
    assert not any("arm=b" in label and "reference=a" in label for label in changed)


@pytest.mark.parametrize("statistic, lead", [("mean_difference", "westfall_young"), ("rank_sum", "holm")])
def test_westfall_young_leads_when_shared_draws_exist(tmp_path, statistic, lead):
    project = small_project(tmp_path, "blocked", covariates=False)
    doc = yaml.safe_load((project / "design.yaml").read_text())
    doc["analysis"]["multiplicity"] = "westfall_young"
    doc["outcomes"][0]["statistic"] = statistic
    (project / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")
    results = analyse_project(project)
    leads = {m["method"] for m in results["multiplicity"] if m["lead"]}
    assert leads == {lead}
    wy = [m for m in results["multiplicity"] if m["method"] == "westfall_young"]
    assert len(wy) == (3 if lead == "westfall_young" else 0)
    assert all(m["p_adjusted"] >= m["p_value"] for m in wy)
    assert any("Holm leads instead" in n for n in results["notes"]) == (lead == "holm")


def test_multi_arm_scope_and_multiplicity_table(nudges):
    scope = nudges["inference_scope"]
    assert scope["subgroups"] is None and scope["omnibus"]["statistic"] == "between_arms"
    assert [t["outcome"] for t in scope["tests"]] == ["renewed", "visits_after"]
    # Reference: pandas.pivot_table of the multiplicity rows (general-purpose library).
    long = pd.DataFrame(nudges["multiplicity"])
    wide = long.pivot_table(index=["outcome", "arm", "reference", "family"], columns="method",
                            values="p_adjusted", aggfunc="first", sort=False)
    table = nudges["multiplicity_table"]
    assert len(table) == len(wide) == 6
    for row in table:
        assert set(row) == {"outcome", "arm", "reference", "family", "p_value", "adjusted", "lead_method"}
        for method, value in row["adjusted"].items():
            assert value == pytest.approx(wide.loc[(row["outcome"], row["arm"], row["reference"], row["family"]),
                                                   method])
        lead = long[(long.outcome == row["outcome"]) & (long.arm == row["arm"]) & long.lead]
        assert row["lead_method"] == (lead.method.iloc[0] if len(lead) else None)
