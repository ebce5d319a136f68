"""One-file archive of a run, laid out as a project folder, and its safe extraction.

Owns :func:`archive_run` (``report-kit archive``), :func:`safe_extract` and
:func:`verify_checksums`. An archive is a zip holding::

    <project>/design.yaml              the design spec the run used
    <project>/design.lock              the plan lock: the run's copy, else the project's, if any
    <project>/data/...                 the input tables the run used
    <project>/runs/<run-id>/...        the whole run folder (manifest, RO-Crate included)
    <project>/checksums.sha256         SHA-256 of every other member

``checksums.sha256`` uses the ``<hex>  <path>`` line format with paths
relative to ``<project>/``, so ``sha256sum -c checksums.sha256`` run inside
the extracted folder checks it too. Archives are byte-identical for the same
run (fixed member order, times and permissions).
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import stat
import tempfile
import zipfile
from pathlib import Path, PurePosixPath

from report_kit.errors import ArchiveError, UsageError, VerificationError
from report_kit.files import share_like_umask
from report_kit.audit.planlock import LOCK_NAME
from report_kit.audit.provenance import (
    INPUTS_DIR, MANIFEST_NAME, RESULTS_NAME, SPEC_NAME, check_relative_path, load_json_file,
    sha256_file,
)

__all__ = ["CHECKSUMS_NAME", "archive_run", "safe_extract", "verify_checksums"]

CHECKSUMS_NAME = "checksums.sha256"
#: Time stamp of every member (the earliest a zip can hold), for byte-identical archives.
ZIP_TIME = (1980, 1, 1, 0, 0, 0)
#: Refuse to extract archives that would unpack to more than this many bytes.
MAX_EXTRACT_BYTES = 4 * 2**30
#: Refuse a member over ``_RATIO_FLOOR`` bytes that unpacks to more than this many times its
#: compressed size (a zip bomb; tables and reports compress far less — common practice).
MAX_RATIO = 200
_RATIO_FLOOR = 16 * 2**20
_CHUNK = 1 << 20
_LINE = re.compile(r"([0-9a-f]{64}) [ *](.+)")


def _run_dir(path: Path | str) -> Path:
    run_dir = Path(path)
    missing = [n for n in (RESULTS_NAME, MANIFEST_NAME) if not (run_dir / n).is_file()]
    if not run_dir.is_dir() or missing:
        raise UsageError(f"{path}: not a run folder (expected {RESULTS_NAME} and {MANIFEST_NAME} inside)")
    return run_dir.resolve()


def _source_of(run_dir: Path, project_dir: Path, rel: str, sha: str | None) -> Path:
    """The run's copy of an input, else the project file if it still has the recorded hash."""
    check_relative_path(rel, what="recorded input path")
    for candidate in (run_dir / INPUTS_DIR / rel, project_dir / rel):
        if candidate.is_file() and (sha is None or sha256_file(candidate) == sha):
            return candidate
    raise VerificationError(
        f"cannot archive {rel}: the run folder holds no copy with the recorded SHA-256 "
        f"and {project_dir / rel} is missing or has changed since the run")


def compared_run_of(run_dir: Path, manifest: dict) -> Path | None:
    """The run folder this run was compared with (recorded in its manifest), when it exists beside it."""
    compared = manifest.get("compared_to")
    if not isinstance(compared, dict) or not isinstance(compared.get("run_id"), str):
        return None
    check_relative_path(compared["run_id"], what="compared run id")
    candidate = run_dir.parent / compared["run_id"]
    return candidate if (candidate / RESULTS_NAME).is_file() else None


def _run_members(run_dir: Path) -> list[tuple[str, Path]]:
    return [(f"runs/{run_dir.name}/{path.relative_to(run_dir).as_posix()}", path)
            for path in sorted(run_dir.rglob("*")) if path.is_file()]


def _compared_members(run_dir: Path, manifest: dict, with_compared: bool | None) -> list[tuple[str, Path]]:
    if with_compared is False:
        return []
    recorded = manifest.get("compared_to")
    compared = compared_run_of(run_dir, manifest)
    if recorded and compared is None:
        if with_compared:
            raise VerificationError(f"cannot archive with the compared run: {run_dir.parent / recorded['run_id']} "
                                    "is missing (it was compared with this run)")
        return []
    if compared is None:
        if with_compared:
            raise UsageError(f"{run_dir}: --with-compared, but this run was not compared with another run")
        return []
    if sha256_file(compared / RESULTS_NAME) != recorded.get("results_sha256"):
        raise VerificationError(f"cannot archive with the compared run: {compared / RESULTS_NAME} has changed "
                                "since it was compared (SHA-256 differs from the one recorded)")
    return _run_members(compared)


