"""Provenance of a run: hashes, canonical ``results.json``, manifest and RO-Crate.

Owns:

* :func:`sha256_file` -- the one file fingerprint used everywhere;
* :func:`write_results_json` -- the canonical, byte-stable serialisation of
  ``results.json`` (same inputs and seeds give the same bytes);
* :class:`RunRecord`, :func:`write_manifest` -- ``manifest.json`` of a run folder;
* :func:`write_ro_crate` -- ``ro-crate-metadata.json`` (RO-Crate 1.1);
* :func:`software_versions`, :func:`git_commit` -- the environment of a run.

The field-by-field description of both files is in ``docs/provenance.md``.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import platform
import re
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path, PurePosixPath
from urllib.parse import quote

from report_kit.errors import UsageError
from report_kit.files import share_like_umask
from report_kit.inputs.model import InputFile
from report_kit.inputs.spec import SPEC_FILENAME
from report_kit.validate import to_json_value

log = logging.getLogger(__name__)

__all__ = [
    "MANIFEST_NAME", "RO_CRATE_NAME", "RESULTS_NAME", "INPUTS_DIR", "PARTIAL_OWNER_NAME",
    "sha256_file", "sha256_bytes", "to_json_value", "canonical_json_bytes",
    "write_results_json", "write_json", "load_json_file", "RunRecord", "write_manifest", "write_ro_crate",
    "software_versions", "git_commit", "utc_now", "check_relative_path",
]

MANIFEST_NAME = "manifest.json"
#: Owner record (pid, host) of a run still being built; never part of a finished run.
PARTIAL_OWNER_NAME = ".partial-owner.json"
RO_CRATE_NAME = "ro-crate-metadata.json"
RESULTS_NAME = "results.json"
#: Folder of a run that holds copies of design.yaml and of every input table.
INPUTS_DIR = "inputs"
SPEC_NAME = SPEC_FILENAME
MANIFEST_SCHEMA = "report-kit/manifest/1"

#: Libraries whose versions every manifest records, in this order.
TRACKED_PACKAGES = (
    "report-kit", "numpy", "scipy", "pandas", "statsmodels", "matplotlib", "pyyaml",
    "jsonschema", "click", "papermill", "nbformat", "nbconvert", "nbclient", "ipykernel",
    "jupytext", "weasyprint", "pyarrow", "openpyxl",
)

#: Media types by suffix; a fixed table so the RO-Crate does not depend on the
#: host's mime database.
MEDIA_TYPES = {
    ".csv": "text/csv", ".json": "application/json", ".html": "text/html",
    ".pdf": "application/pdf", ".png": "image/png", ".svg": "image/svg+xml",
    ".ipynb": "application/x-ipynb+json", ".log": "text/plain", ".txt": "text/plain",
    ".yaml": "application/yaml", ".yml": "application/yaml", ".parquet": "application/vnd.apache.parquet",
    ".xlsx": "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet",
    ".dta": "application/x-stata-dta", ".npz": "application/zip", ".zip": "application/zip",
    ".py": "text/x-python", ".md": "text/markdown",
}

_SHA256 = re.compile(r"[0-9a-f]{64}")
_CHUNK = 1 << 20


# --------------------------------------------------------------------------- hashing

def sha256_file(path: Path | str) -> str:
    """SHA-256 digest of a file's bytes.

    Parameters
    ----------
    path : path-like
        The file; read in 1 MiB chunks, so its size does not matter.

    Returns
    -------
    str
        The digest as 64 lower-case hexadecimal digits.

    References
    ----------
    NIST (2015). *Secure Hash Standard (SHS)*, FIPS PUB 180-4, section 6.2.
    """
    path = Path(path)
    if not path.is_file():
        raise UsageError(f"cannot hash {path}: no such file")
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(_CHUNK), b""):
            digest.update(chunk)
    return digest.hexdigest()


def sha256_bytes(data: bytes) -> str:
    """SHA-256 of a byte string as 64 lower-case hex digits (FIPS 180-4)."""
    return hashlib.sha256(data).hexdigest()


def utc_now() -> str:
    """The current UTC time as ``YYYY-MM-DDTHH:MM:SSZ``."""
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def check_relative_path(path: str, *, what: str = "path") -> PurePosixPath:
    """Return ``path`` as a PurePosixPath if it stays inside its base folder.

    Rejects absolute paths, drive letters, backslashes, empty names and ``..``.
    """
    if not isinstance(path, str) or not path or "\\" in path or "\x00" in path:
        raise UsageError(f"{what} must be a relative '/'-separated path; got {path!r}")
    pure = PurePosixPath(path)
    if pure.is_absolute() or ".." in pure.parts or (pure.parts and ":" in pure.parts[0]):
        raise UsageError(f"{what} must stay inside its folder; got {path!r}")
    return pure


# ------------------------------------------------------------- canonical JSON values

def canonical_json_bytes(obj) -> bytes:
    """The canonical UTF-8 bytes of ``obj``.

    Keys keep their insertion order; two-space indent; floats use Python's
    shortest round-trip ``repr`` (so ``float(text) == value`` exactly); non-ASCII
    text is kept as UTF-8; one newline at the end.
    """
    text = json.dumps(to_json_value(obj), indent=2, ensure_ascii=False, allow_nan=False)
    return (text + "\n").encode("utf-8")


def _atomic_write(path: Path, data: bytes) -> None:
    path = Path(path)
    if not path.parent.is_dir():
        raise UsageError(f"cannot write {path}: folder {path.parent} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        share_like_umask(tmp)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_json(path: Path | str, obj) -> str:
    """Write ``obj`` as canonical JSON (see :func:`canonical_json_bytes`); return its SHA-256."""
    data = canonical_json_bytes(obj)
    _atomic_write(Path(path), data)
    return sha256_bytes(data)


def load_json_file(path: Path | str, *, what: str = "JSON file", error: type = UsageError) -> dict:
    """Read a JSON object from ``path``; unreadable or non-object content raises ``error``."""
    path = Path(path)
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as err:
        raise error(f"{path}: no such {what}") from err
    except (OSError, UnicodeDecodeError, ValueError) as err:
        raise error(f"{path}: not a readable {what} ({err})") from err
    if not isinstance(value, dict):
        raise error(f"{path}: a {what} must hold a JSON object; got {type(value).__name__}")
    return value


def write_results_json(path: Path | str, results: dict) -> str:
    """Write ``results.json`` canonically and return the SHA-256 of the bytes written.

    The same ``results`` give the same bytes on every run: key order as given,
    shortest round-trip float repr, NaN/inf as ``null``, numpy scalars as
    plain numbers, newline at the end (see :func:`to_json_value`). Keep
    timestamps and absolute paths out of ``results``; they would break the
    byte identity of two runs on the same inputs. The file is written to a
    temporary name in the same folder and renamed into place.

    Parameters
    ----------
    path : path-like
        Where to write (its folder must exist).
    results : dict
        The results, with string keys in the order of ``results.json``'s schema.

    Returns
    -------
    str
        SHA-256 of the bytes written (64 hex digits).

    References
    ----------
    Bray, T. (ed.) (2017). *The JavaScript Object Notation (JSON) Data
    Interchange Format*, RFC 8259 (numbers, UTF-8). Python's ``float.__repr__``
    gives the shortest string that reads back to the same double (Python
    documentation, "Floating Point Arithmetic: Issues and Limitations").
    """
    if not isinstance(results, dict):
        raise TypeError(f"`results` must be a dict; got {type(results).__name__}")
    return write_json(path, results)


# ------------------------------------------------------------------- environment

def software_versions() -> dict:
    """Versions of Python and of the libraries a run depends on (``None`` if absent)."""
    out = {"python": platform.python_version()}
    for name in TRACKED_PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def _git(path: Path, *args: str) -> str | None:
    env = dict(os.environ, GIT_OPTIONAL_LOCKS="0", LC_ALL="C")
    try:
        proc = subprocess.run(
            ["git", "-C", str(path), *args], capture_output=True, text=True,
            timeout=20, check=False, env=env,
        )
    except (OSError, subprocess.SubprocessError):
        return None
    return proc.stdout.strip() if proc.returncode == 0 else None


def git_commit(path: Path | str) -> str | None:
    """The commit (``HEAD``) of the git work tree holding ``path``; ``None`` outside one.

    Read-only: runs ``git rev-parse``; returns ``None`` when git is missing,
    ``path`` is not in a work tree, or the repository has no commit yet.
    """
    path = Path(path)
    folder = path if path.is_dir() else path.parent
    if not folder.is_dir():
        return None
    commit = _git(folder, "rev-parse", "--verify", "--quiet", "HEAD^{commit}")
    return commit if commit and _SHA1_OR_256.fullmatch(commit) else None


_SHA1_OR_256 = re.compile(r"[0-9a-f]{40}|[0-9a-f]{64}")


def _git_dirty(path: Path) -> bool | None:
    """True when tracked files differ from HEAD (read-only ``git status``)."""
    out = _git(path, "--no-optional-locks", "status", "--porcelain", "--untracked-files=no")
    return None if out is None else bool(out)


def _tool_git() -> dict:
    """Commit of the report-kit source tree, only when the package sits at a repo's top."""
    package = Path(__file__).resolve().parents[1]
    top = _git(package, "rev-parse", "--show-toplevel")
    if top is None or Path(top).resolve() != package.parent:
        return {"git_commit": None, "git_dirty": None}
    commit = git_commit(package)
    return {"git_commit": commit, "git_dirty": _git_dirty(package) if commit else None}


