"""Halving: the majority vote of every rule in a finite class that still agrees with all the labels.

What it learns
    Any target in a class given explicitly as ``rules``: a list of conjunctions of literals, each a
    list of strings (``["a", "!b"]`` is ``a and not b``; ``[]`` is always true; the string
    ``"false"`` is always false and ``"true"`` the same as ``[]``). A flag is true when its value
    is non-zero. :func:`conjunctions` builds the usual classes (all ``3^n`` conjunctions of ``n``
    flags, the ``2^n`` monotone ones, those of exactly or at most ``k`` literals).

Prediction
    The surviving rules (the *version space*) vote; 1 only when more than half of them say 1, so a
    tie predicts 0. Any tie rule keeps the ceiling: on a mistake at least half the survivors were
    wrong.

Update rule
    On every label, every surviving rule that disagrees with it is dropped, whether or not the
    vote was right. The counted ``updates`` are the label-time mistakes of the vote (the ceiling
    counts those). An empty version space proves that no rule of the class labels the stream:
    the learner is then ``contradicted`` (and predicts 0 from then on).

Mistake ceiling (counts updates = label-time mistakes)
    ``M <= floor(log2 |C|)`` on any stream labelled by a rule of the class: every mistake drops at
    least half of the survivors and the target is never dropped. Live: ``M_so_far +
    floor(log2 |survivors|)``, which never exceeds the static ceiling. For all ``3^n`` conjunctions
    this is ``floor(n log2 3)``: 15 for n = 10.

Delayed labels
    ``changes_only_on_update`` is False: a label that the vote got right still prunes rules and so
    can change the vote on a pending item without any counted update. The served ceiling
    ``(1 + G) U`` charges each served mistake to an update made while it waited, which such a
    silent change escapes, so it is not claimed for halving.

Cost
    Memory and time follow the class, never ``n``: rules are evaluated together with numpy over
    the ``m`` flags they mention. When ``m`` is small against the literals per rule (the ``3^n``
    classes) each rule is two bit masks over those flags (``m <= 63`` is one 64-bit word per mask):
    the flags that must be on and the flags it reads; a rule holds on an item ``x`` when
    ``x & reads == must``, so a vote is two vector operations over the survivors. Otherwise each
    rule is a row of its literals (slot, sign) and a vote reads those. Survivors are compacted
    after each label, so the cost falls as the class is pruned. Building the class parses every
    literal once. Which survivors hold on the last item is kept until the survivors change, so
    learning the item just predicted does not evaluate the rules again.

References
    D. Angluin, "Queries and concept learning", Machine Learning 2(4), 1988.
    N. Littlestone, "Learning quickly when irrelevant attributes abound: a new linear-threshold
    algorithm", Machine Learning 2(4), 1988.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from learners.base import Ceiling, Learner, check_number
from learners.errors import ParameterError, StateError, shown
from learners.features import Encoded, FeatureSpace
from learners.rules import CONSTANTS, NEGATION, SlotMap, check_names_known, parse_literal

SOURCE = 'Angluin 1988, "Queries and concept learning", Machine Learning 2(4); Littlestone 1988'

Rule = Sequence[str] | str
_WORD = (1 << 64) - 1


class Halving(Learner):
    """The halving algorithm over an explicit finite class of conjunctions."""

    kind = "halving"
    changes_only_on_update = False

    def __init__(self, features: int | list[str] | FeatureSpace, rules: list[Rule]) -> None:
        super().__init__(features)
        self.rules = self._parse(rules)
        self._alive = np.arange(len(self.rules), dtype=np.int64)
        self._select(self._alive)

    def _parse(self, rules: Any) -> list[Rule]:
        if not isinstance(rules, list | tuple) or not rules:
            raise ParameterError(
                "The 'rules' parameter of halving must be a non-empty list of rules (each a list "
                f"of literals, or 'true' or 'false'); got {shown(rules)}.",
                field="rules",
                rule="non-empty list of rules",
                value=shown(rules),
            )
        cache: dict[str, tuple[int, bool]] = {}  # literal text -> (slot, positive)
        names: list[str] = []  # flags the rules mention, in order of first mention
        fields: list[str] = []  # the rule that first mentions each
        slot_by_name: dict[str, int] = {}
        lit_rule: list[int] = []
        lit_slot: list[int] = []
        lit_positive: list[bool] = []
        seen: dict[Any, int] = {}
        kept: list[Rule] = []
        for i, rule in enumerate(rules):
            field = f"rules[{i}]"
            if isinstance(rule, str):
                if rule not in CONSTANTS:
                    raise ParameterError(
                        f"{field} of halving must be a list of literals, 'true' or 'false'; got "
                        f"{rule!r} (write a single literal as [{rule!r}]).",
                        field=field,
                        rule="list of literals, 'true' or 'false'",
                        value=rule,
                    )
                key: Any = frozenset() if rule == "true" else rule
                texts: list[str] = []
                kept.append(rule)
            elif isinstance(rule, list | tuple):
                for j, text in enumerate(rule):
                    if not (isinstance(text, str) and text in cache):
                        name, positive = parse_literal(text, kind="halving", field=f"{field}[{j}]")
                        if name not in slot_by_name:
                            slot_by_name[name] = len(names)
                            names.append(name)
                            fields.append(field)
                        cache[text] = (slot_by_name[name], positive)
                texts = list(dict.fromkeys(rule))
                key = frozenset(texts)
                kept.append(list(rule))
            else:
                raise ParameterError(
                    f"{field} of halving must be a list of literals, 'true' or 'false'; got "
                    f"{shown(rule)}.",
                    field=field,
                    rule="list of literals, 'true' or 'false'",
                    value=shown(rule),
                )
            if key in seen:
                raise ParameterError(
                    f"{field} of halving repeats rules[{seen[key]}]; each rule may appear once.",
                    field=field,
                    rule="each rule at most once",
                    value=shown(rule),
                )
            seen[key] = i
            if rule == "false":
                lit_rule.append(i)
                lit_slot.append(-1)  # the phantom flag, always on: its negation is always false
                lit_positive.append(False)
            for text in texts:
                slot, positive = cache[text]
                lit_rule.append(i)
                lit_slot.append(slot)
                lit_positive.append(positive)
        check_names_known(self.space, names, fields, self.kind)
        m = len(names)
        self._names = names
        self._map = SlotMap(self.space, names)
        rule_of = np.array(lit_rule, dtype=np.int64)
        slot_of = np.array(lit_slot, dtype=np.int64)
        slot_of[slot_of < 0] = m
        positive_of = np.array(lit_positive, dtype=bool)
        self._build(len(kept), m, rule_of, slot_of, positive_of)
        return kept

    def _build(
        self, count: int, m: int, rule_of: np.ndarray, slot_of: np.ndarray, positive: np.ndarray
    ) -> None:
        """Lay the class out as bit masks or as literal rows, whichever is smaller."""
        per_rule = np.bincount(rule_of, minlength=count) if count else np.zeros(0, np.int64)
        width = max(1, int(per_rule.max(initial=0)))
        words = (m + 1 + 63) // 64  # slot m is a phantom flag that is always on
        self._m = m
        self._all_a: np.ndarray
        self._all_b: np.ndarray
        if words <= width:
            self._masks = True
            word = slot_of // 64
            bit = np.left_shift(np.uint64(1), (slot_of % 64).astype(np.uint64))
            pos = np.zeros((count, words), dtype=np.uint64)
            neg = np.zeros((count, words), dtype=np.uint64)
            np.bitwise_or.at(pos, (rule_of[positive], word[positive]), bit[positive])
            np.bitwise_or.at(neg, (rule_of[~positive], word[~positive]), bit[~positive])
            # A rule with a flag and its negation never holds: it also reads the phantom flag
            # (always on) without requiring it, so its test can never pass.
            never = (pos & neg).any(axis=1)
            phantom = np.uint64(1) << np.uint64(m % 64)
            neg[never, m // 64] |= phantom
            pos[never, m // 64] &= ~phantom
            self._all_a, self._all_b = pos, pos | neg  # must be on, read
        else:
            self._masks = False
            order = np.argsort(rule_of, kind="stable")
            rule_sorted = rule_of[order]
            starts = np.concatenate([[0], np.cumsum(per_rule)[:-1]])
            column = np.arange(len(rule_sorted)) - starts[rule_sorted]
            slots = np.full((count, width), m, dtype=np.int64)  # padding: the phantom, positive
            signs = np.ones((count, width), dtype=bool)
            slots[rule_sorted, column] = slot_of[order]
            signs[rule_sorted, column] = positive[order]
            self._all_a, self._all_b = slots, signs

    def _select(self, alive: np.ndarray) -> None:
        self._keep(self._all_a[alive], self._all_b[alive])

    def _keep(self, a: np.ndarray, b: np.ndarray) -> None:
        """Set the survivors' layout; forget the last item's truth values (they were of others)."""
        self._a, self._b = a, b
        # One-word masks also as vectors (views of the single column), read by a vote directly.
        one_word = self._masks and a.shape[1] == 1
        self._must1: np.ndarray | None = a[:, 0] if one_word else None
        self._read1: np.ndarray | None = b[:, 0] if one_word else None
        self._cache: tuple[Encoded, np.ndarray, int] | None = None

    def params(self) -> dict[str, Any]:
        return {"rules": [r if isinstance(r, str) else list(r) for r in self.rules]}

    # -- predicting and learning ------------------------------------------------------------

    def _truth(self, enc: Encoded) -> tuple[np.ndarray, int]:
        """Which surviving rules are true on the item, and how many.

        Kept for the last item until the survivors change, so learning the item just predicted
        evaluates the rules once (the cache holds the item itself, not an id that may recur).
        """
        cached = self._cache
        if cached is not None and cached[0] is enc:
            return cached[1], cached[2]
        slots = self._map.slots(enc.idx)
        m = self._m
        truth: np.ndarray
        if self._masks:
            bits = 1 << m  # the phantom flag, always on
            for slot in slots.tolist():
                bits |= 1 << slot
            if self._read1 is not None and self._must1 is not None:
                truth = (self._read1 & np.uint64(bits)) == self._must1
            else:
                words = self._a.shape[1]
                xs = np.array([(bits >> (64 * w)) & _WORD for w in range(words)], dtype=np.uint64)
                truth = ((self._b & xs) == self._a).all(axis=1)
        else:
            flags = np.zeros(m + 1, dtype=bool)
            flags[m] = True
            flags[slots] = True
            truth = (flags[self._a] == self._b).all(axis=1)
        true = int(np.count_nonzero(truth))
        self._cache = (enc, truth, true)
        return truth, true

    def _predict(self, enc: Encoded) -> int:
        return int(2 * self._truth(enc)[1] > len(self._alive))

    def _learn(self, enc: Encoded, y: int) -> tuple[bool, bool]:
        truth, true = self._truth(enc)
        alive = len(self._alive)
        wrong = int(2 * true > alive) != y
        if true != (alive if y else 0):  # some survivor disagrees with the label
            agree = truth if y else ~truth
            self._alive = self._alive[agree]
            self._keep(self._a[agree], self._b[agree])
        if len(self._alive) == 0:
            self.contradicted = True
        return wrong, wrong

    # -- the ceiling --------------------------------------------------------------------------

    def ceiling_value(self) -> float:
        """``ceiling().value`` in O(1)."""
        static = len(self.rules).bit_length() - 1
        alive = len(self._alive)
        return float(static if alive == 0 else min(static, self.updates + alive.bit_length() - 1))

    def ceiling(self) -> Ceiling:
        static = len(self.rules).bit_length() - 1  # floor(log2 |C|), exact
        alive = len(self._alive)
        value = static if alive == 0 else min(static, self.updates + alive.bit_length() - 1)
        return Ceiling(
            float(value),
            "M <= floor(log2 |C|); live: M_so_far + floor(log2 |surviving rules|)",
            f"the label is one of the {len(self.rules)} given rules (noise-free)",
            SOURCE,
            "updates",
            {"surviving_rules": float(alive), "class_size": float(len(self.rules))},
        )

    def survivors(self, limit: int = 10) -> list[Rule]:
        """Up to ``limit`` of the rules still consistent with every label, in the given order."""
        return [self.rules[i] for i in self._alive[:limit].tolist()]

    # -- state --------------------------------------------------------------------------------

    def _learned_state(self) -> dict[str, Any]:
        everyone = len(self._alive) == len(self.rules)
        return {"alive": None if everyone else self._alive.tolist()}

    def _restore(self, learned: Mapping[str, Any]) -> None:
        try:
            alive = learned["alive"]
            if alive is None:
                chosen = np.arange(len(self.rules), dtype=np.int64)
            else:
                chosen = np.asarray(alive, dtype=np.int64).reshape(-1)
                if len(chosen) and (
                    chosen.min() < 0
                    or chosen.max() >= len(self.rules)
                    or np.any(np.diff(chosen) <= 0)
                ):
                    raise ValueError("rule positions must be increasing and within the class")
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(
                f"A halving state needs 'alive', increasing rule positions; {exc}.",
                field="learned.alive",
                rule="increasing positions within the class, or null",
                value=None,
            ) from exc
        self._alive = chosen
        self._select(chosen)


def conjunctions(
    names: Sequence[str],
    max_literals: int | None = None,
    exact: int | None = None,
    negations: bool = True,
) -> list[list[str]]:
    """Every conjunction of literals over ``names``, smallest first, as rules for :class:`Halving`.

    ``exact=k``: the ``C(n, k) 2^k`` conjunctions of exactly ``k`` literals on distinct flags
    (``C(n, k)`` without negations); ``max_literals=k``: those of at most ``k``; neither: all
    ``3^n`` (``2^n`` monotone) including the empty, always-true one.
    """
    where = "conjunctions"
    if isinstance(names, str) or not isinstance(names, Sequence):
        raise ParameterError(
            f"The 'names' parameter of {where} must be a list of flag names; got {shown(names)}.",
            field="names",
            rule="list of flag names",
            value=shown(names),
        )
    for j, name in enumerate(names):
        parsed, positive = parse_literal(name, kind=where, field=f"names[{j}]")
        if not positive:
            raise ParameterError(
                f"names[{j}] of {where} must be a flag name, not a negation; got {name!r}.",
                field=f"names[{j}]",
                rule="flag name without !",
                value=name,
            )
    if len(set(names)) != len(names):
        raise ParameterError(
            f"The 'names' parameter of {where} must not repeat a name.",
            field="names",
            rule="unique names",
            value=shown(names),
        )
    if not isinstance(negations, bool):
        raise ParameterError(
            f"The 'negations' parameter of {where} must be true or false; got {shown(negations)}.",
            field="negations",
            rule="boolean",
            value=shown(negations),
        )
    n = len(names)
    if exact is not None and max_literals is not None:
        raise ParameterError(
            f"{where} takes 'exact' or 'max_literals', not both; got {exact} and {max_literals}.",
            field="exact",
            rule="only one of exact, max_literals",
            value=exact,
        )
    if exact is not None:
        sizes: Sequence[int] = [
            int(check_number(where, "exact", exact, low=0, high=n, integer=True))
        ]
    else:
        top = n if max_literals is None else max_literals
        top = int(check_number(where, "max_literals", top, low=0, high=n, integer=True))
        sizes = range(top + 1)
    out: list[list[str]] = []
    for k in sizes:
        for combo in itertools.combinations(names, k):
            if not negations:
                out.append(list(combo))
                continue
            for signs in itertools.product((True, False), repeat=k):
                out.append([c if s else NEGATION + c for c, s in zip(combo, signs, strict=True)])
    return out
