"""Tests of report_kit.audit.archive: zip layout, checksums, determinism, safe extraction."""

from __future__ import annotations

import hashlib
import shutil
import stat
import subprocess
import zipfile
from pathlib import Path

import pytest

from report_kit.audit.archive import archive_run, safe_extract, verify_checksums
from report_kit.errors import ArchiveError, UsageError, VerificationError
from report_kit.inputs.model import InputFile
from report_kit.audit.provenance import RunRecord, write_manifest, write_results_json, write_ro_crate

DESIGN = "spec_version: 1\ntitle: Invented clinic-reminder pilot\ndata:\n  units: data/units.csv\n  id: unit_id\n"
UNITS = "unit_id,assigned,visits\n1,1,3\n2,0,1\n3,1,4\n4,0,2\n"
RUN_ID = "20261201T101500Z-5e5e5e5e"


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _project(tmp_path: Path, *, copies: bool = True, lock: bool = False) -> Path:
    """A project folder with one run; returns the run folder."""
    project = tmp_path / "clinic-reminders"
    (project / "data").mkdir(parents=True)
    (project / "design.yaml").write_text(DESIGN)
    (project / "data" / "units.csv").write_text(UNITS)
    if lock:
        (project / "design.lock").write_text('{"schema": "report-kit/plan-lock/1"}\n')
    run = project / "runs" / RUN_ID
    (run / "figures").mkdir(parents=True)
    write_results_json(run / "results.json", {"schema": "report-kit/results/1", "estimates": []})
    (run / "figures" / "effect.svg").write_text("<svg/>")
    if copies:
        (run / "inputs" / "data").mkdir(parents=True)
        shutil.copy(project / "design.yaml", run / "inputs" / "design.yaml")
        shutil.copy(project / "data" / "units.csv", run / "inputs" / "data" / "units.csv")
    record = RunRecord(
        project_dir=project, run_id=RUN_ID, spec_sha256=_sha(DESIGN.encode()),
        inputs=(InputFile(path="data/units.csv", sha256=_sha(UNITS.encode()), rows=4),),
        id_column="unit_id", seeds={"analysis": 5150}, argv=("report-kit", "run", "."),
        started="2026-12-01T10:15:00Z", ended="2026-12-01T10:15:04Z", renderer="builtin")
    write_manifest(run, record)
    write_ro_crate(run, record)
    return run


def test_archive_is_laid_out_as_a_project_folder(tmp_path):
    run = _project(tmp_path, lock=True)
    out = archive_run(run)
    assert out == run.parent.parent / f"clinic-reminders-{RUN_ID}.zip"
    with zipfile.ZipFile(out) as zf:
        names = zf.namelist()
        assert sorted(names) == sorted([
            "clinic-reminders/design.yaml",
            "clinic-reminders/data/units.csv",
            "clinic-reminders/design.lock",
            f"clinic-reminders/runs/{RUN_ID}/figures/effect.svg",
            f"clinic-reminders/runs/{RUN_ID}/inputs/data/units.csv",
            f"clinic-reminders/runs/{RUN_ID}/inputs/design.yaml",
            f"clinic-reminders/runs/{RUN_ID}/manifest.json",
            f"clinic-reminders/runs/{RUN_ID}/results.json",
            f"clinic-reminders/runs/{RUN_ID}/ro-crate-metadata.json",
            "clinic-reminders/checksums.sha256",
        ])
        assert zf.read("clinic-reminders/data/units.csv").decode() == UNITS
        # Reference: hashlib over each member's bytes as stored in the zip.
        lines = zf.read("clinic-reminders/checksums.sha256").decode().splitlines()
        listed = dict(reversed(line.split("  ", 1)) for line in lines)
        assert len(listed) == len(names) - 1
        for name in names:
            rel = name.split("/", 1)[1]
            if rel != "checksums.sha256":
                assert listed[rel] == _sha(zf.read(name))


