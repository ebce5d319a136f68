"""Builds small broken projects from compact declarations (for the bad-input catalogue).

A :class:`Case` starts from one valid, invented project (eight reading corners
in eight schools; complete randomization) and changes it: keys of the spec
(``spec``: dotted key -> value, ``DROP`` to remove), the whole spec text
(``spec_text``), the units table text (``units``), or any other file
(``files``: path -> bytes or text; ``None`` makes a folder). ``prepare`` can
do the rest (symlinks, zips). The case names the command, the exit code it
must give and words its message must hold.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import yaml

DROP = object()

BASE_SPEC = {
    "spec_version": 1,
    "title": "Invented study: reading corners in eight schools",
    "data": {"units": "data/units.csv", "id": "school"},
    "design": {"mechanism": "complete", "treatment": "corner"},
    "analysis": {"covariates": ["books_before"], "randomizations": 200},
    "outcomes": [{"column": "minutes", "label": "Reading minutes", "range": [0, 600]}],
}

BASE_UNITS = """school,corner,books_before,minutes,district
S1,1,12,210,north
S2,0,15,180,north
S3,1,9,240,north
S4,0,11,150,north
S5,1,14,260,south
S6,0,10,170,south
S7,1,13,230,south
S8,0,12,160,south
"""


@dataclass(frozen=True, kw_only=True)
class Case:
    """One broken (or awkward but valid) input and what the tool must say about it."""

    name: str
    code: int
    words: tuple[str, ...]
    spec: dict = field(default_factory=dict)
    spec_text: str | bytes | None = None
    units: str | bytes | None = None
    files: dict = field(default_factory=dict)
    command: tuple[str, ...] = ("check", "{project}")
    prepare: Callable[[Path], None] | None = None

    def build(self, root: Path) -> Path:
        """Write the project under ``root``; return the project folder."""
        project = root / "project"
        (project / "data").mkdir(parents=True)
        text = self.spec_text if self.spec_text is not None else yaml.safe_dump(self.spec_doc(), sort_keys=False)
        _write(project / "design.yaml", text)
        _write(project / "data" / "units.csv", self.units if self.units is not None else BASE_UNITS)
        for rel, content in self.files.items():
            _write(project / rel, content)
        if self.prepare is not None:
            self.prepare(project)
        return project

    def spec_doc(self) -> dict:
        doc = copy.deepcopy(BASE_SPEC)
        for dotted, value in self.spec.items():
            *parents, last = dotted.split(".")
            node = doc
            for key in parents:
                node = node.setdefault(key, {})
            if value is DROP:
                node.pop(last, None)
            else:
                node[last] = value
        return doc

    def argv(self, project: Path) -> list[str]:
        return [part.format(project=project) for part in self.command]


def _write(path: Path, content) -> None:
    if content is None:
        path.mkdir(parents=True, exist_ok=True)
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8")


def units_with(*replacements: tuple[str, str]) -> str:
    """The base units table with line fragments replaced (each must occur)."""
    text = BASE_UNITS
    for old, new in replacements:
        assert old in text, old
        text = text.replace(old, new, 1)
    return text
