"""Reading request bodies: the strict JSON parser, and quick readers for plainly valid write bodies.

:func:`strict_json_loads` parses every JSON body the service reads. It turns the literals ``NaN``,
``Infinity`` and ``-Infinity`` (that Python's json module accepts) into :class:`NonFinite`
markers, so validation by the models of ``service.schemas`` rejects them at the exact field with
the value named.

``quick_predict``, ``quick_feedback`` and ``quick_examples`` read the plain case of the three
write routes without the models (``service.writes`` uses them); their rules mirror the models'.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable
from typing import Any

import orjson

from service.schemas import CONTROL, FEATURE_NAME_MAX, ID_MAX, is_text, shown


class NonFinite:
    """A ``NaN`` or ``Infinity`` literal found in a JSON body; never a valid value."""

    __slots__ = ("text",)

    def __init__(self, text: str) -> None:
        self.text = text

    def __repr__(self) -> str:
        return self.text


_SURROGATE_ESCAPE = re.compile(r"\\u[dD][89a-fA-F]")
_DECODER = json.JSONDecoder(parse_constant=NonFinite)


def quick_json_loads(body: bytes) -> Any:
    """A body's JSON document for the quick readers, read by orjson (faster than the json
    module here); None when orjson refuses it, and the framework's reader
    (:func:`strict_json_loads`) then reads it and names what is wrong.

    orjson refuses every text the strict reader refuses (NaN and Infinity literals, lone
    surrogate escapes, integers too long, nesting too deep, bytes that are not UTF-8, a byte
    order mark) and reads every other to the same values but one kind: an integer literal
    outside 64 bits becomes a float. That float is what the models make of such a feature
    value, and as an id or a label it is refused as the integer is, so the answers are the
    same (``tests/service/test_writes.py`` sends such bodies both ways).
    """
    try:
        return orjson.loads(body)
    except orjson.JSONDecodeError:
        return None


def strict_json_loads(data: bytes | str) -> Any:
    """Parse JSON, keeping NaN/Infinity as :class:`NonFinite` so validation can name them.

    Every way a body can fail to be JSON text raises :class:`json.JSONDecodeError` (which the
    app reports as a 422 on the field ``body``): besides syntax errors, nesting too deep for the
    parser, integers with more digits than Python converts, and strings holding a lone UTF-16
    surrogate escape such as ``"\\ud800"`` (not Unicode text: it could never be echoed back).
    """
    doc = data if isinstance(data, str) else ""
    try:
        if isinstance(data, str) and not data.startswith("\ufeff"):
            parsed = _DECODER.decode(data)  # what json.loads does, without a decoder per call
        else:
            parsed = json.loads(data, parse_constant=NonFinite)
    except json.JSONDecodeError:
        raise
    except RecursionError as exc:
        raise json.JSONDecodeError("arrays or objects are nested too deeply", doc, 0) from exc
    except ValueError as exc:  # an integer literal over Python's int conversion limit
        reason = str(exc).split(":")[0]
        raise json.JSONDecodeError(f"a number is too long to read ({reason})", doc, 0) from exc
    if isinstance(data, str) and _SURROGATE_ESCAPE.search(data) is not None:
        bad = _lone_surrogate(parsed)
        if bad is not None:
            message = f"the string {shown(bad)} holds a lone surrogate escape (not Unicode text)"
            raise json.JSONDecodeError(message, doc, 0)
    return parsed


def _lone_surrogate(value: Any) -> str | None:
    """The first string (key or value) in parsed JSON that holds a lone surrogate, if any."""
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, str):
            if not is_text(item):
                return item
        elif isinstance(item, dict):
            stack.extend(item.keys())
            stack.extend(item.values())
        elif isinstance(item, list):
            stack.extend(item)
    return None


def contains_non_finite(value: Any) -> bool:
    """True when ``value`` (plain parsed JSON) holds a NonFinite or a non-finite float."""
    if isinstance(value, NonFinite):
        return True
    if isinstance(value, float):
        return not math.isfinite(value)
    if isinstance(value, dict):
        return any(contains_non_finite(v) for v in value.values())
    if isinstance(value, list):
        return any(contains_non_finite(v) for v in value)
    return False


# -- the plain case, read without the models ------------------------------------------------
#
# Nearly every body a write route gets is plainly valid: the expected keys, each value of the
# expected type. ``quick_predict``, ``quick_feedback`` and ``quick_examples`` read such a body
# (parsed by strict_json_loads) straight into the items the registry takes, in a few passes over
# plain data instead of a model instance per item. For anything else they return None and the
# route validates the body with its model, which names the field, the rule and the value. They
# accept only bodies the models accept and give the same values (numbers as floats, labels as 0
# or 1): tests/service/test_writes.py holds them to that.

_NOT_PLAIN: Any = object()
_EXACT_INT = 2**53  # integers up to this size convert to float exactly, as the models convert


def _plain_id(value: Any) -> Any:
    """An optional item id as the models read it (None when absent), or _NOT_PLAIN."""
    if value is None:
        return None
    if (
        type(value) is str
        and 0 < len(value) <= ID_MAX
        and CONTROL.search(value) is None
        and (value.isascii() or is_text(value))
    ):
        return value
    return _NOT_PLAIN


def _plain_features(value: Any) -> Any:
    """An item's features as the models read them, or _NOT_PLAIN."""
    if type(value) is list:
        try:
            total = len("".join(value))  # a TypeError: an entry is not a string
        except TypeError:
            return _NOT_PLAIN
        if (
            "" in value
            or (total > FEATURE_NAME_MAX and max(map(len, value)) > FEATURE_NAME_MAX)
            or len(set(value)) != len(value)
        ):
            return _NOT_PLAIN
        return value
    if type(value) is dict:
        out: dict[str, float] = {}
        for name, number in value.items():
            kind = type(number)
            if kind is int and -_EXACT_INT <= number <= _EXACT_INT:
                number = float(number)
            elif kind is not float or number - number != 0.0:  # not a number, or inf or nan
                return _NOT_PLAIN
            if type(name) is not str or not 0 < len(name) <= FEATURE_NAME_MAX:
                return _NOT_PLAIN
            out[name] = number
        return out
    return _NOT_PLAIN


