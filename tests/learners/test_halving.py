"""Halving against the counts of the trade, its published ceiling, a reference run and
adversarial streams."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import learners
from learners.halving import Halving, conjunctions
from tests.learners.stream_helpers import predict_learn_twice

# -- counts of the trade ----------------------------------------------------------------------


@pytest.mark.parametrize("n", range(7))
def test_count_of_all_conjunctions(n: int) -> None:
    # THEORY.md counts (derived): 3^n conjunctions with negations (9 for n = 2), 2^n monotone.
    names = [f"x{i}" for i in range(n)]
    every = conjunctions(names)
    monotone = conjunctions(names, negations=False)
    assert len(every) == 3**n
    assert len(monotone) == 2**n
    # Each is a distinct hypothesis: a set of literals on distinct flags.
    assert len({frozenset(r) for r in every}) == 3**n
    assert all(len({lit.lstrip("!") for lit in r}) == len(r) for r in every)


def test_count_worked_values() -> None:
    # THEORY.md worked values: 9 conjunctions for n = 2; 12 exactly-2 conjunctions for n = 3.
    assert len(conjunctions(["a", "b"])) == 9
    assert len(conjunctions(["a", "b", "c"], exact=2)) == 12


@pytest.mark.parametrize(("n", "k"), [(3, 2), (5, 0), (6, 3), (8, 2), (10, 4)])
def test_count_exactly_and_at_most_k(n: int, k: int) -> None:
    # THEORY.md: exactly k: C(n, k) 2^k; at most k: sum over i <= k of C(n, i) 2^i (math.comb as
    # the reference); without negations C(n, k) and the sum of C(n, i).
    names = [f"x{i}" for i in range(n)]
    assert len(conjunctions(names, exact=k)) == math.comb(n, k) * 2**k
    assert len(conjunctions(names, max_literals=k)) == sum(
        math.comb(n, i) * 2**i for i in range(k + 1)
    )
    assert len(conjunctions(names, exact=k, negations=False)) == math.comb(n, k)
    assert len(conjunctions(names, max_literals=k, negations=False)) == sum(
        math.comb(n, i) for i in range(k + 1)
    )


def test_ceiling_for_all_conjunctions_of_ten_flags() -> None:
    # THEORY.md (Angluin 1988; Littlestone 1988): floor(log2 |C|), 15 for the 3^10 conjunctions.
    names = [f"x{i}" for i in range(10)]
    learner = learners.make("halving", features=names, rules=conjunctions(names))
    assert learner.ceiling().value == 15 == math.floor(10 * math.log2(3))
    assert learner.ceiling().implied["class_size"] == 3**10


@pytest.mark.parametrize("size", [1, 2, 3, 9, 12, 27, 64, 100])
def test_ceiling_is_floor_log2(size: int) -> None:
    rules: list[Any] = [[f"x{i}"] for i in range(size - 1)] + [[]]
    learner = learners.make("halving", features=200, rules=rules)
    assert learner.ceiling().value == math.floor(math.log2(size))


# -- reference run ----------------------------------------------------------------------------


def holds(rule: Any, on: set[str]) -> bool:
    if isinstance(rule, str):
        return rule == "true"
    return all((lit[1:] not in on) if lit.startswith("!") else (lit in on) for lit in rule)


def reference(rules: list[Any], items: list[list[str]], labels: list[int]) -> tuple[list, int, int]:
    """Halving from its definition (Angluin 1988): majority of the survivors (ties 0), prune every
    rule the label refutes."""
    alive = list(range(len(rules)))
    preds, mistakes = [], 0
    for item, y in zip(items, labels, strict=True):
        on = set(item)
        truth = {i: holds(rules[i], on) for i in alive}
        pred = int(2 * sum(truth.values()) > len(alive))
        preds.append(pred)
        mistakes += pred != y
        alive = [i for i in alive if truth[i] == bool(y)]
    return preds, mistakes, len(alive)


CLASSES = {
    "all-5": conjunctions([f"f{i}" for i in range(5)]),
    "monotone-6-and-false": conjunctions([f"f{i}" for i in range(6)], negations=False) + ["false"],
    "two-words-over-70": conjunctions([f"f{i}" for i in range(70)], exact=1)
    + conjunctions([f"f{i}" for i in range(70)], exact=2)[:300]
    + [["f5", "!f5"], ["f68", "f1", "!f68"]],
    "literals-over-200": conjunctions([f"f{i}" for i in range(200)], exact=1)
    + [["f1", "!f2"], ["f3", "f4"], "true"],
}


@pytest.mark.parametrize("name", sorted(CLASSES))
@pytest.mark.parametrize("labelling", ["planted", "random"])
def test_matches_a_reference_run(name: str, labelling: str) -> None:
    # Covers both layouts: bit masks (few flags against the literals per rule; 70 flags take two
    # 64-bit words) and literal rows (200 flags, at most two literals per rule).
    rules = CLASSES[name]
    rng = np.random.default_rng(len(rules))
    names = sorted({lit.lstrip("!") for r in rules if not isinstance(r, str) for lit in r})
    items = [[f for f in names if rng.random() < 0.4] for _ in range(200)]
    target = rules[int(rng.integers(len(rules)))]
    if labelling == "planted":
        labels = [int(holds(target, set(item))) for item in items]
    else:
        labels = [int(rng.random() < 0.5) for _ in items]
    learner = learners.make("halving", features=10**6, rules=rules)
    preds = []
    for item, label in zip(items, labels, strict=True):
        preds.append(learner.predict(item))
        learner.learn(item, label)
    ref_preds, ref_mistakes, ref_alive = reference(rules, items, labels)
    assert preds == ref_preds
    assert learner.updates == learner.mistakes == ref_mistakes
    assert learner.ceiling().implied["surviving_rules"] == ref_alive
    assert learner.contradicted == (ref_alive == 0)
    if labelling == "planted":
        assert target in learner.survivors(limit=len(rules))
    assert learner._masks == (name != "literals-over-200")
    if name == "two-words-over-70":
        assert learner._a.shape[1] == 2


@pytest.mark.parametrize("flags", [4, 70])  # bit masks of one and of two 64-bit words
def test_a_rule_with_a_flag_and_its_negation_never_holds(flags: int) -> None:
    # A conjunction that holds a literal and its negation is false on every item (common
    # practice: plain logic), so negative labels never refute it and the first positive does.
    names = [f"f{i}" for i in range(flags)]
    last = names[-1]
    never = [["f0", "!f0"], ["f1", "f2", "!f1"], ["!" + last, last]]
    rules = [*never, ["f0"], ["!f1"], [], *([n] for n in names[1:])]
    learner = learners.make("halving", features=names, rules=rules)
    assert learner._masks
    rng = np.random.default_rng(flags)
    for _ in range(30):
        learner.learn([f for f in names if rng.random() < 0.6], 0)
    left = learner.survivors(limit=len(rules))
    assert all(rule in left for rule in never)
    assert ["f0"] not in left and [] not in left
    learner.learn(names, 1)
    assert not any(rule in learner.survivors(limit=len(rules)) for rule in never)


# -- adversarial streams ----------------------------------------------------------------------


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n=st.integers(1, 6),
    shape=st.sampled_from(["all", "monotone", "at-most-2"]),
    order=st.sampled_from(["adaptive", "negatives", "random"]),
    size=st.sampled_from([10**8, 0]),
)
def test_mistakes_stay_within_the_ceiling(
    seed: int, n: int, shape: str, order: str, size: int
) -> None:
    # Angluin 1988; Littlestone 1988: on a stream labelled by a rule of the class, mistakes <=
    # floor(log2 |C|) in any order, and the version space never empties. "adaptive": the item
    # the learner now gets wrong is served first, from every item over the n flags.
    rng = np.random.default_rng(seed)
    names = [f"f{i}" for i in range(n)]
    rules = {
        "all": conjunctions(names),
        "monotone": conjunctions(names, negations=False),
        "at-most-2": conjunctions(names, max_literals=min(2, n)),
    }[shape]
    target = rules[int(rng.integers(len(rules)))]
    learner = learners.make("halving", features=size or names, rules=rules)
    pool_items = [
        [f for f, bit in zip(names, bits, strict=True) if bit] for bits in np.ndindex(*[2] * n)
    ]
    pool = [learner.space.encode(item) for item in pool_items]
    labels = [int(holds(target, set(item))) for item in pool_items]
    bound = math.floor(math.log2(len(rules)))
    if order == "adaptive":
        while True:
            wrong = [i for i, enc in enumerate(pool) if learner.predict(enc) != labels[i]]
            if not wrong:
                break
            learner.learn(pool[wrong[0]], labels[wrong[0]])
            assert learner.updates <= learner.ceiling().value <= bound
    else:
        index = list(rng.permutation(len(pool)))
        if order == "negatives":
            index.sort(key=lambda i: labels[i])
        for i in index:
            learner.learn(pool[i], labels[i])
            assert learner.updates <= learner.ceiling().value <= bound
    assert not learner.contradicted
    assert target in learner.survivors(limit=len(rules))


def test_adaptive_adversary_on_all_conjunctions_of_ten_flags() -> None:
    # 3^10 = 59049 rules: floor(log2 |C|) = 15 (THEORY.md) bounds the mistakes even when every
    # item served is one the learner currently gets wrong.
    names = [f"f{i}" for i in range(10)]
    rules = conjunctions(names)
    target = ["f1", "!f4", "f7"]
    learner = learners.make("halving", features=names, rules=rules)
    rng = np.random.default_rng(0)
    pool_items = [[f for f in names if rng.random() < 0.5] for _ in range(300)]
    pool_items += [["f1", "f7"], ["f1", "f7", "f2"]]
    pool = [learner.space.encode(item) for item in pool_items]
    labels = [int(holds(target, set(item))) for item in pool_items]
    while True:
        wrong = [i for i, enc in enumerate(pool) if learner.predict(enc) != labels[i]]
        if not wrong:
            break
        learner.learn(pool[wrong[0]], labels[wrong[0]])
    assert 1 <= learner.updates <= 15
    assert target in learner.survivors(limit=100)


def test_parity_stream_ends_contradicted() -> None:
    # XOR of two flags is no conjunction (common practice): the 3^2 = 9 rules all die.
    learner = learners.make("halving", features=["a", "b"], rules=conjunctions(["a", "b"]))
    for item, label in [([], 0), (["a"], 1), (["b"], 1), (["a", "b"], 0)]:
        learner.learn(item, label)
    assert learner.standing() == "contradicted"
    assert learner.survivors() == []
    assert learner.predict(["a"]) == 0  # an empty vote predicts 0


def test_a_tie_predicts_zero() -> None:
    learner = learners.make("halving", features=["a"], rules=[["a"], ["!a"]])
    assert learner.predict(["a"]) == 0 and learner.predict([]) == 0
    assert Halving.changes_only_on_update is False


# -- state and parameters ---------------------------------------------------------------------


@pytest.mark.parametrize("name", sorted(CLASSES))
@pytest.mark.parametrize("size", [10**8, 120])
def test_state_round_trip_continues_exactly(name: str, size: int) -> None:
    rules = CLASSES[name]
    rng = np.random.default_rng(5)
    vocab = [f"f{i}" for i in range(100)]
    items = [[f for f in vocab[:12] if rng.random() < 0.4] for _ in range(120)]
    labels = [int(holds(["f1"], set(item)) != (rng.random() < 0.05)) for item in items]
    whole = learners.make("halving", features=size, rules=rules)
    half = learners.make("halving", features=size, rules=rules)
    for item, label in zip(items[:7], labels[:7], strict=True):
        whole.learn(item, label)
        half.learn(item, label)
    resumed = learners.from_state(json.loads(json.dumps(half.to_state(), allow_nan=False)))
    for item, label in zip(items[7:], labels[7:], strict=True):
        assert resumed.predict(item) == whole.predict(item)
        assert resumed.learn(item, label) == whole.learn(item, label)
    assert (resumed.updates, resumed.contradicted) == (whole.updates, whole.contradicted)
    assert resumed.ceiling() == whole.ceiling()
    assert resumed.to_state() == whole.to_state()


@pytest.mark.parametrize(
    ("rules", "field"),
    [
        ("a", "rules"),
        ([], "rules"),
        (["a"], "rules[0]"),
        ([[], ["a", "true"]], "rules[1][1]"),
        ([["a"], ["!!b"]], "rules[1][0]"),
        ([["a"], [3]], "rules[1][0]"),
        ([["a"], 7], "rules[1]"),
        ([["a", "!b"], ["!b", "a"]], "rules[1]"),
        ([[], "true"], "rules[1]"),
    ],
)
def test_bad_rules_are_named(rules: Any, field: str) -> None:
    with pytest.raises(learners.ParameterError) as caught:
        learners.make("halving", features=10, rules=rules)
    assert caught.value.field == field
    assert field in str(caught.value)


def test_rule_on_a_flag_outside_a_closed_space_is_named() -> None:
    with pytest.raises(learners.ParameterError, match="'zz'") as caught:
        learners.make("halving", features=["a", "b"], rules=[["a"], ["b", "!zz"]])
    assert caught.value.field == "rules[1]"


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"names": "abc"}, "names"),
        ({"names": ["a", "a"]}, "names"),
        ({"names": ["a", "!b"]}, "names[1]"),
        ({"names": ["a", ""]}, "names[1]"),
        ({"names": ["a"], "exact": 2}, "exact"),
        ({"names": ["a"], "max_literals": -1}, "max_literals"),
        ({"names": ["a"], "exact": 1, "max_literals": 1}, "exact"),
        ({"names": ["a"], "negations": "yes"}, "negations"),
    ],
)
def test_bad_class_parameters_are_named(kwargs: dict[str, Any], field: str) -> None:
    with pytest.raises(learners.ParameterError) as caught:
        conjunctions(**kwargs)
    assert caught.value.field == field


@pytest.mark.parametrize("name", ["all-5", "literals-over-200"])
def test_truth_kept_for_the_last_item_is_dropped_when_rules_are_pruned(name: str) -> None:
    # The learner keeps which survivors hold on the last item so that learning the item it just
    # predicted does not evaluate them again; any pruning must drop it. Every item comes twice in a
    # row as one encoded object (predict, learn, predict, learn): the run must still match halving
    # from its definition (Angluin 1988) on the doubled stream.
    rules = CLASSES[name]
    rng = np.random.default_rng(21)
    names = [f"f{i}" for i in range(5)]
    items = [[f for f in names if rng.random() < 0.5] for _ in range(60)]
    labels = [int(rng.random() < 0.5) for _ in items]
    learner = learners.make("halving", features=10**6, rules=rules)
    preds = predict_learn_twice(learner, items, labels)
    doubled = [item for item in items for _ in range(2)]
    ref_preds, ref_mistakes, ref_alive = reference(
        rules, doubled, [y for y in labels for _ in range(2)]
    )
    assert preds == ref_preds
    assert learner.mistakes == ref_mistakes
    assert learner.ceiling().implied["surviving_rules"] == ref_alive
    # The check has teeth: pruning turns the answer on the repeat at least once.
    assert any(a != b for a, b in zip(preds[::2], preds[1::2], strict=True))
