"""Load and validate ``design.yaml``, the machine-readable pre-analysis plan.

Owns: parsing (``yaml.safe_load`` only), validation against the JSON Schema in
``report_kit/inputs/schema/design.schema.json`` plus the cross-field rules, and the
translation of every problem into one readable line naming the file, the key
path, what was found and what was expected. The result is a frozen
:class:`report_kit.inputs.model.Spec`.
"""

from __future__ import annotations

import datetime
import difflib
import json
import math
import posixpath
from functools import lru_cache
from importlib import resources
from pathlib import Path

import jsonschema
import yaml

from report_kit.errors import SpecError
from report_kit.inputs.arms import arm_spec_problems, arm_text
from report_kit.inputs.model import (
    DEFAULT_ARM_LABELS,
    AnalysisSpec,
    ComplianceSpec,
    DataSpec,
    DesignSpec,
    EnrolmentSpec,
    OutcomeSpec,
    RerandomizationSpec,
    RegistrationSpec,
    Spec,
)

SPEC_FILENAME = "design.yaml"

#: Largest design spec read, in bytes (a real plan is a few kilobytes).
MAX_SPEC_BYTES = 1 << 20
#: Deepest nesting of mappings and lists (a real plan nests four levels).
MAX_SPEC_DEPTH = 32
#: Most values (mappings, lists and scalars) the spec may hold once YAML aliases are expanded.
MAX_SPEC_NODES = 100_000

_NEEDS_BLOCK = ("blocked", "blocked_cluster", "matched_pairs")
_NEEDS_CLUSTER = ("cluster", "blocked_cluster")


@lru_cache(maxsize=1)
def design_schema() -> dict:
    """Return the JSON Schema (draft 2020-12) of ``design.yaml``."""
    text = resources.files("report_kit.inputs").joinpath("schema/design.schema.json").read_text("utf-8")
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
    problems = (non_finite_problems(doc) + schema_problems(doc)) or cross_field_problems(doc)
    if problems:
        lines = "\n".join(f"  {path}: {p}" for p in problems)
        raise SpecError(f"{path}: the design spec is invalid ({len(problems)} problem(s)):\n{lines}")
    return _build_spec(path.resolve(), doc)


