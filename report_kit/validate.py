"""Argument checks and value helpers shared by several library modules.

One place for the validators that more than one module needs, so that the
same mistake gets the same message everywhere, and for the rule that turns a
number into a JSON-safe value. Library misuse raises plain ``TypeError`` (a
value of the wrong type) or ``ValueError`` (a value out of range); the command
line turns the ones caused by its own options into usage errors (exit 2).
"""

from __future__ import annotations

import math



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
