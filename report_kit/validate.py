"""Argument checks and value helpers shared by several library modules.

One place for the validators that more than one module needs, so that the
same mistake gets the same message everywhere, and for the rule that turns a
number into a JSON-safe value and a result object into the dict that
``results.json`` stores (:func:`to_json_value`, :class:`Record`). Library misuse raises plain ``TypeError`` (a
value of the wrong type) or ``ValueError`` (a value out of range); the command
line turns the ones caused by its own options into usage errors (exit 2).
"""

from __future__ import annotations

import dataclasses
import math
import warnings

from collections.abc import Mapping
from types import MappingProxyType

import numpy as np

from report_kit.errors import ReportKitWarning


def finite_number(name: str, value) -> float:
    """``value`` as a float; TypeError unless it converts to a number, ValueError unless finite."""
    try:
        number = float(value)
    except (TypeError, ValueError) as err:
        raise TypeError(f"`{name}` must be a finite number; got {value!r}") from err
    if not math.isfinite(number):
        raise ValueError(f"`{name}` must be a finite number; got {value!r}")
    return number


def open_unit_interval(name: str, value) -> float:
    """``value`` as a float strictly between 0 and 1 (a probability, alpha, power, a confidence level).

    TypeError unless it is a number (``True`` is not), ValueError when outside (0, 1) or NaN.
    """
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"`{name}` must be a number strictly between 0 and 1; got {value!r}")
    if not 0.0 < float(value) < 1.0:
        raise ValueError(f"`{name}` must be a number strictly between 0 and 1; got {value!r}")
    return float(value)


def closed_unit_interval(name: str, value) -> float:
    """``value`` as a float in [0, 1] (e.g. an intraclass correlation)."""
    try:
        number = float(value)
    except (TypeError, ValueError) as err:
        raise TypeError(f"`{name}` must be a number in [0, 1]; got {value!r}") from err
    if not 0 <= number <= 1:
        raise ValueError(f"`{name}` must be in [0, 1]; got {value!r}")
    return number


