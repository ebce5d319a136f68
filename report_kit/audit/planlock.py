"""Plan lock: freeze ``design.yaml`` before outcomes are analysed; list deviations later.

Owns ``design.lock`` (JSON, in the project folder): the SHA-256 and the exact
text of ``design.yaml`` at the time of locking. :func:`plan_deviations` then
compares the current ``design.yaml`` with the locked one key by key, for the
report's "Deviations from the plan" section. :func:`diff_specs` is the
key-path diff, also used by :mod:`report_kit.audit.compare` between two runs.
"""

from __future__ import annotations

from datetime import date, datetime
from pathlib import Path

import yaml

from report_kit.errors import SpecError, UsageError
from report_kit.audit.provenance import load_json_file, sha256_bytes, sha256_file, utc_now, write_json
from report_kit.inputs.spec import SPEC_FILENAME

__all__ = ["LOCK_NAME", "lock_plan", "plan_deviations", "diff_specs", "format_deviations_text"]

LOCK_NAME = "design.lock"
SPEC_NAME = SPEC_FILENAME
LOCK_SCHEMA = "report-kit/plan-lock/1"
#: Fields that identify an item in a list of mappings (e.g. ``outcomes``), in order of preference.
ITEM_KEYS = ("column", "name", "id")


def _project_dir(path: Path | str) -> Path:
    path = Path(path)
    if path.is_file() and path.name == SPEC_NAME:
        path = path.parent
    if not path.is_dir():
        raise UsageError(f"{path}: not a project folder")
    if not (path / SPEC_NAME).is_file():
        raise SpecError(f"{path / SPEC_NAME}: no design spec (design.yaml) in the project folder")
    return path


def _decode(data: bytes, where: Path) -> str:
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as err:
        raise SpecError(f"{where}: not UTF-8 text ({err.reason} at byte {err.start})") from err


def _plain(obj):
    """YAML values as JSON-like values (dates become ISO strings)."""
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_plain(v) for v in obj]
    if isinstance(obj, (datetime, date)):
        return obj.isoformat()
    if isinstance(obj, bytes):
        return obj.hex()
    return obj


def _parse(text: str, where: Path | str):
    try:
        value = yaml.safe_load(text)
    except yaml.YAMLError as err:
        raise SpecError(f"{where}: not valid YAML ({err})") from err
    if not isinstance(value, dict):
        raise SpecError(f"{where}: the design spec must be a mapping of keys; got {type(value).__name__}")
    return _plain(value)


def _runs_so_far(project_dir: Path) -> list[str]:
    runs = project_dir / "runs"
    if not runs.is_dir():
        return []
    return sorted(p.name for p in runs.iterdir()
                  if p.is_dir() and not p.name.startswith(".") and (p / "results.json").is_file())


def lock_plan(project_dir: Path | str, *, force: bool = False) -> Path:
    """Record the SHA-256 and the content of ``design.yaml`` in ``design.lock``.

    Lock before outcome data are analysed. An existing lock is never replaced
    unless ``force=True``. Runs that already exist are listed in the lock
    (``runs_before_lock``) so a late lock is visible as such.

    Returns the path of ``design.lock``.
    """
    project = _project_dir(project_dir)
    if not isinstance(force, bool):
        raise TypeError(f"`force` must be True or False; got {force!r}")
    lock = project / LOCK_NAME
    if lock.exists() and not force:
        raise UsageError(f"{lock} already exists; the plan is locked "
                         "(pass --force to lock again; the report will then compare with the new lock)")
    spec_path = project / SPEC_NAME
    data = spec_path.read_bytes()
    text = _decode(data, spec_path)
    content = _parse(text, spec_path)
    write_json(lock, {
        "schema": LOCK_SCHEMA,
        "locked_at": utc_now(),
        "design_sha256": sha256_bytes(data),
        "runs_before_lock": _runs_so_far(project),
        "design": content,
        "design_text": text,
        "inputs": data_fingerprints(project, content),
    })
    return lock


def data_fingerprints(project: Path, spec: dict) -> dict[str, str]:
    """SHA-256 of each data table the spec names (``data.units``, ``data.merge``) that exists now."""
    data = spec.get("data") if isinstance(spec.get("data"), dict) else {}
    paths = [data.get("units")] + list(data.get("merge") or [])
    return {rel: sha256_file(project / rel) for rel in paths
            if isinstance(rel, str) and (project / rel).is_file()}


def _data_changed(project: Path, lock: dict, current: dict) -> list[str] | None:
    """Data tables added, removed or changed since the lock; None for a lock without fingerprints."""
    before = lock.get("inputs")
    if not isinstance(before, dict):
        return None
    now = data_fingerprints(project, current)
    return sorted(rel for rel in set(before) | set(now) if before.get(rel) != now.get(rel))


def _read_lock(lock: Path) -> dict:
    value = load_json_file(lock, what="plan lock", error=SpecError)
    problems = [k for k in ("schema", "design_sha256", "design_text") if not isinstance(value.get(k), str)]
    if problems or value["schema"] != LOCK_SCHEMA:
        raise SpecError(f"{lock}: not a report-kit plan lock (missing or wrong {problems or ['schema']})")
    return value