class _StrictLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that refuses a key given twice in one mapping.

    Plain YAML loaders keep the last value silently, so a plan with two
    ``alpha:`` lines would quietly use the second one.
    """

    def construct_mapping(self, node, deep=False):
        if isinstance(node, yaml.MappingNode):
            seen: dict = {}
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                key = self.construct_object(key_node, deep=True)
                try:
                    first = seen.get(key)
                except TypeError:  # an unhashable key; the base class reports it
                    continue
                if first is not None:
                    raise yaml.constructor.ConstructorError(
                        None, None, f"the key {key!r} appears twice in one mapping (first on line {first}); "
                        "give each key once", key_node.start_mark)
                seen[key] = key_node.start_mark.line + 1
        return super().construct_mapping(node, deep=deep)


def _parse_yaml(path: Path) -> dict:
    try:
        raw = path.read_bytes()
    except IsADirectoryError as err:
        raise SpecError(f"{path}: is a folder, not a file; the design spec must be a YAML file") from err
    except OSError as err:
        reason = "permission denied" if isinstance(err, PermissionError) else (err.strerror or str(err))
        raise SpecError(f"{path}: cannot read the design spec ({reason})") from err
    if len(raw) > MAX_SPEC_BYTES:
        raise SpecError(f"{path}: the design spec is {len(raw)} bytes; the limit is {MAX_SPEC_BYTES} bytes "
                        "(a plan is a few kilobytes: keep data in data/, not in design.yaml)")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = raw[:err.start].count(b"\n") + 1
        raise SpecError(f"{path}: is not UTF-8 text (byte 0x{raw[err.start]:02x} on line {line} is not valid "
                        "UTF-8); save the design spec with UTF-8 encoding") from err
    try:
        check_yaml_shape(path, text)
        doc = yaml.load(text, Loader=_StrictLoader)  # noqa: S506 - a SafeLoader subclass
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f" (line {mark.line + 1}, column {mark.column + 1})" if mark else ""
        problem = getattr(err, "problem", None) or str(err)
        if "\t" in problem or "'\\t'" in problem:
            problem += " (YAML indents with spaces, not tabs)"
        raise SpecError(f"{path}: not valid YAML{where}: {problem}") from err
    if doc is None:
        raise SpecError(f"{path}: the design spec is empty; expected a mapping of keys such as "
                        "'spec_version', 'title', 'data', 'design', 'outcomes' (`report-kit new` writes a "
                        "commented example)")
    if not isinstance(doc, dict):
        raise SpecError(f"{path}: (top level): found {_describe(doc)}; expected a mapping of keys such as 'spec_version', 'title', 'data'")
    return doc


def check_yaml_shape(path: Path, text: str) -> None:
    """Refuse a YAML text that nests too deeply or whose aliases expand too far, before building it.

    Walks the event stream once (no recursion, no objects built), keeping for
    every anchor the number of values its expansion holds, so a one-kilobyte
    "billion laughs" document is refused in microseconds instead of expanding.
    Syntax errors are left to the loader, which reports them with a line number.
    """
    sizes: dict[str, int] = {}
    stack: list[list] = [[0, None]]  # [values so far, anchor] of each open mapping or list
    for event in yaml.parse(text, Loader=yaml.SafeLoader):
        if isinstance(event, yaml.CollectionStartEvent):
            stack.append([1, event.anchor])
            if len(stack) - 1 > MAX_SPEC_DEPTH:
                raise SpecError(f"{path}: the design spec nests deeper than {MAX_SPEC_DEPTH} levels (line "
                                f"{event.start_mark.line + 1}); a plan needs only a few levels")
            continue
        if isinstance(event, yaml.CollectionEndEvent):
            size, anchor = stack.pop()
        elif isinstance(event, yaml.AliasEvent):
            size, anchor = sizes.get(event.anchor, 1), None
        elif isinstance(event, yaml.ScalarEvent):
            size, anchor = 1, event.anchor
        else:
            continue
        if anchor is not None:
            sizes[anchor] = size
        stack[-1][0] += size
        if stack[-1][0] > MAX_SPEC_NODES:
            line = event.start_mark.line + 1
            raise SpecError(f"{path}: the design spec expands to more than {MAX_SPEC_NODES} values (YAML "
                            f"aliases, near line {line}); write the values out or use fewer aliases")


# --------------------------------------------------------------------------- schema errors


def non_finite_problems(doc, where: str = "(top level)") -> list[str]:
    """Numbers that are not finite (``.nan``, ``.inf``): JSON Schema bounds cannot catch them."""
    if isinstance(doc, float) and not math.isfinite(doc):
        return [f"{where}: found {_describe(doc)}; expected a finite number"]
    problems: list[str] = []
    if isinstance(doc, dict):
        for key, value in doc.items():
            problems += non_finite_problems(value, _join(where, str(key)))
    elif isinstance(doc, list):
        for i, value in enumerate(doc):
            problems += non_finite_problems(value, f"{'' if where == '(top level)' else where}[{i}]")
    return problems


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
    if isinstance(value, (datetime.date, datetime.datetime)):
        return f"{value.isoformat()} (a date; put it in quotes to use it as text)"
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
        return [_unknown_key(where, key, allowed) for key in sorted(inst, key=str) if key not in allowed]
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
    if kind == "minProperties":
        return [f"{where}: found {len(inst)} key(s); expected at least {value}"]
    if kind == "maxProperties":
        return [f"{where}: found {len(inst)} key(s); expected at most {value}"]
    if kind == "maxItems":
        return [f"{where}: found {len(inst)} items; expected at most {value}"]
    if kind == "maxLength":
        return [f"{where}: found text of {len(inst)} characters; expected at most {value}"]
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
    if design.get("single_arm_blocks", "error") != "error" and mech not in ("blocked", "blocked_cluster"):
        problems.append(f"design.single_arm_blocks: given, but mechanism '{mech}' has no blocks to drop or "
                        "pool; it applies to blocked and blocked_cluster designs")
    if "cluster" in design and mech not in _NEEDS_CLUSTER:
        problems.append(f"design.cluster: given, but mechanism '{mech}' has no clusters; "
                        f"use one of {', '.join(_NEEDS_CLUSTER)} or remove the key")
    problems += arm_spec_problems(design)
    if "rerandomization" in design and mech == "bernoulli":
        problems.append("design.rerandomization: a bernoulli design treats a random number of units; "
                        "rerandomization needs complete, blocked, cluster or matched_pairs")
    problems += _role_problems(doc)
    problems += _enrolment_problems(doc.get("enrolment"))
    labels = design.get("arm_labels")
    if labels and "arms" not in design:
        if set(labels) != {"control", "treated"}:
            problems.append("design.arm_labels: for a 0/1 treatment column give exactly the keys `control` and "
                            f"`treated`; found {', '.join(sorted(map(str, labels)))} (with design.arms, key the "
                            "labels by arm)")
        elif labels["control"] == labels["treated"]:
            problems.append(f"design.arm_labels: both arms are called {labels['control']!r}; "
                            "give each arm its own label")
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


def _enrolment_problems(enrolment: dict | None) -> list[str]:
    """Assessed = excluded + randomized when all three are declared (CONSORT-style arithmetic)."""
    if not enrolment or "assessed" not in enrolment or "randomized" not in enrolment:
        return []
    excluded = sum(int(e["n"]) for e in enrolment.get("excluded", ()))
    if enrolment["assessed"] != excluded + enrolment["randomized"]:
        return [f"enrolment.assessed: found {enrolment['assessed']}; expected excluded + randomized = "
                f"{excluded} + {enrolment['randomized']} = {excluded + enrolment['randomized']}"]
    return []


def _repeats(where: str, items: list) -> list[str]:
    first: dict = {}
    problems = []
    for i, item in enumerate(items):
        if item in first:
            problems.append(f"{where}[{i}]: '{item}' is already {where}[{first[item]}]; list each once")
        first.setdefault(item, i)
    return problems


def _role_problems(doc: dict) -> list[str]:
    """A column plays one role: the id, the treatment, an outcome and a covariate are different columns."""
    data, design, analysis = doc["data"], doc["design"], doc.get("analysis", {})
    roles = {data["id"]: "data.id", design["treatment"]: "design.treatment"}
    problems = []
    if design["treatment"] == data["id"]:
        problems.append(f"design.treatment: '{design['treatment']}' is also data.id; the treatment needs its "
                        "own 0/1 column")
    for key in ("block", "cluster"):
        col = design.get(key)
        if col is not None and col in roles:
            problems.append(f"design.{key}: '{col}' is also {roles[col]}; expected a column of {key} labels")
    if design.get("block") is not None and design.get("block") == design.get("cluster"):
        problems.append(f"design.cluster: '{design['cluster']}' is also design.block; clusters sit inside "
                        "blocks, so they need their own column")
    for key in ("block", "cluster"):
        if design.get(key) is not None:
            roles.setdefault(design[key], f"design.{key}")
    outcome_of = {}
    for i, outcome in enumerate(doc["outcomes"]):
        col = outcome["column"]
        if col in roles:
            problems.append(f"outcomes[{i}].column: '{col}' is also {roles[col]}; an outcome is a result "
                            "measured after assignment")
        outcome_of.setdefault(col, f"outcomes[{i}].column")
    covariates = analysis.get("covariates", [])
    for i, col in enumerate(covariates):
        other = roles.get(col) or outcome_of.get(col)
        if other:
            problems.append(f"analysis.covariates[{i}]: '{col}' is also {other}; covariates are baseline "
                            "measurements taken before assignment")
    problems += _repeats("analysis.covariates", covariates)
    received = doc.get("compliance", {}).get("received")
    if received is not None and (received == data["id"] or received in outcome_of):
        problems.append(f"compliance.received: '{received}' is also "
                        f"{'data.id' if received == data['id'] else outcome_of[received]}; expected the 0/1 "
                        "column of treatment actually received")
    for i, col in enumerate(doc.get("subgroups", [])):
        if col in (data["id"], design["treatment"]) or col in outcome_of:
            other = roles.get(col) or outcome_of.get(col)
            problems.append(f"subgroups[{i}]: '{col}' is also {other}; subgroups are baseline "
                            "characteristics")
    problems += _repeats("subgroups", doc.get("subgroups", []))
    units = posixpath.normpath(data["units"])
    merge = data.get("merge", [])
    for i, rel in enumerate(merge):
        if posixpath.normpath(rel) == units:
            problems.append(f"data.merge[{i}]: '{rel}' is data.units; list only further tables to join")
    problems += _repeats("data.merge", [posixpath.normpath(r) for r in merge])
    return problems


# --------------------------------------------------------------------------- building the Spec


def _arm_keys(design: dict) -> dict:
    if "arms" not in design:
        return {}
    factors = design.get("factors")
    return {
        "arms": tuple(arm_text(a) for a in design["arms"]),
        "contrasts": design.get("contrasts", "reference"),
        "factors": None if factors is None else tuple(
            (str(name), tuple(arm_text(a) for a in on)) for name, on in factors.items()),
        "arm_display": tuple((arm_text(k), v) for k, v in design.get("arm_labels", {}).items()),
        **({"arm_probabilities": _arm_probabilities(design)} if isinstance(design.get("probability"), dict)
           else {}),
    }


def _arm_probabilities(design: dict) -> tuple[float, ...]:
    """``design.probability`` as a mapping: each arm's probability in ``design.arms`` order."""
    given = {arm_text(k): float(v) for k, v in design["probability"].items()}
    return tuple(given[arm_text(a)] for a in design["arms"])


