"""Feature spaces: declared closed or open, all-or-nothing admission, plain-data state."""

from __future__ import annotations

import json

import pytest

from learners import FeatureError, FeatureSpace, ParameterError, StateError


# DESIGN.md (Features): a flag is 1, absent means 0; an open space admits names until n.
def test_open_space_admits_in_order_and_drops_zeros() -> None:
    space = FeatureSpace(5)
    enc = space.encode({"b": 1, "a": 0, "c": 2.5})
    assert space.names == ["b", "c"]  # the zero-valued "a" admits nothing (absent means 0)
    assert enc.keys == [0, 1]
    assert enc.val.tolist() == [1.0, 2.5]
    assert not enc.binary
    flags = space.encode(["c", "d"])
    assert flags.binary and flags.on == frozenset({1, 2})
    assert flags.sq_norm() == 2.0  # worked by hand: two flags of value 1, 1^2 + 1^2


# The client's rule: bad input gets an error naming field and rule, and changes no state.
def test_failed_item_admits_nothing() -> None:
    space = FeatureSpace(3)
    space.encode(["a"])
    with pytest.raises(FeatureError, match="full"):
        space.encode(["b", "c", "d"])
    with pytest.raises(FeatureError) as caught:
        space.encode({"b": 1, "c": float("nan")})
    assert caught.value.field == "features.c"
    assert caught.value.rule == "finite number"
    assert space.names == ["a"]


# Python: bool is a subclass of int (True == 1, False == 0); DESIGN.md (Features): absent is 0.
def test_bools_read_as_numbers_and_other_mappings_work() -> None:
    space = FeatureSpace(["x", "y"])
    enc = space.encode({"x": True, "y": False})
    assert enc.keys == [0] and enc.binary


@pytest.mark.parametrize(
    ("features", "field"),
    [
        (0, "features"),
        (-3, "features"),
        ([], "features"),
        (["a", "a"], "features[1]"),
        (["a", ""], "features[1]"),
        (True, "features"),
        ("abc", "features"),
    ],
)
# DESIGN.md (Features): a list of unique names or a positive size n; STYLE.md (Errors).
def test_bad_declarations_are_named(features: object, field: str) -> None:
    with pytest.raises(ParameterError) as caught:
        FeatureSpace(features)  # type: ignore[arg-type]
    assert caught.value.field == field


# STYLE.md (A learner module): state round-trips through plain data with a version field.
def test_state_round_trip_keeps_indices() -> None:
    space = FeatureSpace(10)
    space.encode(["q", "r", "s"])
    copy = FeatureSpace.from_state(json.loads(json.dumps(space.to_state())))
    assert copy.names == space.names and copy.index == space.index and copy.size == 10
    closed = FeatureSpace(["u", "v"])
    assert FeatureSpace.from_state(closed.to_state()).closed
    with pytest.raises(StateError):
        FeatureSpace.from_state({"version": 99, "names": []})
