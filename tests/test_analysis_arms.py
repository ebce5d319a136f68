"""Multi-arm and factorial runs end to end: results.json rows, determinism, the report's arm sections."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from click.testing import CliRunner

from report_kit.audit.provenance import canonical_json_bytes
from report_kit.cli import main
from report_kit.pipeline import analyse_project

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
    notebooks = sorted(p.stem for p in (run_dir / "notebooks").glob("*.ipynb"))
    assert notebooks == ["01_arms", "02_arms_effects", "04_arms_checks", "05_changes", "09_provenance"]
    html = (run_dir / "report.html").read_text(encoding="utf-8")
    assert "Factorial effects" in html and "Test across all arms" in html
    assert "Text &amp; &lt;i&gt;message&lt;/i&gt;" in html and "<i>message</i>" not in html
    for name in ("arms", "factorial", "contrast_tests", "omnibus_tests", "flow"):
        assert (run_dir / "tables" / f"{name}.csv").is_file()
    assert (run_dir / "figures" / "cell_means_renewed.png").is_file()
    assert np.isfinite(pd.read_csv(run_dir / "tables" / "factorial.csv")["estimate"]).all()
