"""The one generic serialiser of result objects: ``report_kit.validate.record`` / ``Record``."""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field

import numpy as np
import pytest

from report_kit.validate import Record, record, to_json_value


@dataclass(frozen=True, kw_only=True)
class Inner(Record):
    name: str
    count: int
    share: float | None


@dataclass(frozen=True, kw_only=True)
class Plain(Record):
    label: str
    n: int
    value: float
    flag: bool
    missing: None
    ids: tuple
    rows: list
    extra: dict
    inner: Inner
    inners: tuple[Inner, ...]


def _plain() -> Plain:
    return Plain(label="café", n=12, value=-2.5, flag=True, missing=None, ids=(3, "b", 1.25),
                 rows=[{"a": 1}, {"a": (2, 3)}], extra={"k": [1.5, None], "z": {"deep": False}},
                 inner=Inner(name="x", count=0, share=0.125),
                 inners=(Inner(name="y", count=1, share=None), Inner(name="z", count=2, share=1e-300)))


def test_plain_fields_match_the_stdlib_asdict_json_round_trip():
    # Outside reference: the standard library's dataclasses.asdict (recursive, field order)
    # followed by a json.dumps/json.loads round trip (tuples become lists).
    obj = _plain()
    reference = json.loads(json.dumps(dataclasses.asdict(obj)))
    assert obj.to_dict() == reference
    assert record(obj) == reference
    assert list(obj.to_dict()) == [f.name for f in dataclasses.fields(Plain)]
    assert list(obj.to_dict()["inners"][0]) == ["name", "count", "share"]
    # and the dict is plain JSON already: a second round trip changes nothing
    assert json.loads(json.dumps(obj.to_dict(), allow_nan=False)) == obj.to_dict()


def test_json_number_rule():
    # Outside reference: JSON (RFC 8259) has no NaN or infinity, so they are stored as null;
    # numpy scalars become the Python values numpy's own ``.item()`` gives.
    obj = Inner(name="n", count=np.int64(7), share=np.float32(0.5))
    out = obj.to_dict()
    assert out == {"name": "n", "count": np.int64(7).item(), "share": np.float32(0.5).item()}
    assert type(out["count"]) is int and type(out["share"]) is float
    for bad in (float("nan"), float("inf"), -math.inf, np.float64("nan")):
        assert Inner(name="n", count=1, share=bad).to_dict()["share"] is None
    # -0.0 is stored as 0.0 (one byte form for zero); ints are never turned into floats
    zero = Inner(name="n", count=3, share=-0.0).to_dict()
    assert math.copysign(1.0, zero["share"]) == 1.0 and type(zero["count"]) is int
    arr = Plain(**{**dataclasses.asdict(_plain()), "inner": _plain().inner, "inners": (),
                   "ids": np.array([[1.0, np.nan], [np.inf, 2.0]]), "flag": np.bool_(False)})
    out = arr.to_dict()
    assert out["ids"] == [[1.0, None], [None, 2.0]] and out["flag"] is False


@dataclass(frozen=True, kw_only=True)
class Shaped(Record):
    """A record whose dict differs from its fields: order, omitted, computed, renamed, merged."""

    record_keys = ("kind", "inner", "total", "pairs_dict", "title")
    record_renamed = {"pairs_dict": "pairs"}
    record_merged = ("inner",)
    title = "fixed"

    total_of: tuple
    pairs: tuple
    inner: Inner
    kind: str
    audit: np.ndarray = field(default=None, compare=False, repr=False)

    @property
    def total(self) -> int:
        return sum(self.total_of)

    @property
    def pairs_dict(self) -> dict:
        return dict(self.pairs)


def test_declared_keys_renames_and_merges():
    obj = Shaped(total_of=(1, 2, 3), pairs=(("a", 1), ("b", 2)), inner=Inner(name="i", count=4, share=0.5),
                 kind="k", audit=np.arange(3))
    out = obj.to_dict()
    assert list(out) == ["kind", "name", "count", "share", "total", "pairs", "title"]
    assert out == {"kind": "k", "name": "i", "count": 4, "share": 0.5, "total": 6,
                   "pairs": {"a": 1, "b": 2}, "title": "fixed"}
    # class attributes are not fields
    assert [f.name for f in dataclasses.fields(Shaped)] == ["total_of", "pairs", "inner", "kind", "audit"]


def test_any_dataclass_is_accepted_and_misuse_is_a_type_error():
    @dataclass
    class Bare:
        a: int
        b: tuple = (1.5,)

    assert record(Bare(a=1)) == json.loads(json.dumps(dataclasses.asdict(Bare(a=1))))
    with pytest.raises(TypeError, match="`obj` must be a dataclass instance; got dict"):
        record({"a": 1})
    with pytest.raises(TypeError, match="got type"):
        record(Bare)


def test_a_value_json_cannot_hold_names_its_place():
    from pathlib import Path

    with pytest.raises(TypeError, match=r"cannot store a value of type .*Path in JSON at Inner.name"):
        Inner(name=Path("x"), count=1, share=None).to_dict()
    with pytest.raises(TypeError, match=r"JSON keys must be strings; got 1 at Plain.extra"):
        dataclasses.replace(_plain(), extra={1: 2}).to_dict()
    assert to_json_value((1, np.int8(2))) == [1, 2]


def test_one_rule_for_numbers_strictly_between_0_and_1():
    """One check serves probabilities, alpha, power and confidence levels everywhere in the library."""
    from report_kit.validate import open_unit_interval

    assert open_unit_interval("alpha", np.float32(0.25)) == 0.25
    for bad in (0, 1, 1.5, -0.1, float("nan")):
        with pytest.raises(ValueError, match=r"`alpha` must be a number strictly between 0 and 1"):
            open_unit_interval("alpha", bad)
    for wrong in (True, "0.05", None):
        with pytest.raises(TypeError, match=r"`alpha` must be a number strictly between 0 and 1"):
            open_unit_interval("alpha", wrong)
    # The same words from the design, the planning and the comparison parts.
    from report_kit.design.arguments import _check_probability
    from report_kit.planning.power import mde
    for call in (lambda: _check_probability(1.5), lambda: mde(1.0, alpha=1.5)):
        with pytest.raises(ValueError, match=r"must be a number strictly between 0 and 1; got 1.5"):
            call()