def _platform() -> dict:
    return {
        "system": platform.system(), "release": platform.release(),
        "machine": platform.machine(), "description": platform.platform(),
    }


def _python() -> dict:
    return {
        "implementation": platform.python_implementation(),
        "version": platform.python_version(),
        "executable": Path(sys.executable).name,
    }


# ---------------------------------------------------------------------- manifest

@dataclass(frozen=True, kw_only=True)
class RunRecord:
    """What the pipeline knows about a run when it records provenance.

    ``inputs`` are the project's data tables (paths relative to the project
    folder, '/'-separated); ``spec_sha256`` is the SHA-256 of ``design.yaml``;
    ``started``/``ended`` are UTC ISO-8601 strings.
    """

    project_dir: Path
    run_id: str
    spec_sha256: str
    inputs: tuple[InputFile, ...]
    id_column: str
    seeds: dict
    argv: tuple[str, ...]
    started: str
    ended: str
    renderer: str
    compared_to: dict | None = None     # {run_id, results_sha256} of the run compared with, if any


def _validate_record(run_dir: Path | str, record: RunRecord) -> Path:
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise UsageError(f"{run_dir}: not a folder")
    if not isinstance(record, RunRecord):
        raise TypeError(f"`record` must be a RunRecord; got {type(record).__name__}")
    if not _SHA256.fullmatch(str(record.spec_sha256)):
        raise ValueError(f"`spec_sha256` must be 64 lower-case hex digits; got {record.spec_sha256!r}")
    for f in record.inputs:
        if not isinstance(f, InputFile):
            raise TypeError(f"`inputs` must hold InputFile objects; got {type(f).__name__}")
        check_relative_path(f.path, what="input path")
        if not _SHA256.fullmatch(f.sha256):
            raise ValueError(f"input {f.path}: `sha256` must be 64 lower-case hex digits; got {f.sha256!r}")
    if not isinstance(record.seeds, dict):
        raise TypeError(f"`seeds` must be a dict; got {type(record.seeds).__name__}")
    return run_dir


