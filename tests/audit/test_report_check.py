"""``verify --report``: the report is rendered again from results.json and compared byte for byte."""

from __future__ import annotations

import shutil
from pathlib import Path

from click.testing import CliRunner

from report_kit.audit.report_check import check_report, format_report_check
from report_kit.cli import main
from report_kit.report.render import run_stamp


def _copy_run(example_runs, tmp_path, name="quiet-hours") -> Path:
    source, run_dir, _ = example_runs[name]
    project = tmp_path / name
    shutil.copytree(source, project)
    return project / "runs" / run_dir.name


def test_a_fresh_run_renders_again_to_the_same_bytes(example_runs, tmp_path):
    run = _copy_run(example_runs, tmp_path)
    check = check_report(run)
    assert check.ok, check.differences
    tables = sorted(p.name for p in (run / "tables").glob("*.csv"))
    assert check.files_compared == 1 + len(tables) and len(tables) >= 3
    assert "identical" in format_report_check(check)
    # the run folder itself is untouched by the check
    assert not any(p.name.startswith(".partial-") for p in run.parent.iterdir())


def test_an_edited_number_a_changed_table_and_a_missing_table_are_named(example_runs, tmp_path):
    run = _copy_run(example_runs, tmp_path)
    html = (run / "report.html").read_text(encoding="utf-8")
    marker = '<p class="rk-tcap">'
    at = html.index(marker)
    (run / "report.html").write_text(html[:at] + marker + "EDITED " + html[at + len(marker):], encoding="utf-8")
    tables = sorted((run / "tables").glob("*.csv"))
    tables[0].write_text(tables[0].read_text(encoding="utf-8") + "extra,row\n", encoding="utf-8")
    tables[1].unlink()
    check = check_report(run)
    found = {d["file"]: d for d in check.differences}
    assert found["report.html"]["problem"] == "differs"
    assert "EDITED" in found["report.html"]["recorded"] and "EDITED" not in found["report.html"]["rendered"]
    assert found[f"tables/{tables[0].name}"]["problem"] == "differs"
    assert found[f"tables/{tables[1].name}"]["problem"] == "extra"   # made again, but no longer in the run
    text = format_report_check(check)
    assert "3 file(s) differ" in text and "!! report.html" in text


def test_verify_report_option_exit_codes(example_runs, tmp_path):
    run = _copy_run(example_runs, tmp_path, "arrival-signs")
    done = CliRunner().invoke(main, ["verify", str(run), "--report"])
    assert done.exit_code == 0, done.output
    lines = done.output.strip().splitlines()
    assert lines[-1] == "VERIFIED" and "report.html and" in done.output and "are identical" in done.output
    (run / "tables" / "flow.csv").write_text("edited\n", encoding="utf-8")
    done = CliRunner().invoke(main, ["verify", str(run), "--report"])
    assert done.exit_code == 3, done.output
    assert "!! tables/flow.csv" in done.output and "Traceback" not in done.output


def test_the_stamp_is_the_runs_own_time():
    # the run id starts with the UTC time the run started (pipeline.make_run_id)
    assert run_stamp(Path("runs/.partial-20261202T091509Z-6765b253")) == \
        "Run 20261202T091509Z-6765b253 · 02 December 2026, 09:15 UTC"
    assert run_stamp(Path("runs/20250101T235959Z-00000000")).endswith("01 January 2025, 23:59 UTC")


def test_verify_report_of_an_archive(example_runs, tmp_path):
    run = _copy_run(example_runs, tmp_path)
    zip_path = tmp_path / "run.zip"
    done = CliRunner().invoke(main, ["archive", str(run), "-o", str(zip_path)])
    assert done.exit_code == 0, done.output
    done = CliRunner().invoke(main, ["verify", str(zip_path), "--report"])
    assert done.exit_code == 0, done.output
    assert "are identical" in done.output and done.output.strip().splitlines()[-1] == "VERIFIED"
