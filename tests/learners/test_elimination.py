"""Elimination against worked counts and its own ceiling on adversarial streams."""

from __future__ import annotations

import itertools

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import learners
from learners.elimination import Elimination


def test_worked_count_monotone() -> None:
    # Worked by hand: target a & c over {a, b, c, d}. Start with all four flags.
    # 1) [a, b, c] label 1: predicted 0 (d is off) -> update, keep {a, b, c}.
    # 2) [a, c, d] label 1: predicted 0 (b is off) -> update, keep {a, c}.
    # 3) [a, c] label 1: predicted 1, no update. 4) [a] label 0: predicted 0, no update.
    learner = learners.make("elimination", features=["a", "b", "c", "d"])
    for item, label in [(["a", "b", "c"], 1), (["a", "c", "d"], 1), (["a", "c"], 1), (["a"], 0)]:
        learner.learn(item, label)
    assert learner.updates == 2
    assert learner.hypothesis() == ["a", "c"]
    # Live ceiling: M_so_far + |hypothesis| = 2 + 2 (derived in THEORY.md).
    assert learner.ceiling().value == 4


def test_false_positive_contradicts_monotone() -> None:
    learner = learners.make("elimination", features=["a", "b"])
    learner.learn(["a"], 1)  # hypothesis {a}
    assert learner.predict(["a", "b"]) == 1
    learner.learn(["a", "b"], 0)  # a false positive: no monotone conjunction labels this way
    assert learner.contradicted
    assert learner.standing() == "contradicted"


def test_negations_first_positive_leaves_n_literals() -> None:
    # THEORY.md: with negated literals the first positive example leaves exactly n literals.
    learner = Elimination(["a", "b", "c"], negations=True)
    assert learner.predict(["a"]) == 0  # all 2n literals: always false
    learner.learn(["a"], 1)
    assert learner.size() == 3
    assert sorted(learner.hypothesis()) == ["!b", "!c", "a"]


def all_items(names: list[str]) -> list[list[str]]:
    return [
        [n for n, bit in zip(names, bits, strict=True) if bit]
        for bits in itertools.product([0, 1], repeat=len(names))
    ]


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(min_value=1, max_value=7),
    data=st.data(),
)
def test_updates_within_ceiling_on_every_order(n: int, data: st.DataObject) -> None:
    # Realizable streams: the label is a conjunction of literals drawn by hypothesis; the items
    # come in an order hypothesis picks (it shrinks towards adversarial orders). The ceilings
    # M <= n (monotone) and M <= n + 1 (negations) are from THEORY.md (Valiant 1984; derived).
    names = [f"f{i}" for i in range(n)]
    negations = data.draw(st.booleans())
    signs = data.draw(
        st.lists(st.sampled_from([None, 1, 0] if negations else [None, 1]), min_size=n, max_size=n)
    )
    items = data.draw(st.permutations(all_items(names)))
    learner = learners.make("elimination", features=names, negations=negations)
    bound = n + 1 if negations else n
    for item in items:
        on = set(item)
        literals = zip(names, signs, strict=True)
        label = int(all(s is None or (f in on) == bool(s) for f, s in literals))
        learner.learn(item, label)
        assert not learner.contradicted
        assert learner.updates <= learner.ceiling().value <= bound


def test_open_space_memory_follows_seen_flags() -> None:
    learner = learners.make("elimination", features=10**8)
    learner.learn(["x1", "x2", "x3"], 1)
    learner.learn(["x1", "x3", "x9"], 1)
    assert learner.hypothesis() == ["x1", "x3"]
    assert len(learner.space) == 4  # only the names seen, never 10^8
    # Before any update the ceiling is n; after, M_so_far + |hypothesis|.
    assert learner.ceiling().value == 2 + 2


def test_parity_stream_ends_contradicted() -> None:
    # XOR of two flags is no conjunction: the stream must not end "within" (common practice).
    learner = learners.make("elimination", features=["a", "b"], negations=True)
    for _ in range(3):
        for item, label in [([], 0), (["a"], 1), (["b"], 1), (["a", "b"], 0)]:
            learner.learn(item, label)
    assert learner.standing() in ("exceeded", "contradicted")


@pytest.mark.parametrize("bad", [1, "yes", None])
def test_bad_negations_parameter(bad: object) -> None:
    with pytest.raises(learners.ParameterError, match="negations"):
        learners.make("elimination", features=3, negations=bad)