def _run_files(run_dir: Path) -> list[str]:
    """Every file under the run folder except the two provenance files, sorted."""
    skip = {MANIFEST_NAME, RO_CRATE_NAME, PARTIAL_OWNER_NAME}
    out = []
    for path in run_dir.rglob("*"):
        rel = path.relative_to(run_dir).as_posix()
        if path.is_file() and rel not in skip:
            out.append(rel)
    return sorted(out)


def _file_entry(run_dir: Path, rel: str) -> dict:
    path = run_dir / rel
    return {"path": rel, "sha256": sha256_file(path), "bytes": path.stat().st_size}


def build_manifest(run_dir: Path | str, record: RunRecord) -> dict:
    """The ``manifest.json`` content for ``run_dir`` (see ``docs/provenance.md``)."""
    run_dir = _validate_record(run_dir, record)
    outputs = [_file_entry(run_dir, rel) for rel in _run_files(run_dir)]
    results = next((o for o in outputs if o["path"] == RESULTS_NAME), None)
    project_dir = Path(record.project_dir)
    return {
        "schema": MANIFEST_SCHEMA,
        "run_id": record.run_id,
        "started": record.started,
        "ended": record.ended,
        "command": list(record.argv),
        "renderer": record.renderer,
        "compared_to": None if record.compared_to is None else dict(record.compared_to),
        "tool": {"name": "report-kit", "version": _version_or_none("report-kit"), **_tool_git()},
        "project": {"name": project_dir.name, "git_commit": git_commit(project_dir)},
        "python": _python(),
        "platform": _platform(),
        "software": software_versions(),
        "design": {"path": SPEC_NAME, "sha256": record.spec_sha256},
        "id_column": record.id_column,
        "seeds": dict(record.seeds),
        "inputs": [f.to_dict() for f in record.inputs],
        "results": None if results is None else {"path": RESULTS_NAME, "sha256": results["sha256"]},
        "outputs": outputs,
    }


