"""Faults: runs killed at several points leave earlier runs byte-identical, and the next run is clean.

A copy of an example project that already holds a run is run again with
``report-kit run`` in a subprocess; the process is stopped (SIGTERM, SIGHUP)
or killed (SIGKILL) when its progress reaches a given step. After each fault
the earlier run folder must be byte-identical; after SIGTERM/SIGHUP no partial
folder may remain; after SIGKILL the next run removes the partial folder the
dead run left, succeeds, and leaves exactly one new run folder.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from report_kit.files import file_mode, folder_mode

ROOT = Path(__file__).resolve().parents[2]

# (signal, progress text at which it is sent, exit status expected)
FAULTS = [
    (signal.SIGHUP, "analysing (estimates", 128 + signal.SIGHUP),
    (signal.SIGTERM, "executing the report notebook", 128 + signal.SIGTERM),
    (signal.SIGKILL, "rendering HTML", -signal.SIGKILL),
]


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _command(project: Path) -> list[str]:
    return [sys.executable, "-m", "report_kit.cli", "run", str(project), "--no-pdf"]


def _env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}


def _run_until(project: Path, marker: str, signum: int) -> tuple[int, str]:
    """Start a run, send ``signum`` when a progress line holds ``marker``; return (status, stderr)."""
    proc = subprocess.Popen(_command(project), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            env=_env(), start_new_session=True)
    seen = []
    try:
        for line in proc.stderr:
            seen.append(line)
            if marker in line:
                proc.send_signal(signum)
                break
        seen += proc.stderr.readlines()
        status = proc.wait()
    finally:
        try:  # a kernel orphaned by SIGKILL: end the whole session this test started
            os.killpg(proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        proc.stderr.close()
    return status, "".join(seen)


@pytest.mark.skipif(not hasattr(signal, "SIGHUP"), reason="POSIX signals")
def test_killed_runs_leave_earlier_runs_intact_and_the_next_run_clean(example_runs, tmp_path):
    source, earlier, _ = example_runs["quiet-hours"]
    project = tmp_path / "quiet-hours"
    shutil.copytree(source, project)
    before = _snapshot(project / "runs" / earlier.name)
    data_before = _snapshot(project / "data")
    for signum, marker, expected in FAULTS:
        status, stderr = _run_until(project, marker, signum)
        assert marker in stderr, stderr
        assert status == expected, stderr
        assert "Traceback" not in stderr and "internal error" not in stderr, stderr
        assert _snapshot(project / "runs" / earlier.name) == before
        assert [p.name for p in (project / "runs").iterdir() if not p.name.startswith(".")] == [earlier.name]
        if signum != signal.SIGKILL:
            assert "stopped (SIG" in stderr and "no run folder was left behind" in stderr, stderr
            assert not list((project / "runs").glob(".partial-*")), stderr
        else:
            assert len(list((project / "runs").glob(".partial-*"))) == 1  # the dead run's, until the next run
    done = subprocess.run(_command(project), capture_output=True, text=True, env=_env(), check=False)
    assert done.returncode == 0, done.stderr
    assert "left by a stopped run" in done.stderr
    names = sorted(p.name for p in (project / "runs").iterdir())
    assert len(names) == 2 and earlier.name in names, names
    assert _snapshot(project / "runs" / earlier.name) == before
    assert _snapshot(project / "data") == data_before
    new = project / "runs" / next(n for n in names if n != earlier.name)
    for path in (new, new / "results.json", new / "manifest.json", new / "report.html"):  # shared per umask
        assert path.stat().st_mode & 0o777 == (folder_mode() if path.is_dir() else file_mode()), path
