"""Elimination: learns a conjunction of flags by crossing out every literal a positive item refutes.

What it learns
    A target that is a conjunction of literals over the declared flags: monotone (``x3 and x7``)
    by default, or with negated literals (``x3 and not x7``) with ``negations=True``. A flag is true
    when its value is non-zero.

Update rule
    Monotone: the hypothesis starts as the conjunction of all ``n`` flags. On a false negative
    (predicted 0, label 1) every flag that is false in the item is crossed out.
    With negations: the hypothesis starts as all ``2n`` literals (always false). The first positive
    item leaves exactly the ``n`` literals it satisfies; every later false negative crosses out the
    literals that the item falsifies.
    A false positive (predicted 1, label 0) never happens while the target is in the class, since
    the hypothesis always contains the target's literals; one that does happen proves the
    assumption false, and the learner is marked ``contradicted`` (and does not change).

Mistake ceiling
    Monotone: ``M <= n``; live, ``M <= M_so_far + |hypothesis|`` since every update crosses out at
    least one flag and no update can happen once the hypothesis is empty.
    With negations: ``M <= n + 1`` (the first update crosses out ``n`` literals, every later one at
    least one); live, ``M_so_far + |hypothesis|`` after the first update.
    Both hold for any order of the items, and ``n`` is the declared size of the space.

Cost
    The hypothesis is kept as the set of flags still required (and, with negations, the set of
    flags whose negation is crossed out), so memory follows the flags seen in positive items, never
    ``n``. Predict and learn cost O(active flags). :meth:`skim` tests many items at once against
    masks of the two sets, rebuilt in O(flags seen) after an update.

References
    L. G. Valiant, "A theory of the learnable", Communications of the ACM 27(11), 1984.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from learners.base import Ceiling, Learner, first_false
from learners.errors import ParameterError, shown
from learners.features import Encoded, FeatureSpace, Rows

# skim() counts, per item, required flags on plus _WEIGHT per flag on outside the allowed ones:
# exact in float64 sums, and equal to |required| only when there is none of the latter.
_WEIGHT = 2**20

SOURCE = 'Valiant 1984, "A theory of the learnable", CACM 27(11); count from the standard proof'


class Elimination(Learner):
    """Elimination for conjunctions; ``negations=True`` allows negated literals."""

    kind = "elimination"

    def __init__(self, features: int | list[str] | FeatureSpace, negations: bool = False) -> None:
        super().__init__(features)
        if not isinstance(negations, bool):
            raise ParameterError(
                f"The 'negations' parameter of elimination must be true or false; "
                f"got {shown(negations)}.",
                field="negations",
                rule="boolean",
                value=shown(negations),
            )
        self.negations = negations
        # None until the first update: the hypothesis is then every flag (monotone) or every
        # literal (with negations).
        self.required: set[int] | None = None
        # With negations: flags whose negated literal is crossed out (seen true in a positive).
        self.allowed: set[int] = set()
        # For skim(): per space index, 1 where the flag is required / where its negation is still
        # in. Built from the sets on first use, then kept in step by _learn.
        self._masks: tuple[np.ndarray, np.ndarray | None] | None = None

    def params(self) -> dict[str, Any]:
        return {"negations": self.negations}

    def _predict(self, enc: Encoded) -> int:
        required = self.required
        if required is None:
            if self.negations:
                return 0
            # All n flags required: true only when every declared flag is on.
            return int(len(enc.on) == self.space.size and len(self.space) == self.space.size)
        if not required <= enc.on:
            return 0
        if self.negations and not enc.on <= self.allowed:
            return 0
        return 1

    def _learn_right(self, enc: Encoded, y: int) -> bool:
        return False  # a right prediction changes nothing

    def _learn(self, enc: Encoded, y: int) -> tuple[bool, bool]:
        predicted = self._predict(enc)
        if predicted == y:
            return False, False
        if predicted == 1:
            self.contradicted = True
            return True, False
        if self.required is None:
            self.required = set(enc.on)
            self._masks = None
        elif self._masks is None:
            self.required &= enc.on
        else:
            required, negated = self._mask()  # grown to every name, the item's included
            dropped = self.required - enc.on
            self.required -= dropped
            required[list(dropped)] = 0
            if negated is not None:
                negated[enc.keys] = 0
        if self.negations:
            self.allowed |= enc.on
        return True, True

    def skims(self) -> bool:
        return self.required is not None

    def _screen(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> int:
        predicted = self._counted_votes(rows, a, b)
        return first_false(predicted == (ys[a:b] == 1))

    def _rows_votes(self, rows: Rows, a: int, b: int) -> tuple[np.ndarray, np.ndarray] | None:
        if self.required is None:
            return None  # every literal: item by item
        predicted = self._counted_votes(rows, a, b)
        return predicted, np.ones(len(predicted), dtype=bool)

    def _counted_votes(self, rows: Rows, a: int, b: int) -> np.ndarray:
        # The same test as _predict, as counts: every required flag on, and (with negations)
        # no flag on outside the allowed ones. Integer counts: no rounding to allow for.
        required, negated = self._mask()
        lo, hi = rows.span(a, b)
        keys = rows.keys[lo:hi]
        assert self.required is not None  # skims() says so
        size = len(self.required)
        if negated is None:
            predicted = rows.sums(required[keys], a, b) == size
        elif size < _WEIGHT:  # one sum: a flag outside the allowed ones weighs more than all
            predicted = rows.sums(required[keys] + _WEIGHT * negated[keys], a, b) == size
        else:
            predicted = rows.sums(required[keys], a, b) == size
            predicted &= rows.sums(negated[keys], a, b) == 0
        return predicted

    def _mask(self) -> tuple[np.ndarray, np.ndarray | None]:
        n = len(self.space.names)
        masks = self._masks
        if masks is None:
            required = np.zeros(n, dtype=np.int32)
            required[list(self.required or ())] = 1
            negated = None
            if self.negations:
                negated = np.ones(n, dtype=np.int32)
                negated[list(self.allowed)] = 0
            masks = self._masks = (required, negated)
        elif len(masks[0]) < n:  # names admitted since: none required, none allowed
            required, negated = masks
            required = np.concatenate((required, np.zeros(n - len(required), dtype=np.int32)))
            if negated is not None:
                negated = np.concatenate((negated, np.ones(n - len(negated), dtype=np.int32)))
            masks = self._masks = (required, negated)
        return masks

    def size(self) -> int | None:
        """How many literals the hypothesis holds (None: all of them, before any update)."""
        if self.required is None:
            return None
        if self.negations:
            return len(self.required) + self.space.size - len(self.allowed)
        return len(self.required)

    def ceiling_value(self) -> float:
        """``ceiling().value`` in O(1)."""
        n = self.space.size
        static = n + 1 if self.negations else n
        required = self.required
        if required is None:
            return float(static)
        size = len(required) + (n - len(self.allowed) if self.negations else 0)
        return float(min(static, self.updates + size))

    def ceiling(self) -> Ceiling:
        n = self.space.size
        size = self.size()
        if self.negations:
            static, formula = n + 1, "M <= n + 1; live: M_so_far + |hypothesis literals|"
            assumption = "the label is a conjunction of flags and negated flags (noise-free)"
        else:
            static, formula = n, "M <= n; live: M_so_far + |hypothesis flags|"
            assumption = "the label is a conjunction of flags, none negated (noise-free)"
        value = static if size is None else min(static, self.updates + size)
        implied = {} if size is None else {"hypothesis_literals": float(size)}
        return Ceiling(float(value), formula, assumption, SOURCE, "updates", implied)

    def hypothesis(self) -> list[str]:
        """The literals still in the hypothesis, by name (negated ones as ``!name``), if known."""
        if self.required is None:
            return []
        names = self.space.names
        out = [names[i] for i in sorted(self.required)]
        if self.negations:
            out += [f"!{names[i]}" for i in range(len(names)) if i not in self.allowed]
        return out

    def _learned_state(self) -> dict[str, Any]:
        return {
            "required": None if self.required is None else sorted(self.required),
            "allowed": sorted(self.allowed),
        }

    def _restore(self, learned: Mapping[str, Any]) -> None:
        required = learned["required"]
        self.required = None if required is None else {int(i) for i in required}
        self.allowed = {int(i) for i in learned["allowed"]}
        self._masks = None
