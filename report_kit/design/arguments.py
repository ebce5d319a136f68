"""Argument checks and small rules shared by the modules of ``design/`` (private to the folder but for
:func:`number_treated`).

Each check normalises one argument of a mechanism or a draw (kind, counts, seed,
probability, a 0/1 assignment, block or cluster labels) or raises the error
that names it; :func:`number_treated` is the rounding rule both the mechanism
and the real draw use.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pandas as pd

from report_kit.errors import DataError, DesignError
from report_kit.validate import MECHANISMS, check_choice, open_unit_interval

_NEEDS_BLOCK = frozenset({"blocked", "blocked_cluster", "matched_pairs"})
_NEEDS_CLUSTER = frozenset({"cluster", "blocked_cluster"})


def _check_kind(kind: str) -> str:
    return check_choice("kind", kind, MECHANISMS)


def _check_positive_int(name: str, value, *, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ValueError(f"`{name}` must be an integer >= {minimum}; got {value!r}")
    return int(value)


def _check_seed(value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise ValueError(f"`seed` must be a non-negative integer; got {value!r}")
    return int(value)


def _check_probability(value, *, name: str = "probability") -> float | None:
    return None if value is None else open_unit_interval(name, value)


def _check_assignment(z, n: int | None = None) -> np.ndarray:
    arr = np.asarray(z)
    if arr.ndim != 1:
        raise DataError(f"the treatment assignment must be one-dimensional; got shape {arr.shape}")
    if n is not None and arr.size != n:
        raise DataError(f"the treatment assignment has {arr.size} entries; expected {n}")
    if arr.dtype.kind == "f" and not np.all(np.isfinite(arr)):
        raise DataError("the treatment assignment has missing values; every unit needs 0 or 1")
    if arr.dtype.kind not in "biuf" or not np.all((arr == 0) | (arr == 1)):
        bad = arr[~np.isin(arr, (0, 1))][:3] if arr.dtype.kind in "biuf" else arr[:3]
        raise DataError(f"the treatment assignment must hold only 0 and 1; found {np.asarray(bad).tolist()!r}")
    return arr.astype(np.uint8)


def _codes(labels, name: str, n: int) -> tuple[np.ndarray, tuple]:
    """Sorted distinct labels and the code of every unit (index into them)."""
    arr = np.asarray(labels)
    if arr.ndim != 1 or arr.size != n:
        raise DataError(f"`{name}` must have one label per unit ({n}); got shape {arr.shape}")
    missing = pd.isna(arr)
    if np.any(missing):
        raise DataError(f"`{name}` has {int(missing.sum())} missing label(s); every unit needs a {name}")
    try:
        uniq, codes = np.unique(arr, return_inverse=True)
    except TypeError as err:
        raise DataError(f"`{name}` labels must be all numbers or all text; got a mixture") from err
    return codes.astype(np.intp), tuple(uniq.tolist())


def _both_arms(treated: int, total: int, where: str) -> None:
    if treated == 0 or treated == total:
        arm = "treated" if treated == 0 else "control"
        raise DesignError(f"{where} has no {arm} unit ({treated} of {total} treated); both arms are needed")


def number_treated(probability: float, size: int) -> int:
    """Number of randomization units treated among ``size`` at share ``probability``.

    ``floor(probability * size + 1/2)`` (round half up), computed exactly from
    the shortest decimal form of ``probability`` (so 0.35 * 10 gives 4, as
    written, not the binary value 3.4999...). Documented in
    ``docs/methods/randomization.md``.
    """
    exact = Fraction(repr(float(probability))) * size + Fraction(1, 2)
    return int(math.floor(exact))