def tolerance(name: str, value) -> float:
    """A comparison tolerance: a real (not bool) finite number >= 0."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"`{name}` must be a finite number >= 0; got {value!r}")
    if not math.isfinite(value) or value < 0:
        raise ValueError(f"`{name}` must be a finite number >= 0; got {value!r}")
    return float(value)


def finite_or_none(value) -> float | None:
    """A plain Python float, or None when ``value`` is missing or not finite (JSON has no NaN)."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def to_json_value(obj, _where: str = "$"):
    """Convert ``obj`` to plain JSON values, the way ``results.json`` stores them.

    * dict keys must be strings; their order is kept (DESIGN order, not sorted);
    * tuples and numpy arrays become lists; numpy scalars become Python scalars;
    * NaN, +inf, -inf, ``pandas.NA`` become ``null`` (undefined); ``-0.0`` becomes ``0.0``;
    * objects with a ``to_dict()`` method (every :class:`Record`) are converted through it.

    Anything else (paths, dates, sets ...) raises :class:`TypeError` naming
    the location, e.g. ``$.estimates[0].when``.
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = finite_or_none(obj)
        return 0.0 if value == 0.0 else value
    if isinstance(obj, dict):
        out = {}
        for key, value in obj.items():
            if not isinstance(key, str):
                raise TypeError(f"JSON keys must be strings; got {key!r} at {_where}")
            out[key] = to_json_value(value, f"{_where}.{key}")
        return out
    if isinstance(obj, (list, tuple)):
        return [to_json_value(v, f"{_where}[{i}]") for i, v in enumerate(obj)]
    if isinstance(obj, np.ndarray):
        return to_json_value(obj.tolist(), _where)
    if type(obj).__name__ == "NAType":
        return None
    if callable(getattr(obj, "to_dict", None)):
        return to_json_value(obj.to_dict(), _where)
    raise TypeError(f"cannot store a value of type {type(obj).__name__} in JSON at {_where}")


def record(obj) -> dict:
    """The JSON dict of the dataclass instance ``obj``: one entry per field, in order.

    Each value goes through :func:`to_json_value` (numbers by the JSON-number
    rule, numpy values to Python values, tuples to lists, nested records to
    dicts). Three class attributes, when present, say where the dict differs
    from the fields (see :class:`Record`): ``record_keys`` (the names to store,
    in order: fields, properties or class attributes), ``record_renamed``
    (``{name: key}`` for a key that differs from its name) and
    ``record_merged`` (names whose record's entries are spliced in place).
    """
    if not dataclasses.is_dataclass(obj) or isinstance(obj, type):
        raise TypeError(f"`obj` must be a dataclass instance; got {type(obj).__name__}")
    cls = type(obj)
    names = getattr(cls, "record_keys", None) or tuple(f.name for f in dataclasses.fields(obj))
    renamed = getattr(cls, "record_renamed", {})
    merged = getattr(cls, "record_merged", ())
    out = {}
    for name in names:
        value = to_json_value(getattr(obj, name), f"{cls.__name__}.{name}")
        if name in merged:
            out.update(value)
        else:
            out[renamed.get(name, name)] = value
    return out


class Record:
    """Mixin of the frozen dataclass results: ``to_dict()`` by the one generic rule, :func:`record`.

    A subclass whose dict is not simply its fields, in order, says how in
    class attributes (plain attributes, not fields):

    ``record_keys``
        The names stored, in order: fields, properties (computed values) or
        class attributes. Default ``None``: every field. A field left out is
        not stored (e.g. a null distribution kept for auditing).
    ``record_renamed``
        ``{name: key}`` for an entry stored under another key.
    ``record_merged``
        Names holding a record (e.g. an ``Estimate``) whose entries are
        stored in this dict itself, at that place, instead of nested.
    """

    __slots__ = ()
    record_keys: tuple[str, ...] | None = None
    record_renamed: Mapping[str, str] = MappingProxyType({})
    record_merged: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        """Plain JSON values (see :func:`record`)."""
        return record(self)


# Choice lists shared by the spec, the design and the statistics (one definition each).
#: Assignment mechanisms (``design.mechanism`` in the spec).
MECHANISMS = ("complete", "bernoulli", "blocked", "cluster", "blocked_cluster", "matched_pairs")
#: Alternatives of a randomization test.
ALTERNATIVES = ("two-sided", "greater", "less")
#: Test statistics of the randomization tests.
STATISTICS = ("mean_difference", "rank_sum", "studentized", "ks")
#: How a set of assignments was produced: every assignment of the design, or seeded random draws.
METHODS = ("exact", "monte_carlo")


def braces(choices) -> str:
    """``{'a', 'b'}`` in the given order (a set's repr would vary between runs)."""
    return "{" + ", ".join(repr(c) for c in choices) + "}"


def check_choice(name: str, value, choices) -> str:
    """``value`` when it is one of ``choices`` (strings); ValueError naming the allowed values otherwise."""
    if not isinstance(value, str) or value not in choices:
        raise ValueError(f"`{name}` must be one of {braces(choices)}; got {value!r}")
    return value


def mean_impute_with_indicators(arr, names, *, user: str = "the omnibus test") -> np.ndarray:
    """Fill missing covariate values with the column mean and append missingness indicators.

    The declared handling of missing baseline covariates, shared by the balance
    check and the covariate adjustment: each column's missing values (NaN) are
    replaced by the mean of its observed values, and one 0/1 indicator column
    is appended per distinct pattern of missingness (two covariates missing for
    the same units share one indicator). Both steps use the pooled sample only,
    never the assignment (common practice; e.g. Lin, Green & Coppock 2016
    standard operating procedures). A column missing for every unit is left out
    with a warning that names ``user``.

    Returns the (n, k') float array.
    """
    arr = np.asarray(arr, dtype=float)
    cols, patterns = [], []
    for j, name in enumerate(names):
        x = arr[:, j]
        miss = np.isnan(x)
        if miss.all():
            warnings.warn(f"covariate {name!r} is missing for every unit; {user} leaves it out",
                          ReportKitWarning, stacklevel=3)
            continue
        if miss.any():
            cols.append(np.where(miss, x[~miss].mean(), x))
            if not any(np.array_equal(miss, seen) for seen in patterns):
                patterns.append(miss)  # one indicator per distinct missingness pattern
        else:
            cols.append(x)
    cols.extend(m.astype(float) for m in patterns)
    return np.column_stack(cols) if cols else np.empty((arr.shape[0], 0))
