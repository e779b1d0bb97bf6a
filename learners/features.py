"""Feature spaces: from named, sparse items to the dense indices the learners compute with.

An item is either a mapping from feature name to a finite number (a flag is 1; a name that is absent
means 0) or a list of the names of the flags that are on. A space is declared in one of two ways:

- closed: a list of names. Every name is known from the start; any other name is an error.
- open: a size ``n``. Names are admitted, in the order they first occur, until ``n`` are known;
  one more is an error. The declared ``n`` enters the ceilings (elimination ``n``, Winnow ``log n``)
  but never the memory: a space costs memory only for the names it has admitted.

Encoding is all-or-nothing: an item that fails validation admits no name. Zero values are dropped
(absent means 0), so they never admit a name either.

Several learners on one stream share one space, so an item is encoded once and every learner reads
the same :class:`Encoded`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from itertools import chain, repeat
from typing import Any

import numpy as np

from learners.errors import FeatureError, ParameterError, StateError, shown

Item = Mapping[str, float] | Sequence[str]

SPACE_STATE_VERSION = 1

Flat = tuple[list[int], list[int]]  # items' keys end to end, and each item's count of them


class Encoded:
    """One item in a space's indices: ``keys`` (list of ints) and ``vals`` (None when all are 1).

    The numpy views ``idx`` and ``val``, the set ``on`` (indices whose value is non-zero; boolean
    learners read a feature as true when it is in ``on``) and the test ``unit`` (every value in
    [0, 1]) are built on first use and kept, so a panel of learners shares one encoding and pays
    only for what it reads. Indices are unique within an item and keep the item's order.
    """

    __slots__ = ("keys", "vals", "binary", "_idx", "_val", "_on", "_unit")

    def __init__(self, keys: list[int], vals: list[float] | None) -> None:
        self.keys = keys
        self.binary = vals is None or vals.count(1.0) == len(vals)
        self.vals = None if self.binary else vals
        self._idx: np.ndarray | None = None
        self._val: np.ndarray | None = None
        self._on: frozenset[int] | None = None
        self._unit: bool | None = None

    @property
    def idx(self) -> np.ndarray:
        if self._idx is None:
            self._idx = np.array(self.keys, dtype=np.int64)
        return self._idx

    @property
    def val(self) -> np.ndarray:
        if self._val is None:
            self._val = np.ones(len(self.keys)) if self.vals is None else np.array(self.vals)
        return self._val

    @property
    def on(self) -> frozenset[int]:
        if self._on is None:
            self._on = frozenset(self.keys)
        return self._on

    @property
    def unit(self) -> bool:
        """True when every value lies in [0, 1] (always, for flags)."""
        if self._unit is None:
            vals = self.vals
            self._unit = vals is None or (min(vals) >= 0.0 and max(vals) <= 1.0)
        return self._unit

    def sq_norm(self) -> float:
        """The squared Euclidean norm of the item."""
        return float(len(self.keys)) if self.vals is None else float(self.val @ self.val)


class Rows:
    """Encoded items laid end to end, for learners that screen many items at once.

    Item ``k``'s indices are ``keys[starts[k]:starts[k + 1]]`` with the values ``vals`` there
    (None when every value of every item is 1); ``owner`` gives each entry's item and ``sizes``
    each item's count of entries. Built once per batch and shared by a panel, like
    :class:`Encoded`.
    """

    __slots__ = ("encs", "keys", "vals", "starts", "owner", "sizes", "widest", "_at", "_signs")

    def __init__(self, encs: Sequence[Encoded], flat: Flat | None = None) -> None:
        """``flat``: the items' keys end to end and each item's count of them, when the caller
        has them (:meth:`FeatureSpace.encode_flags`)."""
        n = len(encs)
        self.encs = encs
        if flat is None:
            self.sizes = np.fromiter((len(e.keys) for e in encs), dtype=np.int64, count=n)
        else:
            self.sizes = np.array(flat[1], dtype=np.int64)
        self.starts = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(self.sizes, out=self.starts[1:])
        total = int(self.starts[-1])
        if flat is None:
            self.keys = np.fromiter(chain.from_iterable(e.keys for e in encs), np.int64, total)
        else:
            self.keys = np.array(flat[0], dtype=np.int64)
        if all(e.binary for e in encs):
            self.vals: np.ndarray | None = None
        else:
            parts = (e.vals if e.vals is not None else [1.0] * len(e.keys) for e in encs)
            self.vals = np.fromiter(chain.from_iterable(parts), np.float64, total)
        self.owner = np.repeat(np.arange(n, dtype=np.int64), self.sizes)
        self.widest = int(self.sizes.max()) if n else 0  # the most entries of one item
        self._at = self.starts.tolist()
        self._signs: tuple[np.ndarray, np.ndarray] | None = None

    def __len__(self) -> int:
        return len(self.encs)

    def span(self, a: int, b: int) -> tuple[int, int]:
        """The entries of items ``a .. b - 1``."""
        return self._at[a], self._at[b]

    def signs(self, ys: np.ndarray) -> np.ndarray:
        """The labels ``ys`` (0 or 1, one per item) as -1.0 and 1.0, kept for the batch."""
        kept = self._signs
        if kept is None or kept[0] is not ys:
            kept = self._signs = (ys, 2.0 * ys - 1.0)
        return kept[1]

    def sums(self, values: np.ndarray, a: int, b: int) -> np.ndarray:
        """Per item of ``a .. b - 1``, the sum of ``values`` (one per entry of those items)."""
        lo, hi = self.span(a, b)
        return np.bincount(self.owner[lo:hi] - a, weights=values, minlength=b - a)


class FeatureSpace:
    """A declared feature space that maps names to indices 0, 1, 2, ... in order of admission."""

    def __init__(self, features: int | Sequence[str]) -> None:
        if isinstance(features, bool) or not isinstance(features, int | list | tuple):
            raise ParameterError(
                "The 'features' parameter must be a positive integer size or a list of names; "
                f"got {shown(features)}.",
                field="features",
                rule="positive integer or list of names",
                value=features,
            )
        self.names: list[str] = []
        self.index: dict[str, int] = {}
        if isinstance(features, int):
            if features < 1:
                raise ParameterError(
                    f"The 'features' size must be a positive integer; got {features}.",
                    field="features",
                    rule="positive integer",
                    value=features,
                )
            self.size = features
            self.closed = False
        else:
            if not features:
                raise ParameterError(
                    "The 'features' list must name at least one feature; got an empty list.",
                    field="features",
                    rule="non-empty list of names",
                    value=[],
                )
            for position, name in enumerate(features):
                if not isinstance(name, str) or not name:
                    raise ParameterError(
                        f"Feature names must be non-empty strings; item {position} of 'features' "
                        f"is {shown(name)}.",
                        field=f"features[{position}]",
                        rule="non-empty string",
                        value=name,
                    )
                if name in self.index:
                    raise ParameterError(
                        f"Feature names must be unique; {name!r} appears twice in 'features'.",
                        field=f"features[{position}]",
                        rule="unique names",
                        value=name,
                    )
                self.index[name] = len(self.names)
                self.names.append(name)
            self.size = len(self.names)
            self.closed = True

    def __len__(self) -> int:
        """How many names are known (admitted or declared)."""
        return len(self.names)

    def encode(self, item: Item | Encoded, checked: bool = False) -> Encoded:
        """Validate ``item`` and return it in this space's indices, admitting new names if open.

        ``checked``: the caller has checked the item's shape already (a list of distinct
        non-empty strings, or a dict of non-empty strings to finite numbers, as the service's
        request readers do), so a list or a dict is not checked again; the names are still
        checked against the space."""
        if isinstance(item, Encoded):
            return item
        vals: list[float] | None
        if type(item) is list and (checked or _plain_flags(item)):
            names: list[str] = item
            vals = None
        elif type(item) is dict and (checked or _plain_values(item)):
            names = [k for k, v in item.items() if v != 0]
            vals = [float(item[k]) for k in names]
        else:  # the slow path finds and names what is wrong, or accepts other mappings
            pairs = [(k, v) for k, v in _pairs(item) if v != 0]
            names = [k for k, _ in pairs]
            vals = [v for _, v in pairs]
        keys = list(map(self.index.get, names, repeat(-1, len(names))))
        if -1 in keys:
            self._admit(names, keys)
        return Encoded(keys, vals)

    def encode_flags(self, items: list[list[str]]) -> tuple[list[Encoded], Flat] | None:
        """Encode lists of flag names checked as for :meth:`encode` (distinct non-empty
        strings) in one pass over all their names, admitting new ones in the order they occur;
        return the items and their keys end to end with each item's count (for :class:`Rows`).
        None, with nothing admitted, when a name would be refused: :meth:`encode`, item by item,
        then tells which and why."""
        sizes = list(map(len, items))
        names = list(chain.from_iterable(items))
        keys = list(map(self.index.get, names, repeat(-1, len(names))))
        if -1 in keys:
            fresh = list(dict.fromkeys(n for n, key in zip(names, keys, strict=True) if key == -1))
            try:
                self._admit(fresh, [-1] * len(fresh))
            except FeatureError:
                return None
            keys = list(map(self.index.__getitem__, names))
        encs = []
        at = 0
        for size in sizes:
            encs.append(Encoded(keys[at : at + size], None))
            at += size
        return encs, (keys, sizes)

    def _admit(self, names: list[str], keys: list[int]) -> None:
        """Fill the -1 slots of ``keys`` with new indices for their names, all or none."""
        fresh = [name for name, key in zip(names, keys, strict=True) if key == -1]
        if self.closed:
            raise FeatureError(
                f"Feature {fresh[0]!r} is not in this stream's closed feature space.",
                field=f"features.{fresh[0]}",
                rule="name declared in the stream's feature list",
                value=fresh[0],
            )
        if len(self.names) + len(fresh) > self.size:
            raise FeatureError(
                f"The feature space is declared with {self.size} features and is full; "
                f"the item brings {len(fresh)} new name(s), first {fresh[0]!r}.",
                field=f"features.{fresh[0]}",
                rule=f"at most {self.size} distinct feature names",
                value=fresh[0],
            )
        for position, name in enumerate(names):
            if keys[position] == -1:
                keys[position] = self.index[name] = len(self.names)
                self.names.append(name)

    def forget(self, known: int) -> None:
        """Drop the names admitted after the first ``known`` (undo an item refused later)."""
        if self.closed:
            return
        for name in self.names[known:]:
            del self.index[name]
        del self.names[known:]

    def to_state(self) -> dict[str, Any]:
        """Plain data from which :meth:`from_state` rebuilds this space, names in order."""
        return {
            "version": SPACE_STATE_VERSION,
            "size": self.size,
            "closed": self.closed,
            "names": list(self.names),
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> FeatureSpace:
        """Rebuild a space written by :meth:`to_state`."""
        if not isinstance(state, Mapping) or state.get("version") != SPACE_STATE_VERSION:
            raise StateError(
                f"A feature-space state must be a mapping with version {SPACE_STATE_VERSION}; "
                f"got {shown(state)}.",
                field="space.version",
                rule=f"equal to {SPACE_STATE_VERSION}",
                value=state.get("version") if isinstance(state, Mapping) else state,
            )
        names = state.get("names")
        if not isinstance(names, list):
            raise StateError(
                "A feature-space state needs a list of names.",
                field="space.names",
                rule="list of strings",
                value=names,
            )
        if state.get("closed"):
            return cls(names)
        space = cls(int(state["size"]))
        space.adopt(names)
        return space

    def adopt(self, names: Iterable[str]) -> None:
        """Admit ``names`` in order (used when restoring); names already known keep their index."""
        for name in names:
            if name not in self.index:
                if self.closed or len(self.names) >= self.size:
                    raise StateError(
                        f"Cannot restore feature {name!r}: the space does not admit it.",
                        field="space.names",
                        rule="names fit the declared space",
                        value=name,
                    )
                self.index[name] = len(self.names)
                self.names.append(name)


def _plain_flags(item: list[Any]) -> bool:
    """True for a list of distinct non-empty strings (the common case, checked fast)."""
    try:
        distinct = set(item)
    except TypeError:  # an unhashable element: the slow path names it
        return False
    return len(distinct) == len(item) and "" not in distinct and set(map(type, distinct)) <= {str}


def _plain_values(item: dict[Any, Any]) -> bool:
    """True for a dict of non-empty string names to finite floats or ints (checked fast)."""
    if "" in item or not set(map(type, item)) <= {str}:
        return False
    kinds = set(map(type, item.values()))
    if not kinds <= {float, int}:
        return False
    return float not in kinds or all(map(math.isfinite, item.values()))


def _pairs(item: Any) -> list[tuple[str, float]]:
    """Check an item's shape and values; return (name, value) pairs with values as floats."""
    if isinstance(item, Mapping):
        pairs: list[tuple[str, float]] = []
        for name, value in item.items():
            if not isinstance(name, str) or not name:
                raise FeatureError(
                    f"Feature names must be non-empty strings; got {shown(name)}.",
                    field="features",
                    rule="non-empty string names",
                    value=name,
                )
            if isinstance(value, int | float) and math.isfinite(value):
                value = float(value)  # bool is an int: True reads as 1.0
            else:
                raise FeatureError(
                    f"Feature {name!r} must have a finite number as its value; got {shown(value)}.",
                    field=f"features.{name}",
                    rule="finite number",
                    value=value if isinstance(value, int | float) else shown(value),
                )
            pairs.append((name, value))
        return pairs
    if isinstance(item, list | tuple):
        seen: set[str] = set()
        for name in item:
            if not isinstance(name, str) or not name:
                raise FeatureError(
                    f"A list item holds the names of flags that are on; got {shown(name)}.",
                    field="features",
                    rule="list of non-empty strings",
                    value=shown(name),
                )
            if name in seen:
                raise FeatureError(
                    f"Flag {name!r} is listed twice in one item.",
                    field=f"features.{name}",
                    rule="each flag at most once",
                    value=name,
                )
            seen.add(name)
        return [(name, 1.0) for name in item]
    raise FeatureError(
        "An item must be a mapping from feature name to number or a list of flag names; "
        f"got {type(item).__name__}.",
        field="features",
        rule="mapping or list",
        value=shown(item),
    )