def _version_or_none(name: str) -> str | None:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return None


def write_manifest(run_dir: Path | str, record: RunRecord) -> Path:
    """Write ``manifest.json`` into ``run_dir`` and return its path.

    Hashes every file in ``run_dir`` (recursively) except ``manifest.json``
    and ``ro-crate-metadata.json``; call it when every other file is in place.
    """
    manifest = build_manifest(run_dir, record)
    path = Path(run_dir) / MANIFEST_NAME
    write_json(path, manifest)
    if manifest["results"] is None:
        log.warning("run folder %s has no %s; manifest records none", run_dir, RESULTS_NAME)
    return path


# ---------------------------------------------------------------------- RO-Crate

RO_CRATE_CONTEXT = "https://w3id.org/ro/crate/1.1/context"
RO_CRATE_SPEC = "https://w3id.org/ro/crate/1.1"
_TOOL_ID = "#report-kit"


def _media_type(rel: str) -> str:
    return MEDIA_TYPES.get(PurePosixPath(rel).suffix.lower(), "application/octet-stream")


def _crate_id(rel: str) -> str:
    return quote(rel, safe="/")


def _file_entity(run_dir: Path, rel: str, description: str | None) -> dict:
    entity = {
        "@id": _crate_id(rel), "@type": "File", "name": rel,
        "encodingFormat": _media_type(rel),
        "contentSize": str((run_dir / rel).stat().st_size),
        "sha256": sha256_file(run_dir / rel),
    }
    if description:
        entity["description"] = description
    return entity


def _input_entities(run_dir: Path, record: RunRecord) -> tuple[list[dict], list[str]]:
    """Input copies in ``inputs/`` as File entities; absent copies as contextual CreativeWorks."""
    wanted = [(SPEC_NAME, record.spec_sha256, "the design spec (pre-analysis plan)")]
    wanted += [(f.path, f.sha256, f"input table ({f.rows} rows)") for f in record.inputs]
    entities, ids = [], []
    for rel, sha, what in wanted:
        copy = f"{INPUTS_DIR}/{rel}"
        if (run_dir / copy).is_file():
            entity = _file_entity(run_dir, copy, f"Copy of the project's {rel}: {what}.")
        else:
            entity = {"@id": f"#input/{_crate_id(rel)}", "@type": "CreativeWork", "name": rel,
                      "description": f"Project file {rel} ({what}); no copy in this run folder.",
                      "sha256": sha}
        entities.append(entity)
        ids.append(entity["@id"])
    return entities, ids


