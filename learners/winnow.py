"""Winnow: a linear threshold learner with multiplicative updates, for few relevant flags of many.

What it learns
    A monotone disjunction of at most ``k`` of the ``n`` declared flags (``x3 or x7``), with a
    mistake count that grows with ``k log n`` rather than ``n``. With ``target="conjunction"`` a
    conjunction of at most ``k`` flags (``x3 and x7``), by running on complemented inputs and label:
    ``not (x3 and x7) = (not x3) or (not x7)`` is a disjunction of the complemented flags. The
    ``balanced`` variant keeps a positive and a negative weight per flag, so it can represent
    targets that are not monotone (``x3 and not x7``, any linear threshold) but claims no ceiling.

Inputs
    Values must lie in [0, 1]; any other value is refused with a FeatureError naming the feature
    (it is not clipped), before the shared space admits any of the item's names. The check is one
    pass over the item's values (a list of flags needs none), made once per encoded item and kept
    on it, so predict, learn and the other learners of a panel do not repeat it. A flag is on
    when its value is non-zero.

Prediction
    ``sum_i w_i x_i > theta`` predicts 1 (``(w+ - w-) . x > theta`` for ``balanced``);
    ``alpha`` is in (1, 1000] (default 2) and ``theta > 0``. Weights
    start at 1 (``balanced``: ``w+ = 2`` and ``w- = 1``, net weight 1 like the other variants and
    both sides strictly positive so both can move). ``theta`` defaults to ``n``, the declared size.
    For the conjunction form, the learner predicts the complement of the disjunction learner's
    answer on the complemented item.

Update rule (only on a mistake; ``z`` is the item, complemented for the conjunction form)
    ``winnow2``: false negative: ``w_i *= alpha ** z_i`` (promote); false positive:
    ``w_i /= alpha ** z_i`` (demote). On flags (``z_i`` in {0, 1}) this is x alpha and / alpha on
    the flags that are on.
    ``winnow1``: promotion as winnow2; a false positive sets ``w_i = 0`` for every ``z_i > 0``
    (elimination). A weight that is 0 stays 0.
    ``balanced``: false negative: ``w+_i *= alpha ** z_i``, ``w-_i /= alpha ** z_i``; false
    positive: the reverse.

Mistake ceiling (counts updates, which are the mistakes: the rule is mistake-driven)
    Assumption: every label is a monotone disjunction (conjunction, for the conjunction form) of
    at most ``k`` flags, without noise, and every item that caused an update was 0/1.

    ``winnow2``: ``M <= (alpha + 1) k max(0, log_alpha theta + 1) + alpha n / ((alpha - 1) theta)``.
    For ``alpha = 2, theta = n`` this is ``2 + 3 k (1 + log2 n)``; ``k = 5, n = 10^8`` gives 415.6.
    ``winnow1``: ``M <= alpha k max(0, log_alpha theta + 1) + n / theta``; ``alpha = 2, theta = n``
    gives ``2 k (1 + log2 n) + 1``.

    Both follow from the standard proof, for any ``alpha > 1`` and ``theta > 0``: a false positive
    has every relevant flag off, so relevant weights are never demoted; a false negative has a
    relevant flag on, so every promotion promotes one; a relevant weight above ``theta`` can never
    again be part of a false negative, so each is promoted at most ``max(0, log_alpha theta + 1)``
    times: ``u <= k max(0, log_alpha theta + 1)`` promotions. The total weight starts at ``n`` and
    stays positive; a promotion adds at most ``(alpha - 1) theta`` (the promoted weights summed to
    at most ``theta``), a winnow2 demotion removes more than ``(1 - 1/alpha) theta`` and a winnow1
    elimination more than ``theta``. Hence demotions ``v < alpha n / ((alpha - 1) theta) + alpha u``
    (winnow2) or ``v < n / theta + (alpha - 1) u`` (winnow1), and ``M = u + v``. The conjunction
    form is the same learner on ``n`` complemented flags, so the same ceiling holds with ``k`` the
    number of flags in the conjunction. An update caused by an item with a value strictly between
    0 and 1 falls outside the proof, so from then on no value is claimed (the formula says why).

    Without a declared ``relevant`` the value is None and ``implied["min_relevant"]`` reports the
    smallest ``k`` whose ceiling is at least the updates so far: if the stream is a ``k``-flag
    disjunction at all, ``k`` is at least that (a value above ``n`` means no disjunction fits).
    ``balanced`` claims no ceiling (value None): its known bounds need a margin assumption that an
    operator cannot read off a disjunction size. Winnow has no direct proof of a broken
    assumption (a disjunction can label any single item either way), so it is never
    ``contradicted``; a broken stream shows as ``exceeded``.

Cost
    Weights are stored only for flags the space has admitted, in numpy arrays grown on demand;
    ``n`` enters only the ceiling and the default threshold. Predict and learn cost O(active flags);
    the last item's score (and the weights it read) is kept until the weights next change, so
    learning the item just predicted does not compute it again.
    The conjunction form needs the weights of every flag that is off (all but a few of ``n``):
    one scale factor carries the weight of every flag never seen and a running total the sum of
    all ``n`` weights (:class:`learners.rules.ScaledWeights`), so it is O(active flags) as well.
    winnow1's elimination in the conjunction form zeroes all weights but a few: O(flags seen) the
    first time, O(weights still non-zero) after. Weights are float64; a demoted weight that falls
    below 1e-308 flushes to 0, which only ever happens to flags that are not relevant (relevant
    weights are never demoted), so the ceiling is unaffected.

References
    N. Littlestone, "Learning quickly when irrelevant attributes abound: a new linear-threshold
    algorithm", Machine Learning 2(4), 1988 (Winnow1 and Winnow2; the general alpha, theta forms
    above follow its proof). Learning a conjunction through the complement is common practice.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any, NoReturn

import numpy as np

from learners.base import SLACK, Ceiling, Learner, check_choice, check_number, first_false
from learners.errors import FeatureError, StateError
from learners.features import Encoded, FeatureSpace, Rows
from learners.rules import ScaledWeights

VARIANTS = ("winnow2", "winnow1", "balanced")
TARGETS = ("disjunction", "conjunction")
MAX_ALPHA = 1000.0  # larger factors overflow float64 weights within a few updates

SOURCE = (
    'Littlestone 1988, "Learning quickly when irrelevant attributes abound", Machine Learning '
    "2(4); general alpha, theta form from the standard proof"
)


class Winnow(Learner):
    """Winnow2, Winnow1 and balanced Winnow, for disjunctions or (by complement) conjunctions."""

    kind = "winnow"

    def __init__(
        self,
        features: int | list[str] | FeatureSpace,
        variant: str = "winnow2",
        alpha: float = 2.0,
        threshold: float | None = None,
        relevant: int | None = None,
        target: str = "disjunction",
    ) -> None:
        super().__init__(features)
        n = self.space.size
        self.variant = check_choice(self.kind, "variant", variant, VARIANTS)
        self.alpha = check_number(self.kind, "alpha", alpha, low=1.0, low_open=True, high=MAX_ALPHA)
        self.threshold = (
            None
            if threshold is None
            else check_number(self.kind, "threshold", threshold, low=0.0, low_open=True)
        )
        self.relevant = (
            None
            if relevant is None
            else int(check_number(self.kind, "relevant", relevant, low=1, high=n, integer=True))
        )
        self.target = check_choice(self.kind, "target", target, TARGETS)
        self.theta = float(n) if self.threshold is None else self.threshold
        self.complement = self.target == "conjunction"
        balanced = self.variant == "balanced"
        self._w = ScaledWeights(n, 2.0 if balanced else 1.0)
        self._against = ScaledWeights(n, 1.0) if balanced else None  # w-, balanced only
        self.fractional = False  # an update came from an item with a value strictly in (0, 1)
        # The last item's score and weights (see _tally); None after any weight change.
        self._cache: tuple[Encoded, tuple[float, np.ndarray, np.ndarray | None]] | None = None
        # The ceiling is per_k * k + fixed; both are fixed by the parameters and n.
        self._per_k: float | None = None
        self._fixed = 0.0
        if not balanced:
            self._per_k, self._fixed, _ = self._terms()

    def params(self) -> dict[str, Any]:
        return {
            "variant": self.variant,
            "alpha": self.alpha,
            "threshold": self.threshold,
            "relevant": self.relevant,
            "target": self.target,
        }

    # -- predicting and learning ------------------------------------------------------------

    def _refuse(self, name: str, value: float) -> NoReturn:
        raise FeatureError(
            f"Winnow reads values between 0 and 1; feature {name!r} has {value:g}.",
            field=f"features.{name}",
            rule="value between 0 and 1 (winnow)",
            value=value,
        )

    def check(self, enc: Encoded) -> None:
        """Refuse a value outside [0, 1] (the base class then forgets any name it admitted)."""
        if enc.binary or enc.unit:  # unit: computed once per item, then kept on it
            return
        vals = enc.vals if enc.vals is not None else enc.val.tolist()
        for key, value in zip(enc.keys, vals, strict=True):
            if not 0.0 <= value <= 1.0:
                self._refuse(self.space.names[key], float(value))

    def score(self, item: Any) -> float:
        """The weighted sum the learner compares with ``theta`` (on the complemented item for the
        conjunction form)."""
        return self._score(self.encode(item))

    def _score(self, enc: Encoded) -> float:
        return self._tally(enc)[0]

    def _tally(self, enc: Encoded) -> tuple[float, np.ndarray, np.ndarray | None]:
        """The score and the stored weights at the item's flags (``w``, and ``w-`` if balanced).

        Kept for the last item until the weights change, so learning the item just predicted
        reads them once (the cache holds the item itself, not an id that may recur).
        """
        cached = self._cache
        if cached is not None and cached[0] is enc:
            return cached[1]
        seen = len(self.space.names)
        idx = enc.idx
        val = None if enc.binary else enc.val
        w = self._w
        w.grow(seen)
        part = w.rel[idx]
        s = w.dot_part(part, val, self.complement)
        against = self._against
        part_against = None
        if against is not None:
            against.grow(seen)
            part_against = against.rel[idx]
            s -= against.dot_part(part_against, val, self.complement)
        tally = (s, part, part_against)
        self._cache = (enc, tally)
        return tally

    def _predict(self, enc: Encoded) -> int:
        fires = int(self._tally(enc)[0] > self.theta)
        return 1 - fires if self.complement else fires

    def _learn_right(self, enc: Encoded, y: int) -> bool:
        return False  # weights move only on a mistake

    def _learn(self, enc: Encoded, y: int) -> tuple[bool, bool]:
        score, part, part_against = self._tally(enc)
        fires = int(score > self.theta)
        wanted = 1 - y if self.complement else y
        if fires == wanted:
            return False, False
        self._cache = None  # the weights change
        promote = wanted == 1
        if self.variant == "winnow1" and not promote:
            self._w.mul(enc.idx, *self._zeroing(enc), part)
        else:
            self._w.mul(enc.idx, *self._factors(enc, 1 if promote else -1), part)
        if self._against is not None:
            self._against.mul(enc.idx, *self._factors(enc, -1 if promote else 1), part_against)
        if not enc.binary:
            self.fractional = True
        return True, True

    def skims(self) -> bool:
        return True

    def _screen(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> int:
        # An item passes when the vote is sure and right: Winnow moves only on a mistake.
        votes, sure = self._rows_votes(rows, a, b)
        return first_false(sure & (votes == (ys[a:b] == 1)))

    def _rows_votes(self, rows: Rows, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        # _tally's score for many items at once; a vote is sure when the score is clear of
        # theta by more than rounding can move it.
        seen = len(self.space.names)
        lo, hi = rows.span(a, b)
        keys = rows.keys[lo:hi]
        vals = None if rows.vals is None else rows.vals[lo:hi]
        score: np.ndarray | float = 0.0
        magnitude = 0.0
        for weights, sign in ((self._w, 1.0), (self._against, -1.0)):
            if weights is None:
                continue
            weights.grow(seen)
            terms = weights.rel[keys] if vals is None else weights.rel[keys] * vals
            part = rows.sums(terms, a, b)
            if self.complement:
                score = score + sign * weights.scale * (weights.total - part)
            else:
                score = score + sign * weights.scale * part
            # Weights and values are >= 0 and values <= 1, so part <= total.
            magnitude += 2.0 * weights.scale * weights.total
        fires = np.asarray(score > self.theta)
        slack = (rows.widest + 4) * SLACK * (magnitude + self.theta)
        sure = np.asarray(np.abs(score - self.theta) > slack)
        return (~fires if self.complement else fires), sure

    def _factors(self, enc: Encoded, sign: int) -> tuple[float | np.ndarray, float]:
        """Factors (flags on the item, every other flag) for ``w_i *= alpha ** (sign z_i)``."""
        a = self.alpha
        # sign * z written without the multiplication (the same numbers: -(1 - x) == x - 1).
        if self.complement:  # z = 1 - x on the item's features, 1 everywhere else
            if enc.binary:
                return 1.0, a**sign
            return a ** ((1.0 - enc.val) if sign > 0 else (enc.val - 1.0)), a**sign
        if enc.binary:
            return a**sign, 1.0
        return a ** (enc.val if sign > 0 else -enc.val), 1.0

    def _zeroing(self, enc: Encoded) -> tuple[float | np.ndarray, float]:
        """winnow1's elimination: ``w_i = 0`` wherever ``z_i > 0``."""
        if self.complement:  # z_i = 0 only where x_i = 1
            return (1.0 if enc.binary else (enc.val == 1.0).astype(np.float64)), 0.0
        return 0.0, 1.0

    # -- the ceiling --------------------------------------------------------------------------

    def _terms(self) -> tuple[float, float, str]:
        """The ceiling as ``per_k * k + fixed`` for this variant, with its formula."""
        a, theta, n = self.alpha, self.theta, self.space.size
        rounds = max(0.0, math.log2(theta) / math.log2(a) + 1.0)
        if self.variant == "winnow2":
            formula = (
                "M <= (alpha + 1) k max(0, log_alpha theta + 1) + alpha n / ((alpha - 1) theta)"
            )
            return (a + 1.0) * rounds, a * n / ((a - 1.0) * theta), formula
        formula = "M <= alpha k max(0, log_alpha theta + 1) + n / theta"
        return a * rounds, n / theta, formula

    def ceiling_value(self) -> float | None:
        """``ceiling().value`` in O(1)."""
        if self._per_k is None or self.fractional or self.relevant is None:
            return None
        return self._per_k * self.relevant + self._fixed

    def ceiling(self) -> Ceiling:
        shape = "conjunction" if self.complement else "disjunction"
        k = "k" if self.relevant is None else str(self.relevant)
        assumption = (
            f"the label is a {shape} of at most {k} flags, none negated (noise-free), "
            "and every item that caused an update had 0/1 values"
        )
        if self.variant == "balanced":
            return Ceiling(
                None,
                "none claimed: balanced Winnow's known bounds need a margin assumption",
                f"the label is a linear threshold of the flags ({shape} form)",
                SOURCE,
            )
        per_k, fixed, formula = self._terms()
        if self.fractional:
            return Ceiling(
                None,
                formula + "; not claimed: an update came from an item with a value strictly "
                "between 0 and 1, outside the proof",
                assumption,
                SOURCE,
            )
        implied = {"min_relevant": float(self.min_relevant(per_k, fixed))}
        value = None if self.relevant is None else per_k * self.relevant + fixed
        return Ceiling(value, formula, assumption, SOURCE, "updates", implied)

    def min_relevant(self, per_k: float, fixed: float) -> int:
        """The smallest k >= 1 with ``per_k * k + fixed >= updates`` (``n + 1`` if none fits)."""
        n, m = self.space.size, self.updates
        if per_k <= 0.0:
            return 1 if fixed >= m else n + 1
        k = max(1, math.ceil((m - fixed) / per_k))
        while k > 1 and per_k * (k - 1) + fixed >= m:  # guard against rounding in the division
            k -= 1
        while per_k * k + fixed < m:
            k += 1
        return min(k, n + 1)

    # -- state --------------------------------------------------------------------------------

    def weight(self, name: str) -> float:
        """The current weight of one flag (net ``w+ - w-`` for balanced)."""
        i = self.space.index.get(name)
        if i is None:
            return self._w.base * self._w.scale - (
                0.0 if self._against is None else self._against.base * self._against.scale
            )
        w = self._w.value(i)
        return w if self._against is None else w - self._against.value(i)

    def _learned_state(self) -> dict[str, Any]:
        for vector in (self._w, self._against):
            if vector is not None:
                vector.grow(len(self.space))  # the same layout as a learner restored now
        return {
            "weights": self._w.to_state(),
            "against": None if self._against is None else self._against.to_state(),
            "fractional": self.fractional,
        }

    def _restore(self, learned: Mapping[str, Any]) -> None:
        self._cache = None
        try:
            self._w.restore(learned["weights"], len(self.space), "learned.weights")
            if self._against is not None:
                self._against.restore(learned["against"], len(self.space), "learned.against")
            self.fractional = bool(learned["fractional"])
        except (KeyError, TypeError) as exc:
            raise StateError(
                f"A winnow state needs weights, against and fractional; missing {exc}.",
                field="learned",
                rule="written by to_state",
                value=None,
            ) from exc