def _members(run_dir: Path, with_compared: bool | None = None) -> list[tuple[str, Path]]:
    """(path inside <project>/, source file) for every member except the checksums file."""
    manifest = load_json_file(run_dir / MANIFEST_NAME, what="manifest")
    project_dir = run_dir.parent.parent
    design_sha = (manifest.get("design") or {}).get("sha256")
    members = [(SPEC_NAME, _source_of(run_dir, project_dir, SPEC_NAME, design_sha))]
    for entry in manifest.get("inputs") or []:
        if not isinstance(entry, dict) or not isinstance(entry.get("path"), str):
            raise UsageError(f"{run_dir / MANIFEST_NAME}: malformed `inputs` entry {entry!r}")
        members.append((entry["path"], _source_of(run_dir, project_dir, entry["path"], entry.get("sha256"))))
    lock = next((p for p in (run_dir / INPUTS_DIR / LOCK_NAME, project_dir / LOCK_NAME) if p.is_file()), None)
    if lock is not None:
        members.append((LOCK_NAME, lock))
    members += _run_members(run_dir)
    members += _compared_members(run_dir, manifest, with_compared)
    names = [m[0] for m in members]
    clash = sorted({n for n in names if names.count(n) > 1})
    if clash or CHECKSUMS_NAME in names:
        raise UsageError(f"cannot archive {run_dir}: two members would share the name {clash or [CHECKSUMS_NAME]}")
    return members


def _zip_info(name: str) -> zipfile.ZipInfo:
    info = zipfile.ZipInfo(name, date_time=ZIP_TIME)
    info.compress_type = zipfile.ZIP_DEFLATED
    info.external_attr = (stat.S_IFREG | 0o644) << 16
    info.create_system = 3  # unix, so the permission bits above are read as such
    return info


def _project_name(run_dir: Path) -> str:
    name = run_dir.parent.parent.name
    return name if name and name not in (".", "..") else "project"


def archive_run(run_dir: Path | str, out: Path | str | None = None, *, with_compared: bool | None = None) -> Path:
    """Write one zip holding the run, its inputs, manifest, RO-Crate and checksums.

    ``with_compared``: include the run this run was compared with (recorded in
    the manifest) as a second folder under ``runs/``, so the changes section can
    be re-derived from the zip alone. None (default) includes it when it was
    compared and the compared run is still beside it; True requires it; False
    leaves it out.

    ``out`` defaults to ``<project>/<project>-<run-id>.zip`` beside
    ``design.yaml``. Inputs are taken from the run's copies under ``inputs/``
    (or from the project folder when those still match the recorded SHA-256;
    otherwise :class:`VerificationError`). Returns the path of the zip.
    """
    run_dir = _run_dir(run_dir)
    project = _project_name(run_dir)
    out = Path(out) if out is not None else run_dir.parent.parent / f"{project}-{run_dir.name}.zip"
    if out.suffix.lower() != ".zip":
        raise UsageError(f"the archive name must end in .zip; got {out.name!r}")
    if out.resolve().is_relative_to(run_dir):
        raise UsageError(f"the archive cannot be written inside the run folder itself: {out}")
    data_dir = (run_dir.parent.parent / "data").resolve()
    if out.resolve().is_relative_to(data_dir):
        raise UsageError(f"the archive cannot be written inside the project's data folder ({data_dir}): {out}; "
                         "data/ holds the inputs and report-kit never writes there — choose another folder")
    if not out.parent.is_dir():
        raise UsageError(f"cannot write {out}: folder {out.parent} does not exist")
    if with_compared is not None and not isinstance(with_compared, bool):
        raise TypeError(f"`with_compared` must be True, False or None; got {with_compared!r}")
    members = _members(run_dir, with_compared)
    project_dir = run_dir.parent.parent
    if any(out.resolve() == (project_dir / name).resolve() for name, _ in members):
        raise UsageError(f"the archive cannot replace an input of the run: {out}; choose another file name")
    fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent)
    os.close(fd)
    try:
        _write_zip(Path(tmp), project, members)
        share_like_umask(tmp)
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return out


