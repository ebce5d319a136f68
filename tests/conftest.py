"""Shared fixtures: copies of the example projects in a temporary folder."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ("tutoring-clubs", "quiet-hours", "arrival-signs")


def copy_project(name: str, dest: Path) -> Path:
    target = dest / name
    shutil.copytree(ROOT / "projects" / name, target, ignore=shutil.ignore_patterns("runs"))
    return target


@pytest.fixture
def project_copy(tmp_path):
    """Factory: ``project_copy("quiet-hours")`` gives a fresh copy of an example project."""
    return lambda name="quiet-hours": copy_project(name, tmp_path)


@pytest.fixture(scope="session")
def example_runs(tmp_path_factory):
    """Each example project run once through the CLI (shared by the tests that only read)."""
    from click.testing import CliRunner

    from report_kit.cli import main

    base = tmp_path_factory.mktemp("examples")
    runs = {}
    for name in EXAMPLES:
        project = copy_project(name, base)
        result = CliRunner().invoke(main, ["run", str(project)])
        assert result.exit_code == 0, result.output
        (run_dir,) = (project / "runs").iterdir()
        runs[name] = (project, run_dir, result)
    return runs
