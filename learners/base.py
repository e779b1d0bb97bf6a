"""The one protocol every learner follows, and what a learner reports about its own ceiling.

A learner predicts one item, learns one labelled item, and says how many mistakes it can make at
most if the stream satisfies its assumption: its *ceiling*. The counts it keeps:

- ``examples``: labelled items it has learned from;
- ``mistakes``: labelled items on which its hypothesis *at label time* was wrong;
- ``updates``: labelled items that changed its hypothesis by its own update rule (equal to
  ``mistakes`` for purely mistake-driven learners; larger for margin learners that also update on
  correct but unconfident answers; for halving, the mistakes, although it prunes on every label).

The ceiling bounds one of ``updates`` or ``mistakes``, and says which in :attr:`Ceiling.counts`;
that choice is fixed for a kind and is also the class attribute :attr:`Learner.counts`.

A subclass implements ``_predict(enc)``, ``_learn(enc, y) -> (wrong, updated)``, ``ceiling()``,
``_learned_state()`` and ``_restore(learned)``; the base class owns validation, the counters and the
state envelope, so adding a learner is one module and one line in the registry.

Reading the ceiling on every label
    ``ceiling()`` builds the whole record (formula, assumption, source, implied values) for the
    ledger. A caller that only needs the number after each label (to tell within, near, exceeded)
    reads :meth:`Learner.ceiling_value`, always equal to ``ceiling().value``, and
    :attr:`Learner.counts`; every learner computes that value in O(1) (weighted majority over
    explicit rules: O(rules) in numpy, once per label).
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, Literal

import numpy as np

from learners.errors import LabelError, LearnerError, ParameterError, StateError, shown
from learners.features import Encoded, FeatureSpace, Item, Rows

STATE_VERSION = 1

# Items :meth:`Learner.skim` screens at once: it starts at SKIM_FIRST, doubles up to SKIM_MOST
# while whole windows pass and falls back to twice where the last one stopped (at least
# SKIM_LEAST). Speed only: what a learner learns never depends on it.
SKIM_FIRST, SKIM_LEAST, SKIM_MOST = 64, 16, 4096
# Rounding slack of a screened sum of ``n`` terms whose magnitudes add up to ``m``: ``(n + 4) *
# SLACK * m`` is far above the largest gap between two summation orders of the same terms
# (``(n - 1) * eps * m`` to first order), so an item screened as clear of its threshold is clear
# of it however the learner's own step adds the terms.
SLACK = 8.0 * float(np.finfo(np.float64).eps)

Standing = Literal["within", "near", "exceeded", "contradicted"]
Counts = Literal["updates", "mistakes"]


@dataclass(frozen=True)
class Ceiling:
    """The most ``counts`` a learner can reach while the stream satisfies ``assumption``.

    ``value`` is None when no ceiling is claimed (an assumption the operator has not declared, or a
    variant with no known worst-case bound); ``implied`` then still reports what the counts so far
    imply, e.g. the largest margin consistent with the updates.
    """

    value: float | None
    formula: str
    assumption: str
    source: str
    counts: Counts = "updates"
    implied: Mapping[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "value": self.value,
            "formula": self.formula,
            "assumption": self.assumption,
            "source": self.source,
            "counts": self.counts,
            "implied": dict(self.implied),
        }


def standing(
    count: int, ceiling: Ceiling | float | None, contradicted: bool, near: float = 0.8
) -> Standing:
    """Where a learner stands against its ceiling (a :class:`Ceiling` or just its value).

    contradicted: the stream has proven the assumption false directly; exceeded: the counted
    quantity is above the ceiling; near: it has reached ``near`` times the ceiling; else within.
    """
    if contradicted:
        return "contradicted"
    value = ceiling.value if isinstance(ceiling, Ceiling) else ceiling
    if value is None:
        return "within"
    if count > value:
        return "exceeded"
    if count > 0 and count >= near * value:
        return "near"
    return "within"


def check_label(label: Any) -> int:
    """Return a label as 1 or 0, accepting only 0, 1, True and False."""
    if isinstance(label, bool):
        return int(label)
    if isinstance(label, int | float) and label in (0, 1):
        return int(label)
    raise LabelError(
        f"A label must be 0, 1, true or false; got {shown(label)}.",
        field="label",
        rule="one of 0, 1, true, false",
        value=label if isinstance(label, int | float | str) else shown(label),
    )


def check_number(
    kind: str,
    name: str,
    value: Any,
    *,
    low: float | None = None,
    high: float | None = None,
    low_open: bool = False,
    high_open: bool = False,
    integer: bool = False,
) -> float:
    """Validate one numeric constructor parameter and return it; raise a named ParameterError."""
    rule = _range_rule(low, high, low_open, high_open, integer)
    ok = isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)
    if ok and integer and value != int(value):
        ok = False
    if ok and low is not None and (value <= low if low_open else value < low):
        ok = False
    if ok and high is not None and (value >= high if high_open else value > high):
        ok = False
    if not ok:
        raise ParameterError(
            f"The {name!r} parameter of {kind} must be {rule}; got {shown(value)}.",
            field=name,
            rule=rule,
            value=value if isinstance(value, int | float | str) else shown(value),
        )
    return int(value) if integer else float(value)


def check_choice(kind: str, name: str, value: Any, choices: tuple[str, ...]) -> str:
    """Validate one named option of a constructor and return it."""
    if value not in choices:
        rule = "one of " + ", ".join(repr(c) for c in choices)
        raise ParameterError(
            f"The {name!r} parameter of {kind} must be {rule}; got {shown(value)}.",
            field=name,
            rule=rule,
            value=value if isinstance(value, str | int | float) else shown(value),
        )
    return str(value)


def _range_rule(
    low: float | None, high: float | None, low_open: bool, high_open: bool, integer: bool
) -> str:
    noun = "an integer" if integer else "a finite number"
    parts = []
    if low is not None:
        parts.append(f"{'>' if low_open else '>='} {low:g}")
    if high is not None:
        parts.append(f"{'<' if high_open else '<='} {high:g}")
    return noun + (" " + " and ".join(parts) if parts else "")


class Learner(ABC):
    """An online binary classifier with a mistake ledger and a ceiling."""

    kind: ClassVar[str]
    #: What the ceiling bounds, the same as ``ceiling().counts`` (fixed for a kind).
    counts: ClassVar[Counts] = "updates"
    #: True when the prediction function changes only at updates; only then does the served
    #: ceiling (1 + G) U hold under delayed labels.
    changes_only_on_update: bool = True

    def __init__(self, features: int | list[str] | FeatureSpace) -> None:
        self.space = features if isinstance(features, FeatureSpace) else FeatureSpace(features)
        self.examples = 0
        self.mistakes = 0
        self.updates = 0
        self.contradicted = False
        self._reach = SKIM_FIRST  # items skim() screens at once (speed only; not state)

    # -- what a subclass provides ------------------------------------------------------------

    @abstractmethod
    def params(self) -> dict[str, Any]:
        """The constructor parameters other than ``features``, as plain data."""

    @abstractmethod
    def _predict(self, enc: Encoded) -> int:
        """The current hypothesis on one encoded item: 0 or 1."""

    @abstractmethod
    def _learn(self, enc: Encoded, y: int) -> tuple[bool, bool]:
        """Learn one labelled item; return (hypothesis was wrong, hypothesis updated)."""

    def _learn_right(self, enc: Encoded, y: int) -> bool:
        """Learn a label the hypothesis is known to predict (see :meth:`learn_checked`); return
        whether it updated. The default learns as usual; a learner overrides it to skip work."""
        return self._learn(enc, y)[1]

    def skims(self) -> bool:
        """True when :meth:`skim` can pass items at all (a learner that screens overrides it)."""
        return False

    def _rows_votes(self, rows: Rows, a: int, b: int) -> tuple[np.ndarray, np.ndarray] | None:
        """The hypothesis' predictions on items ``a .. b - 1`` of ``rows`` computed at once (a
        boolean array), and which of them are sure: clear of any rounding, so equal to
        :meth:`predict_checked`'s. None when the learner has no such computation (default)."""
        return None

    def _screen(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> int:
        """How many of the items ``a, a + 1, ...`` (before ``b``) of ``rows``, from the first on,
        the hypothesis as it is now certainly predicts right and would not update on. Must not
        change anything; may return fewer than it could (never more)."""
        return 0

    def _absorb(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> None:
        """Learn the items ``a .. b - 1``, which :meth:`_screen` passed: whatever a label the
        hypothesis gets right and keeps still changes (R, every rule's mistakes). Default:
        nothing."""
        return None

    @abstractmethod
    def ceiling(self) -> Ceiling:
        """The ceiling now, with live inputs (R, m*, |hypothesis|) read from the stream so far."""

    def ceiling_value(self) -> float | None:
        """``ceiling().value``, without building the record; a subclass computes it in O(1)."""
        return self.ceiling().value

    @abstractmethod
    def _learned_state(self) -> dict[str, Any]:
        """What learning has built, as plain JSON-safe data."""

    @abstractmethod
    def _restore(self, learned: Mapping[str, Any]) -> None:
        """Set the learned state from :meth:`_learned_state` output."""

    # -- the protocol -----------------------------------------------------------------------

    def check(self, enc: Encoded) -> None:
        """Refuse an item this learner cannot read (e.g. Winnow's values outside [0, 1]).

        Raise a :class:`FeatureError`; the default accepts every encoded item. A stream calls this
        for every learner of its panel before any of them acts on the item.
        """
        return None

    def encode(self, item: Item | Encoded) -> Encoded:
        """Encode and check ``item``; on refusal no name it brought stays admitted."""
        known = len(self.space)
        enc = self.space.encode(item)
        try:
            self.check(enc)
        except LearnerError:
            self.space.forget(known)
            raise
        return enc

    def predict_rows(self, rows: Rows) -> list[int]:
        """:meth:`predict_checked` on every item of ``rows`` (encoded and checked already):
        computed at once where the learner can, item by item where a vote is not sure."""
        found = self._rows_votes(rows, 0, len(rows)) if len(rows) else None
        if found is None:
            return [self._predict(enc) for enc in rows.encs]
        votes, sure = found
        out: list[int] = votes.astype(np.int8).tolist()
        for k in np.flatnonzero(~sure).tolist():
            out[k] = self._predict(rows.encs[k])
        return out

    def predict(self, item: Item | Encoded) -> int:
        """Predict 0 or 1 for one item. Does not learn."""
        return self._predict(self.encode(item))

    def predict_checked(self, enc: Encoded) -> int:
        """:meth:`predict` for an item this learner has encoded and checked already (see
        :meth:`learn_checked`)."""
        return self._predict(enc)

    def learn(self, item: Item | Encoded, label: Any) -> bool:
        """Learn from one labelled item; return True when the hypothesis was updated."""
        return self.learn_checked(self.encode(item), check_label(label))[1]

    def learn_checked(self, enc: Encoded, y: int, *, right: bool = False) -> tuple[bool, bool]:
        """:meth:`learn` for an item this learner has encoded and checked already, with a label
        that is 0 or 1 already; return (hypothesis was wrong, hypothesis updated).

        For a caller that checks each item once for a whole panel (``service.streams``): it
        skips the per-learner checks, which cost as much as a converged learner's step.

        ``right`` tells that the hypothesis is known to predict ``y`` on this item: the caller
        holds its vote on the item, which was ``y``, and the learner has not updated since
        (valid only when :attr:`changes_only_on_update`). A learner may then skip computing its
        prediction (:meth:`_learn_right`); the result is the same as without the hint.
        """
        if right:
            wrong, updated = False, self._learn_right(enc, y)
        else:
            wrong, updated = self._learn(enc, y)
        self.examples += 1
        self.mistakes += wrong
        self.updates += updated
        return wrong, updated

    def skim(self, rows: Rows, ys: np.ndarray, start: int, stop: int) -> int:
        """Learn the items ``start, start + 1, ...`` (before ``stop``) of ``rows``, labelled
        ``ys``, for as long as each is one the hypothesis predicts right and would not update on;
        return the first item not learned (``stop`` when all were).

        What it learns is exactly what :meth:`learn_checked` would, item by item (each of them
        would return (False, False)); it only screens many items at once. Over the items it
        passes the hypothesis stands still, the ceiling's value does not fall and
        :attr:`contradicted` does not change, so a caller may read the standing once after them
        instead of after each. The items must be encoded and checked already, as for
        :meth:`learn_checked`.
        """
        k = start
        if k < stop and self.skims():
            reach = self._reach
            while k < stop:
                end = min(stop, k + reach)
                passed = self._screen(rows, ys, k, end)
                k += passed
                if k < end:
                    reach = max(SKIM_LEAST, 2 * passed)
                    break
                reach = min(SKIM_MOST, 2 * reach)
            self._reach = reach
            if k > start:
                self._absorb(rows, ys, start, k)
                self.examples += k - start
        return k

    @property
    def counted(self) -> int:
        """The count the ceiling bounds (updates or mistakes, as :attr:`counts` says)."""
        return self.updates if self.counts == "updates" else self.mistakes

    def standing(self, near: float = 0.8) -> Standing:
        """within, near, exceeded or contradicted (see :func:`standing`)."""
        return standing(self.counted, self.ceiling_value(), self.contradicted, near)

    def to_state(self, include_space: bool = True) -> dict[str, Any]:
        """Plain JSON-safe data from which :func:`learners.from_state` continues exactly."""
        state: dict[str, Any] = {
            "kind": self.kind,
            "version": STATE_VERSION,
            "params": self.params(),
            "counts": {
                "examples": self.examples,
                "mistakes": self.mistakes,
                "updates": self.updates,
                "contradicted": self.contradicted,
            },
            "learned": self._learned_state(),
        }
        if include_space:
            state["space"] = self.space.to_state()
        return state

    @classmethod
    def from_state(cls, state: Mapping[str, Any], space: FeatureSpace | None = None) -> Learner:
        """Rebuild a learner from :meth:`to_state`; ``space`` overrides the stored one if given."""
        if state.get("version") != STATE_VERSION:
            raise StateError(
                f"A learner state must have version {STATE_VERSION}; got {state.get('version')!r}.",
                field="version",
                rule=f"equal to {STATE_VERSION}",
                value=state.get("version"),
            )
        if space is None:
            if "space" not in state:
                raise StateError(
                    "A learner state without a stored space needs one passed in.",
                    field="space",
                    rule="present, or a space passed to from_state",
                    value=None,
                )
            space = FeatureSpace.from_state(state["space"])
        learner = cls(space, **state["params"])
        counts = state["counts"]
        learner.examples = int(counts["examples"])
        learner.mistakes = int(counts["mistakes"])
        learner.updates = int(counts["updates"])
        learner.contradicted = bool(counts["contradicted"])
        learner._restore(state["learned"])
        return learner

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.params().items())
        return f"<{self.kind} {args} updates={self.updates}>"


def ensure_length(array: Any, length: int, fill: float) -> Any:
    """Grow a 1-d numpy array to at least ``length`` (doubling), new slots set to ``fill``."""
    if len(array) >= length:
        return array
    grown = np.full(max(length, 2 * len(array), 16), fill, dtype=array.dtype)
    grown[: len(array)] = array
    return grown


def first_false(passed: np.ndarray) -> int:
    """The index of the first False in a boolean array (its length when there is none)."""
    if not len(passed):
        return 0
    k = int(passed.argmin())  # the first False, or 0 when all are True
    return len(passed) if passed[k] else k


__all__ = [
    "SLACK",
    "Ceiling",
    "Counts",
    "Learner",
    "Standing",
    "check_choice",
    "check_label",
    "check_number",
    "ensure_length",
    "first_false",
    "standing",
]