def _write_zip(path: Path, project: str, members: list[tuple[str, Path]]) -> None:
    lines = []
    with zipfile.ZipFile(path, "w") as zf:
        for name, source in members:
            digest = hashlib.sha256()
            size = source.stat().st_size
            with open(source, "rb") as src, zf.open(_zip_info(f"{project}/{name}"), "w",
                                                    force_zip64=size > 2**31) as dst:
                for chunk in iter(lambda: src.read(_CHUNK), b""):
                    digest.update(chunk)
                    dst.write(chunk)
            lines.append(f"{digest.hexdigest()}  {name}\n")
        zf.writestr(_zip_info(f"{project}/{CHECKSUMS_NAME}"), "".join(lines).encode("utf-8"))


# -------------------------------------------------------------------- extraction

def _member_problem(info: zipfile.ZipInfo) -> str | None:
    name = info.filename
    mode = info.external_attr >> 16
    if not name or name.startswith(("/", "\\")) or "\\" in name or "\x00" in name:
        return "has an absolute or non-portable path"
    parts = PurePosixPath(name).parts
    if ".." in parts or ":" in parts[0]:
        return "leaves the extraction folder"
    if stat.S_ISLNK(mode):
        return "is a symbolic link"
    if mode and stat.S_IFMT(mode) not in (0, stat.S_IFREG, stat.S_IFDIR):
        return "is not a regular file or folder"
    if info.flag_bits & 0x1:
        return "is encrypted"
    return None


def _check_members(infos: list[zipfile.ZipInfo], zip_path: Path, max_bytes: int) -> None:
    seen = set()
    for info in infos:
        problem = _member_problem(info)
        normal = PurePosixPath(info.filename).as_posix()
        if problem is None and normal in seen:
            problem = "appears twice"
        if problem:
            raise ArchiveError(f"refusing to extract {zip_path}: member {info.filename!r} {problem}")
        seen.add(normal)
    for info in infos:
        if info.file_size > _RATIO_FLOOR and info.file_size > MAX_RATIO * max(info.compress_size, 1):
            raise ArchiveError(f"refusing to extract {zip_path}: member {info.filename!r} unpacks to "
                               f"{info.file_size} bytes from {info.compress_size} (more than {MAX_RATIO} times "
                               "its packed size: a zip bomb?)")
    total = sum(i.file_size for i in infos)
    if total > max_bytes:
        raise ArchiveError(f"refusing to extract {zip_path}: it would unpack to {total} bytes "
                           f"(limit {max_bytes})")
    tops = {PurePosixPath(i.filename).parts[0] for i in infos}
    if len(tops) != 1:
        raise ArchiveError(f"{zip_path}: not a report-kit archive (expected one top folder; "
                         f"found {sorted(tops) or 'none'})")


def _find_run(root: Path, zip_path: Path) -> Path:
    runs = root / "runs"
    found = sorted(p for p in runs.iterdir() if p.is_dir() and (p / RESULTS_NAME).is_file()
                   and (p / MANIFEST_NAME).is_file()) if runs.is_dir() else []
    compared = {(load_json_file(p / MANIFEST_NAME, what="manifest").get("compared_to") or {}).get("run_id")
                for p in found}
    main = [p for p in found if p.name not in compared]
    if len(main) != 1:
        raise ArchiveError(f"{zip_path}: not a report-kit archive (expected exactly one run folder "
                         f"under <project>/runs/; found {len(main)}, besides any run it was compared with)")
    return main[0]


def _extract_one(zf: zipfile.ZipFile, info: zipfile.ZipInfo, target: Path, budget: int) -> int:
    """Write one member, counting the bytes actually unpacked; return the bytes left in ``budget``.

    The sizes a zip declares can lie, so the limit is checked on the stream
    itself: extraction stops as soon as the running total passes it.
    """
    if info.is_dir():
        target.mkdir(parents=True, exist_ok=True)
        return budget
    target.parent.mkdir(parents=True, exist_ok=True)
    with zf.open(info) as src, open(target, "xb") as dst:
        while chunk := src.read(_CHUNK):
            budget -= len(chunk)
            if budget < 0:
                raise _TooLarge(info.filename)
            dst.write(chunk)
    return budget