def _software_entities() -> tuple[dict, list[dict]]:
    versions = software_versions()
    deps = []
    for name, version in versions.items():
        if name == "report-kit" or version is None:
            continue
        deps.append({"@id": f"#software/{name}", "@type": "SoftwareApplication",
                     "name": "Python" if name == "python" else name, "version": version})
    tool = {"@id": _TOOL_ID, "@type": "SoftwareApplication", "name": "report-kit",
            "description": "Analysis of randomized experiments from a project folder to an audited report.",
            "softwareRequirements": [{"@id": d["@id"]} for d in deps]}
    if versions.get("report-kit"):
        tool["version"] = versions["report-kit"]
    return tool, deps


def build_ro_crate(run_dir: Path | str, record: RunRecord) -> dict:
    """The ``ro-crate-metadata.json`` content for ``run_dir`` (RO-Crate 1.1)."""
    run_dir = _validate_record(run_dir, record)
    input_entities, input_ids = _input_entities(run_dir, record)
    copies = {e["@id"] for e in input_entities if e["@type"] == "File"}
    descriptions = {MANIFEST_NAME: "Provenance manifest: hashes, versions, seeds, times, command.",
                    RESULTS_NAME: "Every number of the report, machine-readable."}
    files = list(_run_files(run_dir))
    if (run_dir / MANIFEST_NAME).is_file():
        files = sorted(files + [MANIFEST_NAME])
    outputs = [_file_entity(run_dir, rel, descriptions.get(rel))
               for rel in files if _crate_id(rel) not in copies]
    tool, deps = _software_entities()
    action_id = f"#run/{_crate_id(record.run_id)}"
    data_ids = sorted(copies | {e["@id"] for e in outputs})
    root = {
        "@id": "./", "@type": "Dataset",
        "name": f"report-kit run {record.run_id} of project {Path(record.project_dir).name}",
        "description": ("One analysis run: copies of the inputs under inputs/, results.json, "
                        "the report, tables, figures, executed notebooks and the manifest."),
        "identifier": record.run_id,
        "datePublished": record.ended,
        "hasPart": [{"@id": i} for i in data_ids],
        "mentions": [{"@id": action_id}],
    }
    action = {
        "@id": action_id, "@type": "CreateAction",
        "name": f"report-kit run {record.run_id}",
        "startTime": record.started, "endTime": record.ended,
        "instrument": {"@id": _TOOL_ID},
        "object": [{"@id": i} for i in input_ids],
        "result": [{"@id": e["@id"]} for e in outputs],
        "actionStatus": {"@id": "http://schema.org/CompletedActionStatus"},
    }
    if record.argv:
        action["description"] = "Command line: " + " ".join(record.argv)
    descriptor = {"@id": RO_CRATE_NAME, "@type": "CreativeWork",
                  "conformsTo": {"@id": RO_CRATE_SPEC}, "about": {"@id": "./"}}
    graph = [descriptor, root, *sorted(input_entities + outputs, key=lambda e: e["@id"]),
             action, tool, *deps]
    return {"@context": RO_CRATE_CONTEXT, "@graph": graph}


def write_ro_crate(run_dir: Path | str, record: RunRecord) -> Path:
    """Write ``ro-crate-metadata.json`` into ``run_dir`` and return its path.

    The run folder is the crate's root Dataset; input copies, outputs and the
    manifest are File entities; report-kit is the SoftwareApplication; the run
    is a CreateAction from the inputs (``object``) to the outputs (``result``).
    Call it after :func:`write_manifest` so the manifest is described too.
    """
    crate = build_ro_crate(run_dir, record)
    path = Path(run_dir) / RO_CRATE_NAME
    write_json(path, crate)
    return path
