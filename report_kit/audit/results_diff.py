"""What changed between two ``results.json``: every number, and the conclusions it moves.

Owns :func:`diff_results` (also used by :mod:`report_kit.audit.verify`), the
record keys that match entries of the two files, and :func:`conclusion_changes`
(significance, sign and interval changes). Part of :mod:`report_kit.audit.compare`.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass, field

from report_kit.validate import Record, open_unit_interval, tolerance
from report_kit.audit.provenance import to_json_value

__all__ = ["RECORD_KEYS", "ResultChange", "ResultRecord", "ResultsDiff", "conclusion_changes", "diff_results"]

#: Results that differ by less than this (relative, or absolute near zero) are not
#: reported as moved: floating-point noise from a different summation order. Same
#: tolerance as `report-kit verify`.
RESULT_RTOL = 1e-9
RESULT_ATOL = 1e-12
DEFAULT_ALPHA = 0.05

#: Fields that identify one entry of a list in results.json, by section.
RECORD_KEYS = {
    "estimates": ("outcome", "estimand", "estimator", "subgroup", "method"),
    "tests": ("outcome", "statistic", "null_effect"),
    "intervals": ("outcome", "method", "level"),
    "multiplicity": ("outcome", "family", "method"),
    "balance.covariates": ("name",),
    "attrition.bounds": ("outcome", "method"),
    "inputs": ("path",),
}

#: Fields that also identify an entry of a multi-arm run, when set (contrast, factorial effect).
ARM_KEYS = ("arm", "reference", "factor")

#: Conclusion rules: p-values compared with alpha, intervals compared with zero, signs.
P_VALUE_FIELDS = {"tests": "p_value", "multiplicity": "p_adjusted",
                  "balance.omnibus": "p_value", "attrition": "p_value"}
INTERVAL_FIELDS = {"estimates": ("ci_low", "ci_high"), "intervals": ("ci_low", "ci_high"),
                   "attrition.bounds": ("lower", "upper")}
SIGN_FIELDS = {"estimates": "estimate", "intervals": "hodges_lehmann"}

Key = tuple  # tuple of (field name, value) pairs


# ------------------------------------------------------------------ result records

def _hashable(value):
    if isinstance(value, list):
        return tuple(_hashable(v) for v in value)
    if isinstance(value, dict):
        return tuple((k, _hashable(v)) for k, v in value.items())
    return value


def _flat_fields(node: dict, prefix: str = "") -> dict:
    out = {}
    for name, value in node.items():
        path = f"{prefix}{name}"
        if isinstance(value, dict):
            out.update(_flat_fields(value, f"{path}."))
        elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            for i, item in enumerate(value):
                out.update(_flat_fields(item, f"{path}[{i}]."))
        else:
            out[path] = value
    return out


def _walk(node: dict, section: str, out: dict) -> None:
    fields, children = {}, []
    for name, value in node.items():
        path = f"{section}.{name}" if section else name
        if isinstance(value, dict):
            children.append((_walk, value, path))
        elif isinstance(value, list) and (path in RECORD_KEYS or (value and all(isinstance(v, dict) for v in value))):
            children.append((_walk_list, value, path))
        else:
            fields[name] = value
    if fields:
        out[(section, ())] = fields
    for func, value, path in children:
        func(value, path, out)


def _walk_list(items: list, section: str, out: dict) -> None:
    key_fields = RECORD_KEYS.get(section)
    seen: Counter = Counter()
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            item = {"value": item}
        key = tuple((k, _hashable(item.get(k))) for k in key_fields) if key_fields else (("#", i),)
        if key_fields:
            key += tuple((k, _hashable(item[k])) for k in ARM_KEYS if item.get(k) is not None)
        seen[key] += 1
        if seen[key] > 1:
            key = key + (("#", seen[key]),)
        out[(section, key)] = _flat_fields(item)


def _records(results: dict) -> dict:
    """results.json as {(section, key): {field: value}} in document order."""
    out: dict = {}
    _walk(results, "", out)
    return out


def _label(section: str, key: Key) -> str:
    parts = [f"{k}={v}" for k, v in key if v is not None]
    name = section or "(top level)"
    return f"{name}[{', '.join(parts)}]" if parts else name


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _equal(a, b, rel_tol: float, abs_tol: float) -> bool:
    if _is_number(a) and _is_number(b):
        return a == b or math.isclose(a, b, rel_tol=rel_tol, abs_tol=abs_tol)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_equal(x, y, rel_tol, abs_tol) for x, y in zip(a, b))
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    return a == b


class _Keyed(Record):
    """An entry of results.json found by its ``section`` and ``key``; stored with the key as a dict."""

    __slots__ = ()
    record_renamed = {"key_fields": "key"}

    @property
    def label(self) -> str:
        return _label(self.section, self.key)

    @property
    def key_fields(self) -> dict:
        """The key as ``{field: value}``."""
        return dict(self.key)


@dataclass(frozen=True, kw_only=True)
class ResultChange(_Keyed):
    """One value of results.json that differs between two runs."""

    record_keys = ("section", "key_fields", "label", "field", "old", "new", "difference", "relative_difference")

    section: str
    key: Key
    field: str
    old: object
    new: object

    @property
    def difference(self) -> float | None:
        """``new - old`` when both are numbers."""
        if _is_number(self.old) and _is_number(self.new):
            return self.new - self.old
        return None

    @property
    def relative_difference(self) -> float | None:
        """``(new - old) / |old|`` when both are numbers and ``old != 0``."""
        diff = self.difference
        return None if diff is None or self.old == 0 else diff / abs(self.old)


@dataclass(frozen=True, kw_only=True)
class ResultRecord(_Keyed):
    """An entry of results.json present in only one of two runs."""

    record_keys = ("section", "key_fields", "label", "values")

    section: str
    key: Key
    values: dict = field(compare=False)


@dataclass(frozen=True, kw_only=True)
class ResultsDiff(Record):
    """Differences between two results dicts: changed values, added and removed entries."""

    changed: tuple[ResultChange, ...]
    added: tuple[ResultRecord, ...]
    removed: tuple[ResultRecord, ...]

    @property
    def identical(self) -> bool:
        return not (self.changed or self.added or self.removed)


def diff_results(results_a: dict, results_b: dict, *, rel_tol: float = 0.0,
                 abs_tol: float = 0.0) -> ResultsDiff:
    """Compare two results dicts entry by entry.

    List entries are matched by the fields in :data:`RECORD_KEYS` (estimates by
    outcome, estimand, estimator, subgroup, method; tests by outcome, statistic,
    null_effect; ...), other lists by position. Two numbers ``a``, ``b`` are
    equal when::

        a == b   or   |a - b| <= max(rel_tol * max(|a|, |b|), abs_tol),

    the rule of :func:`math.isclose`; other values (text, null, booleans) must
    be equal exactly, and a boolean never equals a number. Inputs are converted
    with :func:`~report_kit.audit.provenance.to_json_value` first, so numpy values
    and NaN compare as they would be stored.

    Parameters
    ----------
    results_a, results_b : dict
        The earlier (recorded) and later (re-run) results.
    rel_tol, abs_tol : float, default 0
        Tolerances; 0 means exact equality.

    Returns
    -------
    ResultsDiff
        ``changed`` values (with ``difference = new - old`` and
        ``relative_difference = (new - old) / |old|``), entries ``added`` in B
        and ``removed`` from A.

    References
    ----------
    Peters, C. (2015). PEP 485 -- A Function for testing approximate equality
    (the symmetric relative test used by :func:`math.isclose`).
    """
    rel_tol = tolerance("rel_tol", rel_tol)
    abs_tol = tolerance("abs_tol", abs_tol)
    for name, value in (("results_a", results_a), ("results_b", results_b)):
        if not isinstance(value, dict):
            raise TypeError(f"`{name}` must be a dict; got {type(value).__name__}")
    rec_a, rec_b = _records(to_json_value(results_a)), _records(to_json_value(results_b))
    changed = []
    for ident, fields_a in rec_a.items():
        fields_b = rec_b.get(ident)
        if fields_b is None:
            continue
        for name in list(fields_a) + [f for f in fields_b if f not in fields_a]:
            old, new = fields_a.get(name), fields_b.get(name)
            if not _equal(old, new, rel_tol, abs_tol) or (name in fields_a) != (name in fields_b):
                changed.append(ResultChange(section=ident[0], key=ident[1], field=name, old=old, new=new))
    added = [ResultRecord(section=s, key=k, values=v) for (s, k), v in rec_b.items() if (s, k) not in rec_a]
    removed = [ResultRecord(section=s, key=k, values=v) for (s, k), v in rec_a.items() if (s, k) not in rec_b]
    return ResultsDiff(changed=tuple(changed), added=tuple(added), removed=tuple(removed))


# -------------------------------------------------------------------- conclusions

def _fmt(value) -> str:
    if value is None:
        return "NA"
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, str):
        return value if value else '""'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_fmt(v) for v in value) + "]"
    return str(value)


def _sign(x: float) -> int:
    return (x > 0) - (x < 0)


def _significance(label, section, key, name, p_a, p_b, alpha) -> dict | None:
    sig_a, sig_b = p_a <= alpha, p_b <= alpha
    if sig_a == sig_b:
        return None
    word = {True: "significant", False: "not significant"}
    return {"kind": "significance", "section": section, "key": dict(key), "label": label,
            "field": name, "old": p_a, "new": p_b,
            "message": (f"{label}: {name} {_fmt(p_a)} -> {_fmt(p_b)}; was {word[sig_a]}, "
                        f"now {word[sig_b]} at alpha = {_fmt(alpha)}")}


def _zero_in(low, high) -> bool:
    return low <= 0 <= high


def _interval(label, section, key, names, fa, fb) -> dict | None:
    lo, hi = names
    vals = (fa.get(lo), fa.get(hi), fb.get(lo), fb.get(hi))
    if not all(_is_number(v) for v in vals):
        return None
    in_a, in_b = _zero_in(vals[0], vals[1]), _zero_in(vals[2], vals[3])
    if in_a == in_b:
        return None
    word = {True: "includes zero", False: "excludes zero"}
    old, new = [vals[0], vals[1]], [vals[2], vals[3]]
    return {"kind": "interval_zero", "section": section, "key": dict(key), "label": label,
            "field": f"{lo}/{hi}", "old": old, "new": new,
            "message": f"{label}: interval {_fmt(old)} {word[in_a]}; now {_fmt(new)} {word[in_b]}"}


def _sign_change(label, section, key, name, a, b) -> dict | None:
    if _sign(a) == _sign(b):
        return None
    return {"kind": "sign", "section": section, "key": dict(key), "label": label,
            "field": name, "old": a, "new": b,
            "message": f"{label}: {name} changed sign: {_fmt(a)} -> {_fmt(b)}"}


def conclusion_changes(results_a: dict, results_b: dict, alpha: float) -> list[dict]:
    """Conclusions that differ between two results dicts.

    Three rules, applied to entries present in both (matched as in
    :func:`diff_results`):

    * significance: a p-value (``tests.p_value``, ``multiplicity.p_adjusted``,
      ``balance.omnibus.p_value``, ``attrition.p_value``) is significant when
      ``p <= alpha``; a change of that verdict is reported;
    * interval_zero: an interval (``estimates`` and ``intervals`` ci_low/ci_high,
      ``attrition.bounds`` lower/upper) includes zero when ``low <= 0 <= high``;
      a change is reported;
    * sign: ``estimates.estimate`` or ``intervals.hodges_lehmann`` changed sign
      (zero counts as its own sign).

    Entries with a missing (null) value on either side are skipped.

    Parameters
    ----------
    results_a, results_b : dict
        Earlier and later results.
    alpha : float
        Significance level, in (0, 1).

    Returns
    -------
    list of dict
        ``{kind, section, key, label, field, old, new, message}`` per change,
        in the order of ``results_a``.

    Notes
    -----
    ``p <= alpha`` is the usual rejection rule of a level-alpha test based on
    a p-value (Lehmann & Romano, 2005, *Testing Statistical Hypotheses*, 3rd
    ed., section 3.3); a confidence interval excludes zero exactly when the
    corresponding test rejects a zero effect (the duality of tests and
    intervals, ibid., section 3.5).
    """
    open_unit_interval("alpha", alpha)
    diff_inputs = [to_json_value(results_a), to_json_value(results_b)]
    for name, value in zip(("results_a", "results_b"), diff_inputs):
        if not isinstance(value, dict):
            raise TypeError(f"`{name}` must be a dict; got {type(value).__name__}")
    rec_a, rec_b = (_records(r) for r in diff_inputs)
    out = []
    for (section, key), fa in rec_a.items():
        fb = rec_b.get((section, key))
        if fb is None:
            continue
        label = _label(section, key)
        p_name = P_VALUE_FIELDS.get(section)
        if p_name and _is_number(fa.get(p_name)) and _is_number(fb.get(p_name)):
            out.append(_significance(label, section, key, p_name, fa[p_name], fb[p_name], alpha))
        if section in INTERVAL_FIELDS:
            out.append(_interval(label, section, key, INTERVAL_FIELDS[section], fa, fb))
        s_name = SIGN_FIELDS.get(section)
        if s_name and _is_number(fa.get(s_name)) and _is_number(fb.get(s_name)):
            out.append(_sign_change(label, section, key, s_name, fa[s_name], fb[s_name]))
    return [c for c in out if c is not None]
