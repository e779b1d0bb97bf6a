"""The shared core of the linear learners: a sparse weight vector with a constant bias feature.

The perceptron family (:mod:`learners.perceptron`) and passive-aggressive
(:mod:`learners.passive_aggressive`) both keep a halfspace ``w . x + b c``: weights ``w``
indexed by the shared space's indices, and the weight ``b`` of a constant feature of value ``c``
(``c = 0`` without a bias). They differ in when and how far they move ``w``, in what the averaged
and voted perceptrons serve, and in the ceiling's numerator and text.
What they share lives here, once:

- the weights, grown lazily with the shared space (memory follows the features seen), and the
  score ``w . x + b c`` that predictions read;
- the weights by feature name;
- the margin ceiling's shared shape, ``numerator / gamma^2`` with ``gamma`` the declared margin,
  and ``implied`` (``R`` always; ``max_margin`` when no margin is declared), ``R^2`` being the
  largest squared augmented norm ``|x|^2 + c^2`` learned so far;
- the learned state ``{"w": {"idx", "val"}, "b", "r2"}`` and the checks that read it back;
- :meth:`Learner.skim`'s screen: an item passes when ``s (w . x + b c)`` clears the point below
  which the learner would update (``clear_above``) by more than rounding can move the score, and
  learning it then only raises ``R^2``.

A learner module keeps its docstring, parameters, update rule and ceiling text; it supplies the
ceiling's numerator and may extend the grow, the state and the restore with arrays of its own.
Each learner's ``_learn`` keeps its own inline copy of the gather (one read of the item's weights
serving the score, ``|x|^2 + c^2``, the ``R^2`` update and the step): moving it here as a method
measured 2 to 8% slower per item (``python -m benchmarks.learners`` and a paired timing).
"""

from __future__ import annotations

import math
from abc import abstractmethod
from collections.abc import Mapping
from typing import Any

import numpy as np

from learners.base import SLACK, Learner, check_number, ensure_length, first_false
from learners.errors import StateError, shown
from learners.features import Encoded, FeatureSpace, Rows

MARGIN_ASSUMPTION = (
    "some unit weight vector (bias included) has s (u . x) >= gamma on every labelled "
    "item: the labels are a halfspace with margin gamma"
)


