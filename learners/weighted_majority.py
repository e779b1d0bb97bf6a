"""Weighted majority: a weighted vote of simple rules, where every rule that errs loses weight.

What it learns
    Nothing about the target's shape: it follows the best of a set of rules (the *experts*), and
    its ceiling is relative to that rule's mistakes, so it fits noisy streams. A rule is a flag
    (``name`` votes the flag), a negated flag (``!name`` votes its complement) or a constant
    (``true``, ``false``). With ``rules`` given, the experts are those rules; without, they are
    every flag of the declared space, its negation and both constants: ``N = 2n + 2``.

Prediction
    The total weight of the rules voting 1 against the total voting 0; 1 only when strictly more
    (a tie predicts 0; any tie rule keeps the ceiling, since on a mistake the erring side holds at
    least half the weight). The sums are float64: with a ``beta`` that is not a power of two, a
    vote tied in exact arithmetic may fall either way by rounding, which is still a tie rule.

Update rule
    Only when the master prediction was wrong: the weight of every rule that erred on the item is
    multiplied by ``beta`` in [0, 1) (default 0.5). Weights start at 1. ``beta = 0`` is halving
    over the rules: a rule that errs on an update is dropped.

Mistake ceiling (counts updates, which are exactly the master's label-time mistakes)
    ``M <= (log2 N + m* log2(1 / beta)) / log2(2 / (1 + beta))``, with ``m*`` the fewest mistakes
    any one rule has made on all the labels so far (read live, and reported as
    ``implied["best_rule_mistakes"]``; :meth:`best_rules` names the rules that reach it).
    ``N = 1000, m* = 10, beta = 1/2`` gives 48.1. The proof: on a master mistake the rules that
    erred hold at least half the weight, so the total falls to at most ``(1 + beta) / 2`` of
    itself; the best rule keeps at least ``beta ** m*`` (it lost weight only on labels it got
    wrong); the total starts at ``N``. Updating only on master mistakes keeps the proof whole: the
    total does not move on other labels, and the best rule's mistakes *on update labels* are at
    most its mistakes on all labels, so ``m*`` counted over every label (which is what an operator
    can read) only loosens the ceiling. Since ``m*`` is observed, this ceiling holds on every
    stream; being past it means a fault, not a broken assumption.

    ``beta = 0``: ``M <= log2 N`` while some rule has made no mistake at all. ``m* > 0`` proves that
    no rule agrees with the stream (the version space is empty): the learner is then
    ``contradicted``.

Cost
    Every rule's mistakes are derived, not stored: per flag, how many positives came with the
    flag on (``P_on``) and the balance ``D = N_on - P_on`` (negatives minus positives with it on);
    with ``P`` and ``N`` the positives and negatives so far, a flag rule's mistakes are ``P + D``
    and its negation's ``N - D``, kept in O(active flags) per label. Without
    ``rules``, a rule on a flag never seen on has voted exactly like a constant on every label, so
    it has the constant's weight and mistakes: such rules are counted in bulk, never stored, and
    the space may declare n = 10^8. The weights of all rules that vote with the flags that are off
    (nearly all of them) change together on an update; one scale factor per side carries them
    (:class:`learners.rules.ScaledWeights`), so an update is O(active flags) too. Weights are
    renormalised by a power of two (exact) whenever their total leaves 2^-64 .. 2^64. A weight
    that falls below 1e-308 of the total flushes to 0; the best rule always has the largest
    weight (at least 1/N of the total), so the ceiling's proof is unaffected.

    ``m*`` is kept up to date as it learns. Without ``rules``, a flag never seen on has ``D = 0``
    (as have the constants), so ``m* = min(P + min(0, min D), N - max(0, max D))``; a label moves
    ``D`` by one step for its active flags only, and :class:`learners.rules.Spread` keeps
    ``min(0, min D)``, ``max(0, max D)`` and how many flags sit at each, from the moved values
    alone. Only when the last flag at an extreme moves inwards does it count the flags at the new
    extreme: one numpy scan of ``D`` while at most ``SPREAD_SCAN`` (16,384) flags are stored,
    beyond that a histogram of ``D`` kept lazily (amortised O(active flags) per label). Reading
    the ceiling (:meth:`ceiling_value`) is then O(1). With explicit ``rules``, ``m*`` is the
    vectorised minimum over the listed rules, O(rules) in numpy on the first read after a label.
    :meth:`best_rules` costs O(rules, or flags seen) in numpy. The last item's votes (and the
    weights they read) are kept until the weights next change, so learning the item just
    predicted does not read them again.

References
    N. Littlestone and M. K. Warmuth, "The weighted majority algorithm", Information and
    Computation 108(2), 1994.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from learners.base import SLACK, Ceiling, Learner, check_number, ensure_length, first_false
from learners.errors import ParameterError, StateError, shown
from learners.features import Encoded, FeatureSpace, Rows
from learners.rules import (
    SPREAD_SCAN,
    ScaledWeights,
    SlotMap,
    Spread,
    check_names_known,
    literal_text,
    parse_literal,
)

SOURCE = (
    'Littlestone and Warmuth 1994, "The weighted majority algorithm", Information and '
    "Computation 108(2)"
)
_NORMAL_EXPONENT = 64  # renormalise when the total weight leaves 2^-64 .. 2^64
_sum = np.add.reduce  # what ndarray.sum calls, without its Python wrapper: the same sum
# skim() counts the labels it passes in bulk and then rebuilds the spread of D from D: a scan
# while at most BULK_SCAN flags are stored, else a histogram of them. Past BULK_SCAN it counts
# in bulk only while the flags stored are at most BULK_RATIO times the entries counted, and
# label by label (O(entries)) beyond.
BULK_SCAN, BULK_RATIO = SPREAD_SCAN, 2


class WeightedMajority(Learner):
    """Deterministic weighted majority over flag rules, negated flag rules and the constants."""

    kind = "weighted-majority"

    def __init__(
        self,
        features: int | list[str] | FeatureSpace,
        rules: list[str] | None = None,
        beta: float = 0.5,
    ) -> None:
        super().__init__(features)
        self.beta = check_number(self.kind, "beta", beta, low=0.0, high=1.0, high_open=True)
        self.rules = None if rules is None else self._parse(rules)
        if self.rules is None:
            # Slots are space indices; slot count n + 1 for a flag that is never on (its rule is
            # the constant false, its negation the constant true).
            count = self.space.size + 1
            self.n_rules = 2 * self.space.size + 2
            self._pos = ScaledWeights(count, 1.0)
            self._neg = ScaledWeights(count, 1.0)
            self._map: SlotMap | None = None
        else:
            names = list(dict.fromkeys(n for n, _ in self._literals if n is not None))
            m = len(names)
            slot = {name: i for i, name in enumerate(names)}
            self._rule_slot = np.array(
                [m if n is None else slot[n] for n, _ in self._literals], dtype=np.int64
            )
            self._rule_positive = np.array([p for _, p in self._literals], dtype=bool)
            has_pos = np.zeros(m + 1)
            has_neg = np.zeros(m + 1)
            has_pos[self._rule_slot[self._rule_positive]] = 1.0
            has_neg[self._rule_slot[~self._rule_positive]] = 1.0
            self.n_rules = len(self.rules)
            self._pos = ScaledWeights(m + 1, 0.0, has_pos)
            self._neg = ScaledWeights(m + 1, 0.0, has_neg)
            self._has_pos, self._has_neg = has_pos > 0, has_neg > 0
            self._pos_slots = np.flatnonzero(self._has_pos)
            self._neg_slots = np.flatnonzero(self._has_neg)
            self._map = SlotMap(self.space, names)
        slots = 0 if self._map is None else len(self._pos.rel)
        self._d = np.zeros(slots, dtype=np.int64)  # per slot: N_on - P_on (the balance D)
        self._on1 = np.zeros(slots, dtype=np.int64)  # per slot: P_on
        self.labels1 = 0  # labels of each class so far
        self.labels0 = 0
        # Every flag: min(0, min D) and max(0, max D), kept as it learns. Explicit rules: a cache
        # of m* per number of labels seen.
        self._spread = Spread(self._d, live=True) if self._map is None else None
        self._best: tuple[int, int] = (-1, 0)
        # The last item's slots, weights and votes (see _tally); None after any weight change.
        self._cache: tuple[Encoded, tuple[np.ndarray, np.ndarray, np.ndarray, float, float]] | None
        self._cache = None
        b = self.beta
        self._log_rules = math.log2(self.n_rules)
        self._log_inv_beta = math.log2(1.0 / b) if b > 0.0 else math.inf
        self._log_shrink = math.log2(2.0 / (1.0 + b))

    def _parse(self, rules: Any) -> list[str]:
        if not isinstance(rules, list | tuple) or not rules:
            raise ParameterError(
                "The 'rules' parameter of weighted-majority must be a non-empty list of rules "
                f"(flag names, !name, true, false); got {shown(rules)}.",
                field="rules",
                rule="non-empty list of rule strings",
                value=shown(rules),
            )
        literals: list[tuple[str | None, bool]] = []
        seen: dict[str, int] = {}
        for i, text in enumerate(rules):
            field = f"rules[{i}]"
            if isinstance(text, str) and text in seen:
                raise ParameterError(
                    f"{field} of weighted-majority repeats rule {text!r} (first at "
                    f"rules[{seen[text]}]); each rule may appear once.",
                    field=field,
                    rule="each rule at most once",
                    value=text,
                )
            if text == "true" or text == "false":
                literals.append((None, text == "false"))  # "false" = the never-on flag itself
            else:
                literals.append(parse_literal(text, kind=self.kind, field=field))
            seen[text] = i
        named = [(n, f"rules[{i}]") for i, (n, _) in enumerate(literals) if n is not None]
        check_names_known(self.space, [n for n, _ in named], [f for _, f in named], self.kind)
        self._literals = literals
        return list(rules)

    def params(self) -> dict[str, Any]:
        return {"rules": self.rules, "beta": self.beta}

    # -- predicting and learning ------------------------------------------------------------

    def _slots(self, enc: Encoded) -> np.ndarray:
        if self._map is not None:
            return self._map.slots(enc.idx)
        seen = len(self.space.names)
        if len(self._pos.rel) < seen or len(self._neg.rel) < seen:
            # No slot count reaches ``count`` (n + 1 > names), so grow only stores new slots.
            self._pos.grow(seen)
            self._neg.grow(seen)
        return enc.idx

    def votes(self, item: Any) -> tuple[float, float]:
        """The total weight voting 1 and voting 0 on one item (a tie predicts 0)."""
        _, _, _, ones, zeros = self._tally(self.space.encode(item))
        return ones, zeros

    def _tally(self, enc: Encoded) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float]:
        """The item's slots, the relative weights there (rules on its flags) and the two votes.

        Kept for the last item until the weights change, so learning the item just predicted
        reads them once (the cache holds the item itself: identity, not an id that may recur).
        """
        cached = self._cache
        if cached is not None and cached[0] is enc:
            return cached[1]
        slots = self._slots(enc)
        pos, neg = self._pos, self._neg
        at_pos = pos.rel[slots]  # flag rules that vote 1 (their flag is on)
        at_neg = neg.rel[slots]  # negated rules that vote 0
        on_pos = pos.scale * float(_sum(at_pos))
        on_neg = neg.scale * float(_sum(at_neg))
        ones = on_pos + (neg.scale * neg.total - on_neg)
        zeros = (pos.scale * pos.total - on_pos) + on_neg
        tally = (slots, at_pos, at_neg, ones, zeros)
        self._cache = (enc, tally)
        return tally

    def _predict(self, enc: Encoded) -> int:
        _, _, _, ones, zeros = self._tally(enc)
        return int(ones > zeros)

    def _learn(self, enc: Encoded, y: int) -> tuple[bool, bool]:
        slots, at_pos, at_neg, ones, zeros = self._tally(enc)
        wrong = int(ones > zeros) != y
        self._count_label(slots, y)
        if wrong:
            self._cache = None  # the weights change
            b = self.beta
            pos, neg = self._pos, self._neg
            if y:  # erred: flag rules whose flag is off, negated rules whose flag is on
                pos.mul(slots, 1.0, b, at_pos)
                neg.mul(slots, b, 1.0, at_neg)
            else:
                pos.mul(slots, b, 1.0, at_pos)
                neg.mul(slots, 1.0, b, at_neg)
            total = pos.scale * pos.total + neg.scale * neg.total
            if total > 0.0:
                exponent = math.frexp(total)[1]
                if abs(exponent) > _NORMAL_EXPONENT:
                    pos.rescale(-exponent)
                    neg.rescale(-exponent)
        self._note_contradiction()
        return wrong, wrong

    def _learn_right(self, enc: Encoded, y: int) -> bool:
        # The master is right, so the weights stay; only every rule's mistakes move.
        self._count_label(self._slots(enc), y)
        self._note_contradiction()
        return False

    # -- many items at once (Learner.skim) ----------------------------------------------------

    def skims(self) -> bool:
        # beta = 0: a label the master gets right may still empty the version space, which
        # must be seen at that label; once it is empty, nothing more changes it.
        return self.beta > 0.0 or self.contradicted

    def _rows_slots(self, rows: Rows, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        """The slots of the entries of items ``a .. b - 1`` and the item (from ``a``) of each."""
        lo, hi = rows.span(a, b)
        keys, owner = rows.keys[lo:hi], rows.owner[lo:hi] - a
        if self._map is not None:
            found = self._map.lookup(keys)
            kept = found >= 0
            return found[kept], owner[kept]
        seen = len(self.space.names)
        if len(self._pos.rel) < seen or len(self._neg.rel) < seen:
            self._pos.grow(seen)  # as _slots does
            self._neg.grow(seen)
        return keys, owner

    def _screen(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> int:
        # An item passes when the master's vote is sure and right: then the weights stay.
        votes, sure = self._rows_votes(rows, a, b)
        return first_false(sure & (votes == (ys[a:b] == 1)))

    def _rows_votes(self, rows: Rows, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        # _tally's two votes for many items at once; the master's vote is sure when one side
        # leads by more than rounding can move the sums (every weight is >= 0, so no partial
        # sum exceeds the total weight).
        slots, owner = self._rows_slots(rows, a, b)
        pos, neg = self._pos, self._neg
        on_pos = pos.scale * np.bincount(owner, weights=pos.rel[slots], minlength=b - a)
        on_neg = neg.scale * np.bincount(owner, weights=neg.rel[slots], minlength=b - a)
        pos_total, neg_total = pos.scale * pos.total, neg.scale * neg.total
        ones = on_pos + (neg_total - on_neg)
        zeros = (pos_total - on_pos) + on_neg
        slack = (rows.widest + 4) * SLACK * (pos_total + neg_total)
        return ones > zeros, np.abs(ones - zeros) > slack

    def _absorb(self, rows: Rows, ys: np.ndarray, a: int, b: int) -> None:
        # The weights stay (no master mistake); every rule's mistakes move, as _count_label
        # moves them label by label: in bulk when the flags stored are few enough.
        slots, owner = self._rows_slots(rows, a, b)
        d = self._grown_counts()
        if self._spread is not None and len(d) > max(BULK_SCAN, BULK_RATIO * len(slots)):
            for k in range(a, b):
                self._count_label(self._slots(rows.encs[k]), int(ys[k]))
            return
        labels = ys[a:b].astype(np.int64)
        at = labels[owner]
        size = len(d)
        d += np.bincount(slots, weights=1 - 2 * at, minlength=size).astype(np.int64)
        self._on1 += np.bincount(slots[at == 1], minlength=size)
        ones = int(labels.sum())
        self.labels1 += ones
        self.labels0 += b - a - ones
        if self._spread is not None:
            self._spread = Spread(d, live=True)  # as _restore builds it: from D alone

    def _grown_counts(self) -> np.ndarray:
        """``D`` (and ``P_on``) grown to every name the space has admitted; returns ``D``."""
        d = self._d
        if self._map is None and len(d) < len(self.space.names):
            d = self._d = ensure_length(d, len(self.space.names), 0)
            self._on1 = ensure_length(self._on1, len(self.space.names), 0)
            if self._spread is not None:
                self._spread.values = d
        return d

    def _count_label(self, slots: np.ndarray, y: int) -> None:
        """Every rule's mistakes after one more label: the balances ``D`` of the item's flags,
        the label counts and the spread of ``D``."""
        d = self._grown_counts()
        old = d[slots]
        if y:
            self.labels1 += 1
            self._on1[slots] += 1
            d[slots] = old - 1
        else:
            self.labels0 += 1
            d[slots] = old + 1
        if self._spread is not None and len(old):
            self._spread.move(old, -1 if y else 1)

    def _note_contradiction(self) -> None:
        if self.beta == 0.0 and not self.contradicted and self.best_mistakes() > 0:
            self.contradicted = True  # no rule agrees with every label: the version space is empty

    # -- every rule's mistakes ----------------------------------------------------------------

    def _balance(self) -> np.ndarray:
        """Per slot: negatives with the flag on minus positives with it on (``d``), a view (slots
        past the space's admitted names are 0). A flag rule's mistakes are ``labels1 + d``, its
        negation's ``labels0 - d``."""
        return self._d

    def best_mistakes(self) -> int:
        """m*: the fewest mistakes any one rule has made over all labels so far."""
        spread = self._spread
        if spread is not None:  # a never-seen flag (d = 0) is always among the rules
            return min(self.labels1 + spread.lo, self.labels0 - spread.hi)
        key = self.labels0 + self.labels1
        if self._best[0] == key:
            return self._best[1]
        d = self._d
        best = min(
            self.labels1 + int(d[self._pos_slots].min(initial=key)),
            self.labels0 - int(d[self._neg_slots].max(initial=-key)),
        )
        self._best = (key, best)
        return best

    def rule_mistakes(self) -> dict[str, int]:
        """Every listed rule's mistakes so far (only with explicit ``rules``)."""
        if self.rules is None:
            raise ParameterError(
                "rule_mistakes() lists explicit rules only; this learner has every flag as a "
                "rule (use best_rules()).",
                field="rules",
                rule="explicit rules given",
                value=None,
            )
        at = self._d[self._rule_slot]
        mistakes = np.where(self._rule_positive, self.labels1 + at, self.labels0 - at)
        return dict(zip(self.rules, mistakes.tolist(), strict=True))

    def best_rules(self, limit: int = 10) -> list[str]:
        """Up to ``limit`` rules that have made m* mistakes, constants first. Without explicit
        ``rules``, a flag never seen on ties with the constants and is not listed by name."""
        best = self.best_mistakes()
        if self.rules is not None:
            return [r for r, m in self.rule_mistakes().items() if m == best][:limit]
        out = [c for c, m in (("true", self.labels0), ("false", self.labels1)) if m == best]
        d = self._balance()[: len(self.space)]
        names = self.space.names
        pos = np.flatnonzero((self.labels1 + d == best) & (d != 0))
        neg = np.flatnonzero((self.labels0 - d == best) & (d != 0))
        out += [literal_text(names[j], True) for j in pos[:limit].tolist()]
        out += [literal_text(names[j], False) for j in neg[:limit].tolist()]
        return out[:limit]

    def ceiling_value(self) -> float:
        """``ceiling().value`` in O(1) (without ``rules``; O(rules) with them, once per label)."""
        if self.beta == 0.0:
            return self._log_rules
        return (self._log_rules + self.best_mistakes() * self._log_inv_beta) / self._log_shrink

    def ceiling(self) -> Ceiling:
        n_rules, b = self.n_rules, self.beta
        best = self.best_mistakes()
        implied = {"best_rule_mistakes": float(best), "rules": float(n_rules)}
        if b == 0.0:
            return Ceiling(
                math.log2(n_rules),
                "M <= log2 N (beta = 0: halving over the N rules)",
                "some rule agrees with every label (noise-free)",
                SOURCE,
                "updates",
                implied,
            )
        value = (math.log2(n_rules) + best * math.log2(1.0 / b)) / math.log2(2.0 / (1.0 + b))
        return Ceiling(
            value,
            "M <= (log2 N + m* log2(1/beta)) / log2(2/(1+beta)), m* = best rule's mistakes so far",
            "none: m* is read from the stream, so the ceiling holds on every stream",
            SOURCE,
            "updates",
            implied,
        )

    # -- state --------------------------------------------------------------------------------

    def _learned_state(self) -> dict[str, Any]:
        on1 = self._on1
        on0 = self._d + on1
        index = np.flatnonzero((on0 != 0) | (on1 != 0))
        return {
            "pos": self._pos.to_state(),
            "neg": self._neg.to_state(),
            "labels1": self.labels1,
            "labels0": self.labels0,
            "on_index": index.tolist(),
            "on1": on1[index].tolist(),
            "on0": on0[index].tolist(),
        }

    def _restore(self, learned: Mapping[str, Any]) -> None:
        length = len(self.space) if self._map is None else len(self._pos.rel)
        self._cache = None
        try:
            self._pos.restore(learned["pos"], length, "learned.pos")
            self._neg.restore(learned["neg"], length, "learned.neg")
            index = np.asarray(learned["on_index"], dtype=np.int64)
            size = max(length, int(index.max(initial=-1)) + 1)
            on1 = np.zeros(size, dtype=np.int64)
            d = np.zeros(size, dtype=np.int64)
            on1[index] = np.asarray(learned["on1"], dtype=np.int64)
            d[index] = np.asarray(learned["on0"], dtype=np.int64)
            d -= on1
            self.labels1 = int(learned["labels1"])
            self.labels0 = int(learned["labels0"])
            self._d, self._on1 = d, on1
            self._best = (-1, 0)
            if self._map is None:
                self._spread = Spread(d, live=True)
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise StateError(
                f"A weighted-majority state cannot be restored: {exc!r}.",
                field="learned",
                rule="written by to_state",
                value=None,
            ) from exc
