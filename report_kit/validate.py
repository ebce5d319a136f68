"""Argument checks and value helpers shared by several library modules.

One place for the validators that more than one module needs, so that the
same mistake gets the same message everywhere, and for the rule that turns a
number into a JSON-safe value. Library misuse raises plain ``TypeError`` (a
value of the wrong type) or ``ValueError`` (a value out of range); the command
line turns the ones caused by its own options into usage errors (exit 2).
"""

from __future__ import annotations

import math
import warnings

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
    """``value`` when it is one of ``choices`` (strings); UsageError naming the allowed values otherwise."""
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