@pytest.mark.skipif(shutil.which("sha256sum") is None, reason="GNU sha256sum is not installed")
def test_checksums_file_is_readable_by_sha256sum(tmp_path):
    # Outside reference: GNU coreutils `sha256sum -c` checks the same file.
    out = archive_run(_project(tmp_path), tmp_path / "a.zip")
    run = safe_extract(out, tmp_path / "x")
    proc = subprocess.run(["sha256sum", "--check", "--quiet", "checksums.sha256"],
                          cwd=run.parent.parent, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_archive_is_byte_identical_for_the_same_run(tmp_path):
    run = _project(tmp_path)
    first = archive_run(run, tmp_path / "one.zip").read_bytes()
    second = archive_run(run, tmp_path / "two.zip").read_bytes()
    assert first == second
    assert [p.name for p in tmp_path.iterdir() if p.name.endswith(".partial")] == []


def test_archive_prefers_the_run_copies(tmp_path):
    run = _project(tmp_path)
    (run.parent.parent / "data" / "units.csv").write_text(UNITS + "5,1,9\n")   # corrected later
    with zipfile.ZipFile(archive_run(run, tmp_path / "a.zip")) as zf:
        assert zf.read("clinic-reminders/data/units.csv").decode() == UNITS


def test_archive_refuses_changed_inputs_without_copies(tmp_path):
    run = _project(tmp_path, copies=False)
    assert archive_run(run, tmp_path / "ok.zip").is_file()   # project files still match
    (run.parent.parent / "data" / "units.csv").write_text(UNITS + "5,1,9\n")
    with pytest.raises(VerificationError, match="cannot archive data/units.csv: the run folder holds no copy"):
        archive_run(run, tmp_path / "bad.zip")
    assert not (tmp_path / "bad.zip").exists()


def test_archive_usage_errors(tmp_path):
    run = _project(tmp_path)
    with pytest.raises(UsageError, match="not a run folder"):
        archive_run(tmp_path)
    with pytest.raises(UsageError, match="the archive name must end in .zip; got 'a.tar'"):
        archive_run(run, tmp_path / "a.tar")
    with pytest.raises(UsageError, match="cannot be written inside the run folder"):
        archive_run(run, run / "self.zip")
    with pytest.raises(UsageError, match="does not exist"):
        archive_run(run, tmp_path / "no" / "a.zip")


def test_safe_extract_returns_the_run_folder(tmp_path):
    out = archive_run(_project(tmp_path), tmp_path / "a.zip")
    run = safe_extract(out, tmp_path / "x")
    assert run == (tmp_path / "x" / "clinic-reminders" / "runs" / RUN_ID).resolve()
    assert (run / "results.json").is_file()
    assert verify_checksums(run.parent.parent) == ()


def _zip(path: Path, members: dict[str, bytes], *, symlink: str | None = None) -> Path:
    with zipfile.ZipFile(path, "w") as zf:
        for name, data in members.items():
            zf.writestr(name, data)
        if symlink:
            info = zipfile.ZipInfo(symlink)
            info.create_system = 3
            info.external_attr = (stat.S_IFLNK | 0o777) << 16
            zf.writestr(info, "/etc/passwd")
    return path


GOOD = {"p/runs/r/results.json": b"{}", "p/runs/r/manifest.json": b"{}"}


@pytest.mark.parametrize("members, symlink, message", [
    ({**GOOD, "p/../evil.txt": b"x"}, None, "member 'p/../evil.txt' leaves the extraction folder"),
    ({**GOOD, "/abs/evil.txt": b"x"}, None, "member '/abs/evil.txt' has an absolute or non-portable path"),
    ({**GOOD, "p\\evil.txt": b"x"}, None, "has an absolute or non-portable path"),
    ({**GOOD, "C:/evil.txt": b"x"}, None, "member 'C:/evil.txt' leaves the extraction folder"),
    (GOOD, "p/runs/r/link", "member 'p/runs/r/link' is a symbolic link"),
    ({**GOOD, "q/other.txt": b"x"}, None, "expected one top folder"),
])
def test_safe_extract_refuses_unsafe_members(tmp_path, members, symlink, message):
    bad = _zip(tmp_path / "bad.zip", members, symlink=symlink)
    with pytest.raises(ArchiveError, match=message.replace("\\", "\\\\").replace("(", r"\(")):
        safe_extract(bad, tmp_path / "x")
    assert not any((tmp_path / "x").rglob("*"))      # nothing was written
    assert not (tmp_path / "evil.txt").exists()


def test_safe_extract_refuses_repeated_members(tmp_path):
    path = tmp_path / "dup.zip"
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("p/runs/r/results.json", b"{}")
        with pytest.warns(UserWarning, match="Duplicate name"):   # zipfile's own warning
            zf.writestr("p/runs/r/results.json", b"{}")
    with pytest.raises(ArchiveError, match="appears twice"):
        safe_extract(path, tmp_path / "x")
    aliased = _zip(tmp_path / "alias.zip", {**GOOD, "p/runs/r/a.txt": b"1", "p/runs//r/a.txt": b"2"})
    with pytest.raises(ArchiveError, match="member 'p/runs//r/a.txt' appears twice"):
        safe_extract(aliased, tmp_path / "y")
    clash = _zip(tmp_path / "clash.zip", {**GOOD, "p/runs/r/x": b"1", "p/runs/r/x/y": b"2"})
    with pytest.raises(ArchiveError, match="cannot extract member 'p/runs/r/x/y'"):
        safe_extract(clash, tmp_path / "z")


def test_safe_extract_usage_errors(tmp_path):
    (tmp_path / "not.zip").write_text("plain text")
    with pytest.raises(ArchiveError, match="not.zip: not a zip file"):
        safe_extract(tmp_path / "not.zip", tmp_path / "x")
    good = _zip(tmp_path / "good.zip", GOOD)
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "f").write_text("x")
    with pytest.raises(UsageError, match="must be a new or empty folder"):
        safe_extract(good, tmp_path / "full")
    no_run = _zip(tmp_path / "norun.zip", {"p/design.yaml": b"x"})
    with pytest.raises(ArchiveError, match="expected exactly one run folder under <project>/runs/; found 0"):
        safe_extract(no_run, tmp_path / "y")
    with pytest.raises(ArchiveError, match="would unpack to 4 bytes \\(limit 3\\)"):
        safe_extract(good, tmp_path / "z", max_bytes=3)


