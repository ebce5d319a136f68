"""The report notebook: templates assembled into one notebook, executed in one kernel."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from report_kit.report.notebooks import SECTION_KEY, ReportError, assemble, execute_all, template_paths

TEMPLATES = template_paths()


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom):
            names.add(node.module)
    return names


@pytest.mark.parametrize("template", TEMPLATES, ids=lambda p: p.stem)
def test_templates_import_only_the_report_api(template):
    # Thin views: the report API and pandas for tables; no statistics library, no other part.
    imports = _imports(template)
    assert imports <= {"report_kit.report", "pandas"}, imports


def test_assembled_notebook_has_one_parameters_cell_and_every_section():
    nb = assemble(TEMPLATES, {"run_dir": "/r", "project_dir": "/p"})
    tagged = [c for c in nb.cells if {"parameters", "injected-parameters"} & set(c.metadata.get("tags", []))]
    assert len(tagged) == 1 and nb.cells[0] is tagged[0]
    assert nb.cells[0].source == "run_dir = '/r'\nproject_dir = '/p'"
    sections = [c.metadata[SECTION_KEY] for c in nb.cells[1:]]
    assert list(dict.fromkeys(sections)) == [t.stem for t in TEMPLATES]
    ids = [c.id for c in nb.cells]
    assert len(set(ids)) == len(ids)
    assert ids == [c.id for c in assemble(TEMPLATES, {"run_dir": "/r", "project_dir": "/p"}).cells]  # stable


def test_a_failing_section_is_named(tmp_path):
    templates = tmp_path / "templates"
    templates.mkdir()
    (templates / "01_fine.py").write_text('# %% tags=["parameters"]\nrun_dir = ""\n\n# %%\nx = 1\n')
    (templates / "02_broken.py").write_text("# %%\nraise ValueError('section exploded')\n")
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    with pytest.raises(ReportError, match=r"02_broken\.py: report notebook failed in cell \d+: ValueError: "
                                          r"section exploded"):
        execute_all(run_dir, tmp_path, template_dir=templates)