class _TooLarge(Exception):
    """Raised inside extraction when the unpacked bytes pass the limit."""


def safe_extract(zip_path: Path | str, dest: Path | str, *, max_bytes: int = MAX_EXTRACT_BYTES) -> Path:
    """Extract a report-kit archive into ``dest`` (new or empty); return the run folder.

    Every member is checked before anything is written: absolute paths,
    ``..``, backslashes, drive letters, symbolic links, special files,
    encrypted or repeated members and archives larger than ``max_bytes``
    unpacked (declared sizes, then the bytes actually unpacked, counted while
    streaming) are refused with :class:`ArchiveError` (exit code 1). Files are created with
    exclusive mode, never following links already on disk.
    """
    zip_path, dest = Path(zip_path), Path(dest)
    if not zip_path.is_file() or not zipfile.is_zipfile(zip_path):
        raise ArchiveError(f"{zip_path}: not a zip file")
    if dest.exists() and (not dest.is_dir() or any(dest.iterdir())):
        raise UsageError(f"cannot extract into {dest}: it must be a new or empty folder")
    dest.mkdir(parents=True, exist_ok=True)
    root = dest.resolve()
    with zipfile.ZipFile(zip_path) as zf:
        infos = zf.infolist()
        _check_members(infos, zip_path, max_bytes)
        budget = max_bytes
        for info in infos:
            target = root.joinpath(*PurePosixPath(info.filename).parts)
            if not target.resolve().is_relative_to(root):
                raise ArchiveError(f"refusing to extract {zip_path}: member {info.filename!r} leaves the folder")
            try:
                budget = _extract_one(zf, info, target, budget)
            except _TooLarge as err:
                for child in list(root.iterdir()):
                    shutil.rmtree(child, ignore_errors=True) if child.is_dir() else child.unlink()
                raise ArchiveError(f"refusing to extract {zip_path}: member {err} unpacks to more than its "
                                   f"declared size and the archive passes the limit of {max_bytes} bytes; "
                                   "the partly extracted files were removed") from None
            except (OSError, zipfile.BadZipFile, EOFError) as err:
                raise ArchiveError(f"cannot extract member {info.filename!r} of {zip_path}: {err}") from err
    return _find_run(root / PurePosixPath(infos[0].filename).parts[0], zip_path)


def verify_checksums(project_dir: Path | str) -> tuple[dict, ...]:
    """Check ``checksums.sha256`` of an extracted archive against the files.

    Returns one ``{path, problem, expected_sha256, actual_sha256}`` per
    difference: a listed file that is missing or has another SHA-256, a file
    present but not listed, a malformed line. An empty tuple means all match.
    """
    project = Path(project_dir)
    listing = project / CHECKSUMS_NAME
    if not listing.is_file():
        return ({"path": CHECKSUMS_NAME, "problem": "missing", "expected_sha256": None, "actual_sha256": None},)
    problems, listed = [], set()
    for number, line in enumerate(listing.read_text(encoding="utf-8").splitlines(), start=1):
        match = _LINE.fullmatch(line)
        if not match:
            problems.append({"path": f"{CHECKSUMS_NAME}:{number}", "problem": "malformed line",
                             "expected_sha256": None, "actual_sha256": None})
            continue
        expected, rel = match.groups()
        listed.add(rel)
        try:
            check_relative_path(rel, what="checksummed path")
        except UsageError:
            problems.append({"path": rel, "problem": "path leaves the folder",
                             "expected_sha256": expected, "actual_sha256": None})
            continue
        file = project / rel
        actual = sha256_file(file) if file.is_file() else None
        if actual != expected:
            problems.append({"path": rel, "problem": "missing" if actual is None else "changed",
                             "expected_sha256": expected, "actual_sha256": actual})
    for path in sorted(project.rglob("*")):
        rel = path.relative_to(project).as_posix()
        if path.is_file() and rel != CHECKSUMS_NAME and rel not in listed:
            problems.append({"path": rel, "problem": "not listed", "expected_sha256": None,
                             "actual_sha256": sha256_file(path)})
    return tuple(problems)