def plan_deviations(project_dir: Path | str) -> dict:
    """Compare ``design.yaml`` with the locked plan.

    Returns ``{locked, locked_sha256, locked_at, current_sha256, text_changed,
    lock_intact, runs_before_lock, changes}`` where ``changes`` lists
    ``{key, old, new, kind}`` for each key path that changed (``kind`` is
    ``"changed"``, ``"added"`` or ``"removed"``). Without a lock, ``locked``
    is False and ``changes`` is empty. ``text_changed`` without ``changes``
    means only comments or layout changed. ``lock_intact`` is False when the
    lock's text no longer matches its own recorded SHA-256.
    """
    project = _project_dir(project_dir)
    spec_path = project / SPEC_NAME
    data = spec_path.read_bytes()
    current = _parse(_decode(data, spec_path), spec_path)
    lock_path = project / LOCK_NAME
    if not lock_path.is_file():
        return {"locked": False, "locked_sha256": None, "locked_at": None,
                "current_sha256": sha256_bytes(data), "text_changed": None, "lock_intact": None,
                "runs_before_lock": [], "changes": [], "data_changed": None}
    lock = _read_lock(lock_path)
    locked_text = lock["design_text"]
    locked = _parse(locked_text, f"{lock_path} (locked design.yaml)")
    return {
        "locked": True,
        "locked_sha256": lock["design_sha256"],
        "locked_at": lock.get("locked_at"),
        "current_sha256": sha256_bytes(data),
        "text_changed": sha256_bytes(data) != lock["design_sha256"],
        "lock_intact": sha256_bytes(locked_text.encode("utf-8")) == lock["design_sha256"],
        "runs_before_lock": list(lock.get("runs_before_lock") or []),
        "changes": diff_specs(locked, current),
        "data_changed": _data_changed(project, lock, current),
    }


# ----------------------------------------------------------------- key-path diff

def _item_key(old: list, new: list) -> str | None:
    """The field that identifies items of two lists of mappings, if any."""
    if not old and not new:
        return None
    items = old + new
    if not all(isinstance(v, dict) for v in items):
        return None
    for key in ITEM_KEYS:
        for side in (old, new):
            values = [v.get(key) for v in side]
            if any(x is None or isinstance(x, (dict, list)) for x in values) or len(set(values)) != len(values):
                break
        else:
            return key
    return None


def _diff(old, new, path: str, out: list[dict]) -> None:
    if isinstance(old, dict) and isinstance(new, dict):
        for key in list(old) + [k for k in new if k not in old]:
            sub = f"{path}.{key}" if path else str(key)
            if key not in new:
                out.append({"key": sub, "old": old[key], "new": None, "kind": "removed"})
            elif key not in old:
                out.append({"key": sub, "old": None, "new": new[key], "kind": "added"})
            else:
                _diff(old[key], new[key], sub, out)
        return
    if isinstance(old, list) and isinstance(new, list) and (field := _item_key(old, new)):
        by_old = {v[field]: v for v in old}
        by_new = {v[field]: v for v in new}
        for ident in list(by_old) + [k for k in by_new if k not in by_old]:
            sub = f"{path}[{field}={ident}]"
            if ident not in by_new:
                out.append({"key": sub, "old": by_old[ident], "new": None, "kind": "removed"})
            elif ident not in by_old:
                out.append({"key": sub, "old": None, "new": by_new[ident], "kind": "added"})
            else:
                _diff(by_old[ident], by_new[ident], sub, out)
        if [v[field] for v in old if v[field] in by_new] != [v[field] for v in new if v[field] in by_old]:
            out.append({"key": f"{path} (order)", "old": [v[field] for v in old],
                        "new": [v[field] for v in new], "kind": "changed"})
        return
    if type(old) is not type(new) or old != new:
        out.append({"key": path or "(whole spec)", "old": old, "new": new, "kind": "changed"})


def diff_specs(old: dict, new: dict) -> list[dict]:
    """Key paths that differ between two parsed design specs.

    Mappings are compared key by key (``analysis.alpha``); lists of mappings
    are matched by an identifying field (``outcomes[column=score]``) when every
    item has a distinct one, else compared whole, as are lists of plain values
    (``analysis.covariates``). ``1`` and ``1.0`` or ``true`` and ``1`` count as
    changes. Each entry is ``{key, old, new, kind}``.
    """
    if not isinstance(old, dict) or not isinstance(new, dict):
        raise TypeError("`old` and `new` must both be mappings (parsed design specs)")
    out: list[dict] = []
    _diff(old, new, "", out)
    return out


def _show(value) -> str:
    if value is None:
        return "(absent)"
    return yaml.safe_dump(value, default_flow_style=True, width=10**6, sort_keys=False).strip().removesuffix("\n...")


def format_deviations_text(deviations: dict) -> str:
    """The "Deviations from the plan" paragraph as plain text lines."""
    if not deviations.get("locked"):
        return "No plan lock exists for this project (run `report-kit lock` before analysing outcomes)."
    head = f"Plan locked at {deviations.get('locked_at')} (design.yaml SHA-256 {deviations['locked_sha256'][:12]}...)."
    lines = [head]
    if deviations.get("lock_intact") is False:
        lines.append("WARNING: design.lock does not match its own recorded SHA-256; it was edited after locking.")
    if deviations.get("runs_before_lock"):
        lines.append(f"Note: the lock was made after {len(deviations['runs_before_lock'])} earlier run(s).")
    changes = deviations.get("changes") or []
    if not changes:
        lines.append("No deviations: design.yaml differs from the locked plan only in comments or layout."
                     if deviations.get("text_changed") else "No deviations: design.yaml is unchanged since the lock.")
        return "\n".join(lines)
    lines.append(f"{len(changes)} deviation(s) from the locked plan:")
    for change in changes:
        lines.append(f"  - {change['key']} ({change['kind']}): {_show(change['old'])} -> {_show(change['new'])}")
    return "\n".join(lines)
