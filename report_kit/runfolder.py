"""The run folder on disk: reserving a run id, the partial folder and its owner, faults.

Owns what ``report-kit run`` does to ``runs/`` around the analysis:

* a run is built in ``runs/.partial-<run-id>/``, created with ``mkdir`` (atomic,
  so two runs started in the same second never share it: the second takes
  ``<run-id>-2``) and renamed to ``runs/<run-id>/`` when complete;
* the partial folder holds its owner (pid, host, process start time) in
  ``.partial-owner.json``; the next run removes a partial folder whose owner
  process is gone (same host, pid not running or reused) and leaves any other;
* SIGTERM and SIGHUP stop a run like Ctrl-C (SIGINT): the partial folder is
  removed and earlier runs are untouched;
* an ``OSError`` the user can cause (``runs`` is a file, a read-only project
  folder, a full disk) becomes a :class:`report_kit.errors.OutputError` naming
  the path and what to do.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import shutil
import signal
import socket
import threading
from collections.abc import Iterator
from pathlib import Path

from report_kit.audit.provenance import PARTIAL_OWNER_NAME
from report_kit.errors import OutputError
from report_kit.files import folder_mode

__all__ = ["PARTIAL_PREFIX", "Stopped", "finish_run", "output_error", "remove_stale_partials", "reserve_run",
           "stop_on_signals"]

PARTIAL_PREFIX = ".partial-"
_MAX_SUFFIX = 1000


class Stopped(KeyboardInterrupt):
    """The run was stopped by a signal (SIGTERM, SIGHUP); handled like Ctrl-C."""

    def __init__(self, signum: int):
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


@contextlib.contextmanager
def stop_on_signals() -> Iterator[None]:
    """Turn SIGTERM and SIGHUP into :class:`Stopped` while the block runs (main thread only)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def stop(signum, _frame):
        raise Stopped(signum)

    wanted = [s for s in (getattr(signal, "SIGTERM", None), getattr(signal, "SIGHUP", None)) if s is not None]
    previous = {s: signal.signal(s, stop) for s in wanted}
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


# --------------------------------------------------------------------------- owner of a partial folder


def _start_time(pid: int) -> str | None:
    """Start time of a process in clock ticks since boot (Linux), to tell a reused pid apart."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text(encoding="ascii", errors="replace")
    except OSError:
        return None
    fields = text[text.rfind(")") + 2:].split()
    return fields[19] if len(fields) > 19 else None


def _owner_record() -> dict:
    pid = os.getpid()
    return {"pid": pid, "host": socket.gethostname(), "start": _start_time(pid)}


def _owner_gone(owner: dict) -> bool:
    """True only when the owner ran on this host and its process no longer exists."""
    pid = owner.get("pid")
    if owner.get("host") != socket.gethostname() or not isinstance(pid, int) or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False  # a process of another user holds that pid: alive
    start = owner.get("start")
    return start is not None and _start_time(pid) not in (None, start)


def remove_stale_partials(runs: Path) -> list[Path]:
    """Remove ``runs/.partial-*`` folders whose owner process is gone; return those removed.

    A partial folder without a readable owner record, or owned by a process on
    another host (a shared drive), is left alone: it may belong to a live run.
    """
    removed = []
    if not runs.is_dir():
        return removed
    for folder in sorted(runs.glob(f"{PARTIAL_PREFIX}*")):
        if folder.is_symlink() or not folder.is_dir():
            continue
        try:
            owner = json.loads((folder / PARTIAL_OWNER_NAME).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        if isinstance(owner, dict) and _owner_gone(owner):
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
    return removed


def reserve_run(runs: Path, run_id: str) -> tuple[str, Path]:
    """Create the partial folder of a new run; return the (unique) run id and the folder.

    The id is ``run_id``, or ``run_id-2``, ``-3``… when a run of that id exists
    or is being built: ``mkdir`` either creates the folder or fails, so two
    runs started together cannot take the same id.
    """
    if runs.exists() and not runs.is_dir():
        raise OutputError(f"{runs}: exists but is a file, not a folder; report-kit keeps runs in this "
                          "folder — rename or remove the file, then run again")
    runs.mkdir(mode=folder_mode(), exist_ok=True)
    for k in range(1, _MAX_SUFFIX + 1):
        candidate = run_id if k == 1 else f"{run_id}-{k}"
        partial = runs / f"{PARTIAL_PREFIX}{candidate}"
        try:
            partial.mkdir(mode=folder_mode())
        except FileExistsError:
            continue
        if (runs / candidate).exists():
            partial.rmdir()
            continue
        (partial / PARTIAL_OWNER_NAME).write_text(json.dumps(_owner_record()), encoding="utf-8")
        return candidate, partial
    raise OutputError(f"{runs}: {_MAX_SUFFIX} runs share the id {run_id}; remove old runs/.partial-* folders "
                      "of stopped runs, then run again")


def finish_run(partial: Path, final: Path) -> None:
    """Rename a complete partial folder into place (its owner record removed first)."""
    (partial / PARTIAL_OWNER_NAME).unlink(missing_ok=True)
    partial.rename(final)


# --------------------------------------------------------------------------- OSError in words


def output_error(err: OSError, runs: Path) -> OutputError:
    """An ``OSError`` met while writing a run, as a sentence naming the path and what to do."""
    path = err.filename or runs
    code = err.errno
    if code in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        text = (f"{path}: the disk is full (or your quota is used up) while writing the run; free some space "
                "and run again (no run folder was left behind and earlier runs are untouched)")
    elif code in (errno.EACCES, errno.EPERM, errno.EROFS):
        text = (f"{path}: permission denied (or a read-only file system) while writing the run; report-kit "
                f"writes runs into {runs} — make the project folder writable (e.g. chmod u+w) or copy the "
                "project to a folder you can write")
    elif code == errno.ENOTDIR:
        text = (f"{path}: a part of this path is a file, not a folder; report-kit keeps runs in {runs} — "
                "rename or remove that file, then run again")
    else:
        text = (f"{path}: {err.strerror or err} while writing the run into {runs}; fix the folder and "
                "run again (no run folder was left behind)")
    return OutputError(text)
