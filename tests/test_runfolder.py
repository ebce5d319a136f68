"""Tests of report_kit.runfolder: run ids reserved once, stale partial folders, signals, OSError sentences."""

from __future__ import annotations

import errno
import json
import os
import signal
import socket
import subprocess
import sys

import pytest

from report_kit.audit.provenance import PARTIAL_OWNER_NAME
from report_kit.errors import OutputError
from report_kit.files import file_mode, folder_mode
from report_kit.runfolder import (
    Stopped, finish_run, output_error, remove_stale_partials, reserve_run, stop_on_signals,
)

RUN_ID = "20261202T050000Z-0a0b0c0d"


def test_two_runs_in_the_same_second_get_different_ids(tmp_path):
    runs = tmp_path / "runs"
    first, partial_a = reserve_run(runs, RUN_ID)
    second, partial_b = reserve_run(runs, RUN_ID)
    assert (first, second) == (RUN_ID, f"{RUN_ID}-2")
    finish_run(partial_a, runs / first)
    third, _ = reserve_run(runs, RUN_ID)   # the finished run's id is taken too
    assert third == f"{RUN_ID}-3"
    assert not (runs / first / PARTIAL_OWNER_NAME).exists()
    assert json.loads((partial_b / PARTIAL_OWNER_NAME).read_text())["pid"] == os.getpid()


def test_runs_as_a_file_is_a_sentence(tmp_path):
    (tmp_path / "runs").write_text("x")
    with pytest.raises(OutputError, match="runs: exists but is a file, not a folder; .* rename or remove"):
        reserve_run(tmp_path / "runs", RUN_ID)


def _partial(runs, name, owner):
    folder = runs / f".partial-{name}"
    folder.mkdir(parents=True)
    (folder / "results.json").write_text("{}")
    if owner is not None:
        (folder / PARTIAL_OWNER_NAME).write_text(json.dumps(owner))
    return folder


def test_only_partials_of_dead_owners_on_this_host_are_removed(tmp_path):
    runs = tmp_path / "runs"
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, check=True)
    dead_pid = int(dead.stdout)   # a process that has exited (its pid is free unless reused at once)
    gone = _partial(runs, "a", {"pid": dead_pid, "host": socket.gethostname(), "start": None})
    alive = _partial(runs, "b", {"pid": os.getpid(), "host": socket.gethostname(), "start": None})
    other_host = _partial(runs, "c", {"pid": dead_pid, "host": socket.gethostname() + "-elsewhere"})
    unowned = _partial(runs, "d", None)
    reused = _partial(runs, "e", {"pid": os.getpid(), "host": socket.gethostname(), "start": "1"})
    removed = remove_stale_partials(runs)
    assert set(removed) == {gone, reused}
    assert alive.is_dir() and other_host.is_dir() and unowned.is_dir()
    assert not gone.exists() and not reused.exists()


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP])
def test_sigterm_and_sighup_stop_like_ctrl_c(signum):
    before = signal.getsignal(signum)
    with pytest.raises(KeyboardInterrupt) as info, stop_on_signals():
        os.kill(os.getpid(), signum)
    assert isinstance(info.value, Stopped) and info.value.signum == signum
    assert signal.getsignal(signum) == before   # the previous handler is back


@pytest.mark.parametrize("code, words", [
    (errno.ENOSPC, "the disk is full"),
    (errno.EACCES, "permission denied"),
    (errno.ENOTDIR, "is a file, not a folder"),
    (errno.EIO, "Input/output error"),
])
def test_os_errors_become_sentences_naming_the_path(tmp_path, code, words):
    err = output_error(OSError(code, os.strerror(code), str(tmp_path / "x.json")), tmp_path / "runs")
    assert isinstance(err, OutputError)
    assert str(err).startswith(f"{tmp_path / 'x.json'}: ") and words in str(err)


def test_new_folders_and_files_follow_the_umask(tmp_path):
    old = os.umask(0o027)
    try:
        assert (folder_mode(), file_mode()) == (0o750, 0o640)
        _, partial = reserve_run(tmp_path / "runs", RUN_ID)
        assert partial.stat().st_mode & 0o777 == 0o750
    finally:
        os.umask(old)
