"""Feature spaces: declared closed or open, all-or-nothing admission, plain-data state."""

from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from learners import FeatureError, FeatureSpace, ParameterError, StateError
from learners.features import Rows


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


FLAG_LISTS = st.lists(
    st.lists(st.sampled_from([f"f{i}" for i in range(12)]), unique=True, max_size=6),
    max_size=12,
)


@settings(max_examples=200, deadline=None)
@given(FLAG_LISTS, st.integers(min_value=1, max_value=14), st.booleans())
def test_flag_lists_encode_at_once_as_one_by_one(
    items: list[list[str]], size: int, closed: bool
) -> None:
    """encode_flags gives what encode gives item by item (the same keys, the same names
    admitted in the same order), or None with nothing admitted where one item would be
    refused; Rows built from its flat keys equal Rows built from the items."""
    declared: int | list[str] = [f"f{i}" for i in range(size)] if closed else size
    alone, at_once = FeatureSpace(declared), FeatureSpace(declared)
    try:
        expected = [alone.encode(item) for item in items]
    except FeatureError:
        expected = None
    done = at_once.encode_flags(items)
    if expected is None:
        assert done is None
        assert at_once.names == ([] if not closed else declared)
        return
    assert done is not None
    encs, flat = done
    assert [e.keys for e in encs] == [e.keys for e in expected]
    assert all(e.binary and e.vals is None for e in encs)
    assert at_once.names == alone.names and at_once.index == alone.index
    one, other = Rows(encs, flat), Rows(expected)
    for part in ("keys", "sizes", "starts", "owner"):
        assert getattr(one, part).tolist() == getattr(other, part).tolist(), part
    assert one.vals is None and other.vals is None
