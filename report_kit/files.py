"""File-system helpers every part shares: permissions that follow the user's umask.

``tempfile.mkstemp`` and ``tempfile.mkdtemp`` create owner-only files and
folders (0600 / 0700). A run folder, an archive or an assignment file is meant
for the colleagues who share the project, so everything report-kit writes gets
the mode an ordinary ``open``/``mkdir`` would give it: 0666 / 0777 less the umask.
"""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["current_umask", "file_mode", "folder_mode", "share_like_umask"]


def current_umask() -> int:
    """The process umask, read without changing it where the system allows (Linux /proc)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)  # elsewhere: set and restore at once
    os.umask(mask)
    return mask


def file_mode() -> int:
    """Mode of a new regular file under the current umask (0644 under umask 022)."""
    return 0o666 & ~current_umask()


def folder_mode() -> int:
    """Mode of a new folder under the current umask (0755 under umask 022)."""
    return 0o777 & ~current_umask()


def share_like_umask(path: Path | str) -> None:
    """Give ``path`` (a file or folder made by ``tempfile``) the mode the umask allows."""
    path = Path(path)
    os.chmod(path, folder_mode() if path.is_dir() else file_mode())
