"""Load and validate ``design.yaml``, the machine-readable pre-analysis plan.

Owns: parsing (``yaml.safe_load`` only), validation against the JSON Schema in
``report_kit/schema/design.schema.json`` plus the cross-field rules, and the
translation of every problem into one readable line naming the file, the key
path, what was found and what was expected. The result is a frozen
:class:`report_kit.model.Spec`.
"""

from __future__ import annotations

import difflib
import json
from functools import lru_cache
from importlib import resources
from pathlib import Path

import jsonschema
import yaml

from .errors import SpecError
from .model import (
    AnalysisSpec,
    ComplianceSpec,
    DataSpec,
    DesignSpec,
    OutcomeSpec,
    Spec,
)

SPEC_FILENAME = "design.yaml"

_NEEDS_BLOCK = ("blocked", "blocked_cluster", "matched_pairs")
_NEEDS_CLUSTER = ("cluster", "blocked_cluster")


@lru_cache(maxsize=1)
def design_schema() -> dict:
    """Return the JSON Schema (draft 2020-12) of ``design.yaml``."""
    text = resources.files("report_kit").joinpath("schema/design.schema.json").read_text("utf-8")
    return json.loads(text)


def spec_path_of(project: Path) -> Path:
    """Return the spec file of a project folder (or the file itself)."""
    project = Path(project)
    return project if project.is_file() else project / SPEC_FILENAME


def load_spec(project: Path | str) -> Spec:
    """Read and validate the design spec of a project folder.

    Raises
    ------
    SpecError
        With one line per problem: ``<file>: <key path>: <what> ...``.
    """
    path = spec_path_of(Path(project))
    if not path.exists():
        raise SpecError(f"{path}: no design spec found (expected a file named {SPEC_FILENAME})")
    doc = _parse_yaml(path)
    problems = schema_problems(doc) or cross_field_problems(doc)
    if problems:
        lines = "\n".join(f"  {path}: {p}" for p in problems)
        raise SpecError(f"{path}: the design spec is invalid ({len(problems)} problem(s)):\n{lines}")
    return _build_spec(path.resolve(), doc)


def _parse_yaml(path: Path) -> dict:
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise SpecError(f"{path}: cannot read the design spec: {err}") from err
    try:
        doc = yaml.safe_load(text)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f" (line {mark.line + 1}, column {mark.column + 1})" if mark else ""
        problem = getattr(err, "problem", None) or str(err)
        raise SpecError(f"{path}: not valid YAML{where}: {problem}") from err
    if not isinstance(doc, dict):
        raise SpecError(f"{path}: (top level): found {_describe(doc)}; expected a mapping of keys such as 'spec_version', 'title', 'data'")
    return doc


# --------------------------------------------------------------------------- schema errors


def schema_problems(doc: dict) -> list[str]:
    """Return readable messages for every JSON Schema violation, in document order."""
    validator = jsonschema.Draft202012Validator(design_schema())
    errors = sorted(validator.iter_errors(doc), key=lambda e: (_key_path(e.absolute_path), e.validator))
    messages: list[str] = []
    for err in errors:
        for message in _translate(err):
            if message not in messages:
                messages.append(message)
    return messages


def _key_path(parts) -> str:
    text = ""
    for part in parts:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text or "(top level)"


def _describe(value) -> str:
    if value is None:
        return "nothing (null)"
    kind = {bool: "true/false", int: "a whole number", float: "a number", str: "text",
            list: "a list", dict: "a mapping"}.get(type(value), type(value).__name__)
    shown = repr(value) if not isinstance(value, (list, dict)) else kind
    return shown if shown == kind else f"{shown} ({kind})"


_TYPE_WORDS = {"string": "text", "number": "a number", "integer": "a whole number",
               "boolean": "true or false", "array": "a list", "object": "a mapping"}


def _translate(err: jsonschema.ValidationError) -> list[str]:
    where = _key_path(err.absolute_path)
    kind, value, inst = err.validator, err.validator_value, err.instance
    if kind == "additionalProperties":
        allowed = sorted(err.schema.get("properties", {}))
        return [_unknown_key(where, key, allowed) for key in sorted(inst) if key not in allowed]
    if kind == "required":
        missing = [k for k in value if k not in inst]
        return [f"{_join(where, k)}: missing required key '{k}'" for k in missing]
    if kind == "enum":
        options = ", ".join(repr(v) for v in value)
        hint = _suggest(str(inst), [str(v) for v in value])
        return [f"{where}: found {_describe(inst)}; expected one of {options}{hint}"]
    if kind == "const":
        return [f"{where}: found {_describe(inst)}; expected {value!r}"]
    if kind == "type":
        return [f"{where}: found {_describe(inst)}; expected {_TYPE_WORDS.get(value, value)}"]
    if kind in ("minLength", "minItems"):
        return [f"{where}: found an empty value; expected at least {value} {'character' if kind == 'minLength' else 'item'}(s)"]
    if kind == "maxItems":
        return [f"{where}: found {len(inst)} items; expected at most {value}"]
    bounds = {"minimum": ">=", "maximum": "<=", "exclusiveMinimum": ">", "exclusiveMaximum": "<"}
    if kind in bounds:
        return [f"{where}: found {_describe(inst)}; expected a value {bounds[kind]} {value}"]
    return [f"{where}: {err.message}"]