def _plain_label(value: Any) -> Any:
    """A label as the models read it (0 or 1), or _NOT_PLAIN."""
    if value is True or value is False:
        return int(value)
    if (type(value) is int or type(value) is float) and value in (0, 1):
        return int(value)
    return _NOT_PLAIN


def _read_predict(entry: dict[str, Any]) -> tuple[str | None, Any] | None:
    item_id = _plain_id(entry.get("id"))
    features = _plain_features(entry.get("features"))
    if item_id is _NOT_PLAIN or features is _NOT_PLAIN:
        return None
    return item_id, features


def _read_feedback(entry: dict[str, Any]) -> tuple[str, int] | None:
    item_id = _plain_id(entry.get("id"))
    label = _plain_label(entry.get("label"))
    if item_id is None or item_id is _NOT_PLAIN or label is _NOT_PLAIN:
        return None
    return item_id, label


def _read_example(entry: dict[str, Any]) -> tuple[str | None, Any, int] | None:
    item_id = _plain_id(entry.get("id"))
    features = _plain_features(entry.get("features"))
    label = _plain_label(entry.get("label"))
    if item_id is _NOT_PLAIN or features is _NOT_PLAIN or label is _NOT_PLAIN:
        return None
    return item_id, features, label


def _quick(
    body: Any,
    fields: frozenset[str],
    read: Callable[[Any], Any],
    read_many: Callable[[list[dict[str, Any]]], list[Any] | None],
) -> Any:
    """(batch, items) of a plainly valid single-or-batch body, or None. A batch is read column
    by column (``read_many``), a few passes over all its items at once."""
    if type(body) is not dict or not body.keys() <= fields | {"items"}:
        return None
    entries = body.get("items")
    if entries is None:
        item = read(body)
        return None if item is None else (False, [item])
    if type(entries) is not list or not entries or any(body.get(f) is not None for f in fields):
        return None  # not a list, an empty batch, or both shapes at once
    if set(map(type, entries)) != {dict} or not all(e.keys() <= fields for e in entries):
        return None
    out = read_many(entries)
    return None if out is None else (True, out)


def _plain_ids(values: list[Any], required: bool) -> bool:
    """True when every id is plain as :func:`_plain_id` reads it (None only if not required)."""
    ids = [v for v in values if v is not None]
    if not ids:
        return not required
    if required and len(ids) < len(values):
        return False
    if set(map(type, ids)) != {str} or min(map(len, ids)) < 1 or max(map(len, ids)) > ID_MAX:
        return False
    joined = "".join(ids)  # one search for a control character, one test of the text
    return CONTROL.search(joined) is None and (joined.isascii() or is_text(joined))


def _plain_labels(values: list[Any]) -> list[int] | None:
    """The labels as :func:`_plain_label` reads them, or None when one is not plain."""
    if not set(map(type, values)) <= {bool, int, float} or not set(values) <= {0, 1}:
        return None
    return list(map(int, values))


def _plain_feature_column(values: list[Any]) -> list[Any] | None:
    """Every item's features as :func:`_plain_features` reads them, or None. (Item by item:
    checking the names of all items at once measured slower.)"""
    out = list(map(_plain_features, values))
    return None if _NOT_PLAIN in out else out


def _read_predicts(entries: list[dict[str, Any]]) -> list[Any] | None:
    ids = [e.get("id") for e in entries]
    features = _plain_feature_column([e.get("features") for e in entries])
    if features is None or not _plain_ids(ids, required=False):
        return None
    return list(zip(ids, features, strict=True))


def _read_feedbacks(entries: list[dict[str, Any]]) -> list[Any] | None:
    ids = [e.get("id") for e in entries]
    labels = _plain_labels([e.get("label") for e in entries])
    if labels is None or not _plain_ids(ids, required=True):
        return None
    return list(zip(ids, labels, strict=True))


def _read_examples(entries: list[dict[str, Any]]) -> list[Any] | None:
    ids = [e.get("id") for e in entries]
    features = _plain_feature_column([e.get("features") for e in entries])
    labels = _plain_labels([e.get("label") for e in entries])
    if features is None or labels is None or not _plain_ids(ids, required=False):
        return None
    return list(zip(ids, features, labels, strict=True))


_PREDICT = frozenset(("id", "features"))
_FEEDBACK = frozenset(("id", "label"))
_EXAMPLE = frozenset(("id", "features", "label"))


def quick_predict(body: Any) -> tuple[bool, list[tuple[str | None, Any]]] | None:
    """(batch, [(id, features)]) of a plainly valid predict body, or None."""
    return _quick(body, _PREDICT, _read_predict, _read_predicts)


def quick_feedback(body: Any) -> tuple[bool, list[tuple[str, int]]] | None:
    """(batch, [(id, label)]) of a plainly valid feedback body, or None."""
    return _quick(body, _FEEDBACK, _read_feedback, _read_feedbacks)


def quick_examples(body: Any) -> tuple[bool, list[tuple[str | None, Any, int]]] | None:
    """(batch, [(id, features, label)]) of a plainly valid examples body, or None."""
    return _quick(body, _EXAMPLE, _read_example, _read_examples)
