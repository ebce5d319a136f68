"""The command line and the run folder: the walking skeleton end to end."""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from report_kit.cli import main
from report_kit.report.render import quarto_available

from tests.conftest import EXAMPLES, ROOT


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def tree_digest(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("name", EXAMPLES)
def test_example_run_folder_contents(example_runs, name):
    project, run_dir, result = example_runs[name]
    assert result.output.splitlines()[0] == f"report: {run_dir}/report.html"
    for item in ("report.html", "report.pdf", "results.json", "manifest.json", "ro-crate-metadata.json", "run.log"):
        assert (run_dir / item).is_file(), item
    assert list((run_dir / "tables").glob("*.csv")) and list((run_dir / "figures").glob("*.png"))
    assert list((run_dir / "notebooks").glob("*.ipynb"))
    assert (run_dir / "report.pdf").read_bytes()[:5] == b"%PDF-"
    page = (run_dir / "report.html").read_text(encoding="utf-8")
    assert "data:image/png;base64," in page and "<script src=" not in page  # self-contained
    assert "not proof of benefit or of safety" in page and "ethics approval" in page
    results = json.loads((run_dir / "results.json").read_text())
    assert results["schema"] == "report-kit/results/1"
    assert {e["outcome"] for e in results["estimates"]} >= {o for o in _outcomes(project)}
    assert not list((project / "runs").glob(".partial-*"))


def _outcomes(project: Path):
    import yaml

    return [o["column"] for o in yaml.safe_load((project / "design.yaml").read_text())["outcomes"]]


def test_run_estimate_matches_direct_computation(example_runs):
    # Difference in means checked against a direct pandas computation of the group means.
    import pandas as pd

    project, run_dir, _ = example_runs["quiet-hours"]
    data = pd.read_csv(project / "data" / "branches.csv")
    means = data.groupby("quiet_hour")["visits_after"].mean()
    results = json.loads((run_dir / "results.json").read_text())
    row = next(e for e in results["estimates"] if e["outcome"] == "visits_after" and e["estimator"] == "unadjusted")
    assert row["estimate"] == pytest.approx(means[1] - means[0], rel=1e-12)


@pytest.mark.parametrize("name", EXAMPLES)
def test_data_folder_untouched(example_runs, name):
    project, _, _ = example_runs[name]
    assert tree_digest(project / "data") == tree_digest(ROOT / "projects" / name / "data")


def test_failed_run_leaves_no_run_folder(project_copy, monkeypatch):
    project = project_copy("quiet-hours")
    from report_kit.report import notebooks, render

    def broken(*args, **kwargs):
        raise render.ReportError("renderer exploded on purpose")

    monkeypatch.setitem(render.RENDERERS, "builtin", broken)
    # The failure comes after the analysis; the notebooks add nothing to what is tested here.
    monkeypatch.setattr(notebooks, "execute_all", lambda *args, **kwargs: [])
    result = invoke("run", project)
    assert result.exit_code == 1 and "renderer exploded on purpose" in result.output
    assert list((project / "runs").iterdir()) == []


def test_failed_run_keeps_earlier_run(example_runs, tmp_path):
    source, run_dir, _ = example_runs["quiet-hours"]
    project = tmp_path / "quiet-hours"
    shutil.copytree(source, project)  # the project with its finished run, shared by the session
    first = project / "runs" / run_dir.name
    before = tree_digest(first)
    data = project / "data" / "branches.csv"
    data.write_text(data.read_text().replace("Alder,0,", "Alder,7,"))
    result = invoke("run", project)
    assert result.exit_code == 1 and "must be exactly 0 or 1" in result.output
    assert list((project / "runs").iterdir()) == [first] and tree_digest(first) == before


def test_wrong_path_exits_1_without_traceback(tmp_path):
    done = subprocess.run([sys.executable, "-m", "report_kit.cli", "run", str(tmp_path / "nope")],
                          capture_output=True, text=True)
    assert done.returncode == 1 and "no such project folder" in done.stderr and "Traceback" not in done.stderr


def test_invalid_spec_exits_1(project_copy):
    project = project_copy("quiet-hours")
    spec = project / "design.yaml"
    spec.write_text(spec.read_text().replace("outcomes:", "outcomse:"))
    done = subprocess.run([sys.executable, "-m", "report_kit.cli", "run", str(project)],
                          capture_output=True, text=True)
    assert done.returncode == 1 and "did you mean 'outcomes'?" in done.stderr
    assert "Traceback" not in done.stderr and not (project / "runs").exists()


def test_check_reports_ok(project_copy):
    result = invoke("check", project_copy("tutoring-clubs"))
    assert result.exit_code == 0 and "320 units" in result.output


def test_new_scaffold_passes_check_and_refuses_overwrite(tmp_path):
    target = tmp_path / "fresh"
    assert invoke("new", target).exit_code == 0
    assert invoke("check", target).exit_code == 0
    again = invoke("new", target)
    assert again.exit_code == 2 and "not empty" in again.output


def test_schema_prints_json():
    result = invoke("schema")
    assert result.exit_code == 0 and json.loads(result.output)["required"][0] == "spec_version"


@pytest.mark.skipif(not quarto_available(), reason="quarto is not on PATH; the built-in renderer is the default")
def test_quarto_renderer(project_copy):
    project = project_copy("quiet-hours")
    result = invoke("run", project, "--renderer", "quarto")
    assert result.exit_code == 0, result.output
    (run_dir,) = (project / "runs").iterdir()
    assert (run_dir / "report.html").is_file()


def test_quarto_missing_is_a_usage_error(project_copy, monkeypatch):
    monkeypatch.setattr(shutil, "which", lambda name: None)
    project = project_copy("quiet-hours")
    result = invoke("run", project, "--renderer", "quarto")
    # Refused before any work: no run folder, not even the runs/ folder.
    assert result.exit_code == 2 and "quarto" in result.output and not (project / "runs").exists()


def test_progress_off_a_terminal_is_a_line_per_tenth_of_a_long_pass(capsys, monkeypatch):
    from report_kit import cli

    bar = cli._ChunkBar()
    for done in range(1, 41):          # a quick pass: quiet
        bar.update(done, 40)
    assert capsys.readouterr().err == ""
    monkeypatch.setattr(cli._ChunkBar, "PLAIN_AFTER_SECONDS", 0.0)
    bar = cli._ChunkBar()
    for done in range(1, 41):          # a long one: ten lines, 10% to 100%
        bar.update(done, 40)
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 10 and lines[0].startswith("  · randomization draws: 10% (4 of 40 chunks")
    assert lines[-1].startswith("  · randomization draws: 100% (40 of 40 chunks")


def test_the_report_kernel_leaves_no_warning_or_socket_behind(example_runs):
    import os
    import tempfile

    _, run_dir, _ = example_runs["quiet-hours"]   # run in this process (CliRunner)
    log_text = (run_dir / "run.log").read_text(encoding="utf-8")
    assert "without encryption" not in log_text and "WARNING" not in log_text
    assert not list(Path(tempfile.gettempdir()).glob(f"report-kit-kernel-{os.getpid()}-*"))