def _two_arm_labels(design: dict) -> tuple[str, str]:
    """Words for the control and treated arm: ``design.arm_labels`` of 0/1 data, or the two ``design.arms``."""
    labels = design.get("arm_labels") or {}
    if "arms" in design and len(design["arms"]) == 2:
        control, treated = (arm_text(a) for a in design["arms"])
        shown = {arm_text(k): v for k, v in labels.items()}
        return shown.get(control, control), shown.get(treated, treated)
    if "arms" not in design and labels:
        return labels["control"], labels["treated"]
    return DEFAULT_ARM_LABELS


def _build_spec(path: Path, doc: dict) -> Spec:
    data, design, analysis = doc["data"], doc["design"], doc.get("analysis", {})
    outcomes = tuple(
        OutcomeSpec(
            column=o["column"], label=o.get("label", o["column"]),
            family=o.get("family", "primary"), alternative=o.get("alternative", "two-sided"),
            statistic=o.get("statistic", "mean_difference"),
            range=tuple(float(v) for v in o["range"]) if "range" in o else None,
            resolution=float(o["resolution"]) if "resolution" in o else None,
            unit=o.get("unit", ""),
        )
        for o in doc["outcomes"]
    )
    defaults = AnalysisSpec()
    return Spec(
        path=path,
        spec_version=doc["spec_version"],
        title=doc["title"],
        summary=doc.get("summary", ""),
        data=DataSpec(units=data["units"], id=data["id"], merge=tuple(data.get("merge", ())),
                      missing_values=tuple(data.get("missing_values", ()))),
        design=DesignSpec(
            mechanism=design["mechanism"], treatment=design["treatment"],
            block=design.get("block"), cluster=design.get("cluster"),
            probability=None if isinstance(design.get("probability"), dict) else design.get("probability"),
            seed=None if design.get("seed") is None else int(design["seed"]),
            **_arm_keys(design),
            single_arm_blocks=design.get("single_arm_blocks", "error"),
            rerandomization=None if "rerandomization" not in design else RerandomizationSpec(
                covariates=tuple(design["rerandomization"]["covariates"]),
                max_distance=float(design["rerandomization"]["max_distance"])),
            arm_labels=_two_arm_labels(design),
        ),
        analysis=AnalysisSpec(
            alpha=float(analysis.get("alpha", defaults.alpha)),
            covariates=tuple(analysis.get("covariates", ())),
            adjust=bool(analysis.get("adjust", defaults.adjust)),
            randomizations=int(analysis.get("randomizations", defaults.randomizations)),
            max_exact=int(analysis.get("max_exact", defaults.max_exact)),
            seed=int(analysis.get("seed", defaults.seed)),
            multiplicity=analysis.get("multiplicity", defaults.multiplicity),
            missing_covariates=analysis.get("missing_covariates", defaults.missing_covariates),
            subgroup_missing=analysis.get("subgroup_missing", defaults.subgroup_missing),
            std_effect=analysis.get("std_effect", defaults.std_effect),
        ),
        outcomes=outcomes,
        compliance=ComplianceSpec(received=doc["compliance"]["received"]) if "compliance" in doc else None,
        subgroups=tuple(doc.get("subgroups", ())),
        registration=_registration(doc.get("registration")),
        enrolment=_enrolment(doc.get("enrolment")),
        raw=doc,
    )


def _registration(doc: dict | None) -> RegistrationSpec | None:
    return None if doc is None else RegistrationSpec(id=doc["id"], address=doc.get("address", ""))


def _enrolment(doc: dict | None) -> EnrolmentSpec | None:
    if doc is None:
        return None
    return EnrolmentSpec(assessed=doc.get("assessed"), randomized=doc.get("randomized"),
                         excluded=tuple((e["reason"], int(e["n"])) for e in doc.get("excluded", ())))