def _join(where: str, key: str) -> str:
    return key if where == "(top level)" else f"{where}.{key}"


def _suggest(word: str, options: list[str]) -> str:
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" — did you mean '{close[0]}'?" if close else ""


def _unknown_key(where: str, key, allowed: list[str]) -> str:
    hint = _suggest(str(key), allowed)
    if not hint:
        hint = f" — valid keys here: {', '.join(allowed)}"
    return f"{where}: unknown key '{key}'{hint}"


# --------------------------------------------------------------------------- cross-field rules


def cross_field_problems(doc: dict) -> list[str]:
    """Rules JSON Schema cannot say neatly: which design keys each mechanism needs."""
    design = doc["design"]
    mech = design["mechanism"]
    problems = []
    if mech in _NEEDS_BLOCK and "block" not in design:
        what = "the pair id column" if mech == "matched_pairs" else "the block column"
        problems.append(f"design.block: missing; mechanism '{mech}' needs {what}")
    if mech in _NEEDS_CLUSTER and "cluster" not in design:
        problems.append(f"design.cluster: missing; mechanism '{mech}' needs the cluster column")
    if "block" in design and mech not in _NEEDS_BLOCK:
        problems.append(f"design.block: given, but mechanism '{mech}' has no blocks; "
                        f"use one of {', '.join(_NEEDS_BLOCK)} or remove the key")
    if "cluster" in design and mech not in _NEEDS_CLUSTER:
        problems.append(f"design.cluster: given, but mechanism '{mech}' has no clusters; "
                        f"use one of {', '.join(_NEEDS_CLUSTER)} or remove the key")
    seen: dict[str, int] = {}
    for i, outcome in enumerate(doc["outcomes"]):
        col = outcome["column"]
        if col in seen:
            problems.append(f"outcomes[{i}].column: '{col}' is already outcomes[{seen[col]}]; each outcome once")
        seen.setdefault(col, i)
        rng = outcome.get("range")
        if rng is not None and not rng[0] < rng[1]:
            problems.append(f"outcomes[{i}].range: found {rng}; expected [min, max] with min < max")
    return problems


# --------------------------------------------------------------------------- building the Spec


def _build_spec(path: Path, doc: dict) -> Spec:
    data, design, analysis = doc["data"], doc["design"], doc.get("analysis", {})
    outcomes = tuple(
        OutcomeSpec(
            column=o["column"], label=o.get("label", o["column"]),
            family=o.get("family", "primary"), alternative=o.get("alternative", "two-sided"),
            statistic=o.get("statistic", "mean_difference"),
            range=tuple(float(v) for v in o["range"]) if "range" in o else None,
        )
        for o in doc["outcomes"]
    )
    defaults = AnalysisSpec()
    return Spec(
        path=path,
        spec_version=doc["spec_version"],
        title=doc["title"],
        summary=doc.get("summary", ""),
        data=DataSpec(units=data["units"], id=data["id"], merge=tuple(data.get("merge", ()))),
        design=DesignSpec(
            mechanism=design["mechanism"], treatment=design["treatment"],
            block=design.get("block"), cluster=design.get("cluster"),
            probability=design.get("probability"), seed=design.get("seed"),
        ),
        analysis=AnalysisSpec(
            alpha=float(analysis.get("alpha", defaults.alpha)),
            covariates=tuple(analysis.get("covariates", ())),
            adjust=bool(analysis.get("adjust", defaults.adjust)),
            randomizations=int(analysis.get("randomizations", defaults.randomizations)),
            max_exact=int(analysis.get("max_exact", defaults.max_exact)),
            seed=int(analysis.get("seed", defaults.seed)),
            multiplicity=analysis.get("multiplicity", defaults.multiplicity),
        ),
        outcomes=outcomes,
        compliance=ComplianceSpec(received=doc["compliance"]["received"]) if "compliance" in doc else None,
        subgroups=tuple(doc.get("subgroups", ())),
        raw=doc,
    )