class LinearLearner(Learner):
    """A learner whose hypothesis is the halfspace ``w . x + b c > 0``, with ``R`` kept live."""

    bias: float | None
    margin: float | None

    def __init__(self, features: int | list[str] | FeatureSpace) -> None:
        super().__init__(features)
        self._c = 0.0
        # Learned state: weights, bias weight, largest squared augmented norm learned.
        self._w = np.zeros(0)
        self._b = 0.0
        self._r2 = 0.0
        # skim() passes an item whose s (w . x + b c) is above this (by more than rounding can
        # move it): the learner neither errs nor updates there. None: it screens nothing.
        self.clear_above: float | None = None

    def _check_bias_and_margin(self, bias: Any, margin: Any) -> None:
        """Validate and store ``bias`` (the constant feature's value) and the declared margin."""
        self.bias = check_positive_or_none(self.kind, "bias", bias)
        self.margin = check_positive_or_none(self.kind, "margin", margin)
        self._c = 0.0 if self.bias is None else self.bias

    # -- the weights --------------------------------------------------------------------------

    def _grow(self) -> None:
        """Make the arrays cover every index the shared space has admitted."""
        self._w = ensure_length(self._w, len(self.space.names), 0.0)

    def _score(self, enc: Encoded) -> float:
        """w . x + b c with the learning weights."""
        if len(self._w) < len(self.space.names):
            self._grow()
        if enc.binary:
            return float(self._w[enc.idx].sum()) + self._b * self._c
        return float(self._w[enc.idx].dot(enc.val)) + self._b * self._c

    # -- many items at once (Learner.skim) ------------------------------------------------------

    def skims(self) -> bool:
        return self.clear_above is not None

    def _scores(self, rows: Rows, a: int, b: int) -> tuple[np.ndarray, float]:
        """``w . x + b c`` for items ``a .. b - 1`` of ``rows``, and the most that rounding
        can move one of them (as the learner sums it or as here):
        ``(n + 4) SLACK (n top + |b c|)``, with no item over ``n`` terms, none over ``top``."""
        if len(self._w) < len(self.space.names):
            self._grow()
        lo, hi = rows.span(a, b)
        terms = self._w[rows.keys[lo:hi]]
        if rows.vals is not None:
            terms = terms * rows.vals[lo:hi]
        bias = self._b * self._c
        top = float(np.abs(terms).max()) if hi > lo else 0.0
        n = rows.widest
        return rows.sums(terms, a, b) + bias, (n + 4) * SLACK * (n * top + abs(bias))

    def _screen(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> int:
        clear = self.clear_above
        assert clear is not None  # skims() says so
        score, slack = self._scores(rows, a, b)
        signed = score * rows.signs(ys)[a:b]
        slack += (rows.widest + 4) * SLACK * abs(clear)
        return first_false(signed > clear + slack)

    def _absorb(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> None:
        # What a passed label still changes: R^2, the largest |x|^2 + c^2 learned, computed for
        # the item that sets it exactly as _learn computes it.
        c2 = self._c * self._c
        if rows.vals is None:  # flags only: |x|^2 is the count, as in _learn
            top = float(rows.sizes[a:b].max()) + c2
            if top > self._r2:
                self._r2 = top
            return
        lo, hi = rows.span(a, b)
        vals = rows.vals[lo:hi]
        sq = rows.sums(vals * vals, a, b) + c2
        near = sq * (1.0 + (rows.sizes[a:b] + 4) * SLACK) >= self._r2
        for k in (np.flatnonzero(near) + a).tolist():
            enc = rows.encs[k]
            exact = len(enc.idx) + c2 if enc.binary else float(enc.val.dot(enc.val)) + c2
            if exact > self._r2:
                self._r2 = exact

    def _rows_votes(self, rows: Rows, a: int, b: int) -> tuple[np.ndarray, np.ndarray] | None:
        if self.clear_above is None:
            return None  # averaged and voted predict with other weights
        score, slack = self._scores(rows, a, b)
        return score > 0.0, np.abs(score) > slack

    @abstractmethod
    def weights(self) -> tuple[dict[str, float], float]:
        """The weights the learner predicts with, by feature name, and the intercept."""

    def _named(self, w: np.ndarray, b: float) -> tuple[dict[str, float], float]:
        """``w`` by feature name (zeros left out) and the intercept ``b c``."""
        names = self.space.names
        w = w[: len(names)]
        return {names[i]: float(w[i]) for i in np.flatnonzero(w)}, b * self._c

    # -- the margin ceiling -------------------------------------------------------------------

    @abstractmethod
    def _numerator(self) -> float:
        """The ceiling's numerator: the ceiling is ``numerator / gamma^2``."""

    def ceiling_value(self) -> float | None:
        """``ceiling().value`` in O(1)."""
        gamma = self.margin
        if gamma is None:
            return None
        return self._numerator() / (gamma * gamma)

    def _margin_terms(self, numerator: float) -> tuple[float | None, str, dict[str, float]]:
        """The ceiling's value, the margin assumption and ``implied``, for ``numerator``.

        Without a declared margin no value is claimed and ``implied["max_margin"]`` is the largest
        margin consistent with the count so far, ``sqrt(numerator / count)``.
        """
        gamma = self.margin
        assumption = MARGIN_ASSUMPTION
        implied = {"R": math.sqrt(self._r2)}
        if gamma is None:
            value = None
            assumption += ", gamma not declared, so no ceiling is claimed"
            count = self.counted
            if count > 0:
                implied["max_margin"] = math.sqrt(numerator / count)
        else:
            value = numerator / (gamma * gamma)
            assumption += f", gamma = {gamma:g} as declared"
        return value, assumption, implied

    # -- state --------------------------------------------------------------------------------

    def _learned_state(self) -> dict[str, Any]:
        n = len(self.space.names)
        return {"w": sparse_state(self._w, n), "b": self._b, "r2": self._r2}

    def _restore(self, learned: Mapping[str, Any]) -> None:
        n = len(self.space.names)
        self._w = dense_from_state(learned.get("w"), "learned.w", n)
        self._b = finite(learned.get("b"), "learned.b")
        self._r2 = finite(learned.get("r2"), "learned.r2")


# -- checks of parameters and stored state ----------------------------------------------------


def check_positive_or_none(kind: str, name: str, value: Any) -> float | None:
    """None, or a finite number > 0 (a named ParameterError otherwise)."""
    if value is None:
        return None
    return check_number(kind, name, value, low=0, low_open=True)


def sparse_state(array: np.ndarray, n: int) -> dict[str, list[Any]]:
    """The non-zero entries of ``array[:n]`` as plain lists of indices and values."""
    head = array[:n]
    nonzero = np.flatnonzero(head)
    return {"idx": nonzero.tolist(), "val": head[nonzero].tolist()}


def dense_from_state(data: Any, field: str, n: int) -> np.ndarray:
    """Rebuild a dense array of length ``n`` from :func:`sparse_state` output, checking it."""
    if not isinstance(data, Mapping):
        raise StateError(
            f"The stored {field} must be a mapping with 'idx' and 'val'; got {shown(data)}.",
            field=field,
            rule="mapping with idx and val lists",
            value=shown(data),
        )
    idx = int_list(data.get("idx"), f"{field}.idx", n)
    val = float_list(data.get("val"), f"{field}.val")
    if len(idx) != len(val):
        raise StateError(
            f"The stored {field} has {len(idx)} indices but {len(val)} values.",
            field=field,
            rule="as many values as indices",
            value=len(val),
        )
    out = np.zeros(n)
    out[np.array(idx, dtype=np.int64)] = np.array(val, dtype=np.float64)
    return out


def int_list(data: Any, field: str, below: int | None) -> list[int]:
    """A list of non-negative integers (each < ``below`` if given), or a named StateError."""
    ok = isinstance(data, list) and all(
        isinstance(i, int) and not isinstance(i, bool) and i >= 0 and (below is None or i < below)
        for i in data
    )
    if not ok:
        rule = "list of integers >= 0" + ("" if below is None else f" and < {below}")
        raise StateError(
            f"The stored {field} must be a {rule}; got {shown(data)}.",
            field=field,
            rule=rule,
            value=shown(data),
        )
    return list(data)


def float_list(data: Any, field: str) -> list[float]:
    """A list of finite numbers, or a named StateError."""
    ok = isinstance(data, list) and all(
        isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) for v in data
    )
    if not ok:
        raise StateError(
            f"The stored {field} must be a list of finite numbers; got {shown(data)}.",
            field=field,
            rule="list of finite numbers",
            value=shown(data),
        )
    return [float(v) for v in data]


def finite(value: Any, field: str) -> float:
    """A finite number, or a named StateError."""
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise StateError(
            f"The stored {field} must be a finite number; got {shown(value)}.",
            field=field,
            rule="finite number",
            value=shown(value),
        )
    return float(value)