def test_verify_checksums_reports_each_difference(tmp_path):
    run = safe_extract(archive_run(_project(tmp_path), tmp_path / "a.zip"), tmp_path / "x")
    project = run.parent.parent
    (project / "data" / "units.csv").write_text(UNITS.replace("3,1,4", "3,1,5"))
    (run / "figures" / "effect.svg").unlink()
    (project / "notes.txt").write_text("added later")
    problems = {p["path"]: p["problem"] for p in verify_checksums(project)}
    assert problems == {"data/units.csv": "changed", f"runs/{RUN_ID}/figures/effect.svg": "missing",
                        "notes.txt": "not listed"}
    changed = next(p for p in verify_checksums(project) if p["path"] == "data/units.csv")
    assert changed["expected_sha256"] == _sha(UNITS.encode())
    (project / "checksums.sha256").write_text("not a checksum line\n")
    assert verify_checksums(project)[0]["problem"] == "malformed line"


def test_archive_takes_the_runs_copy_of_the_plan_lock(tmp_path):
    run = _project(tmp_path, lock=True)
    (run / "inputs" / "design.lock").write_text('{"schema": "report-kit/plan-lock/1", "copy": true}\n')
    with zipfile.ZipFile(archive_run(run, tmp_path / "a.zip")) as zf:
        assert b'"copy": true' in zf.read("clinic-reminders/design.lock")


SECOND = "20261202T090000Z-6f6f6f6f"


def _compared_pair(tmp_path: Path) -> tuple[Path, Path]:
    """Run A as made by ``_project`` and run B, made later and compared with A."""
    first = _project(tmp_path)
    second = first.parent / SECOND
    second.mkdir()
    write_results_json(second / "results.json", {"schema": "report-kit/results/1", "estimates": [1]})
    record = RunRecord(
        project_dir=first.parent.parent, run_id=SECOND, spec_sha256=_sha(DESIGN.encode()),
        inputs=(InputFile(path="data/units.csv", sha256=_sha(UNITS.encode()), rows=4),),
        id_column="unit_id", seeds={"analysis": 5150}, argv=("report-kit", "run", "."),
        started="2026-12-02T09:00:00Z", ended="2026-12-02T09:00:04Z", renderer="builtin",
        compared_to={"run_id": RUN_ID, "results_sha256": _sha((first / "results.json").read_bytes())})
    write_manifest(second, record)
    return first, second


def test_a_compared_run_travels_with_the_run_by_default(tmp_path):
    from report_kit.audit.verify import compared_run_problems

    first, second = _compared_pair(tmp_path)
    out = archive_run(second, tmp_path / "b.zip")
    with zipfile.ZipFile(out) as zf:
        names = zf.namelist()
    assert f"clinic-reminders/runs/{RUN_ID}/results.json" in names
    assert f"clinic-reminders/runs/{SECOND}/results.json" in names
    extracted = safe_extract(out, tmp_path / "x")
    assert extracted.name == SECOND          # the main run, not the one it was compared with
    assert verify_checksums(extracted.parent.parent) == ()
    assert compared_run_problems(extracted) == []
    without = archive_run(second, tmp_path / "c.zip", with_compared=False)
    with zipfile.ZipFile(without) as zf:
        assert not any(RUN_ID in n for n in zf.namelist())
    lone = safe_extract(without, tmp_path / "y")
    assert [p["problem"].split(":")[0] for p in compared_run_problems(lone)] == ["missing"]


def test_with_compared_needs_a_compared_run_that_is_unchanged(tmp_path):
    first, second = _compared_pair(tmp_path)
    with pytest.raises(UsageError, match="was not compared"):
        archive_run(first, tmp_path / "a.zip", with_compared=True)
    write_results_json(first / "results.json", {"schema": "report-kit/results/1", "estimates": [2]})
    with pytest.raises(VerificationError, match="has changed since it was compared"):
        archive_run(second, tmp_path / "b.zip")
    with pytest.raises(TypeError, match="with_compared"):
        archive_run(second, tmp_path / "b.zip", with_compared="yes")
