"""Learning a batch by skimming (many items screened at once) ends exactly where learning it item
by item does: the same (wrong, updated) per item, the same state after every batch.

The reference is the learner's own one-item step (``learn_checked``), which the other test files
check against published counts and reference libraries; here only the equality matters, so the
streams are the shared noisy stream of ``test_protocol`` and streams built to sit on the
learners' thresholds (ties, where rounding would decide if the screen were not conservative).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

import learners
from learners.features import Rows
from tests.learners.test_protocol import CASES, stream

Outcome = tuple[bool, bool]


def skim_through(
    learner: learners.Learner, rows: Rows, ys: np.ndarray, stops: set[int]
) -> tuple[list[Outcome], int]:
    """Learn a batch as a stream does: skim up to the next item in ``stops`` (or the end),
    learn the item it stops at one by one, go on after it. Returns the outcomes and how many
    items were skimmed. Checks what skim promises over the items it passes."""
    out: list[Outcome] = []
    k, passed, n = 0, 0, len(rows)
    while k < n:
        stop = min([s for s in stops if s >= k], default=n)
        ceiling, contradicted, state = (
            learner.ceiling_value(),
            learner.contradicted,
            learner.updates,
        )
        j = learner.skim(rows, ys, k, stop)
        assert k <= j <= stop
        if j > k:
            passed += j - k
            out += [(False, False)] * (j - k)
            after = learner.ceiling_value()
            assert learner.contradicted == contradicted
            assert learner.updates == state
            if ceiling is not None:
                assert after is not None and after >= ceiling  # it never falls over passed items
        if j < n:
            out.append(learner.learn_checked(rows.encs[j], int(ys[j])))
        k = j + 1
    return out, passed


def compare(
    kind: str,
    params: dict[str, Any],
    data: list[tuple[Any, int]],
    seed: int,
    features: int | list[str] = 50,
) -> int:
    """Feed ``data`` in random batches to a skimming learner and item by item to another (one
    shared space, as on a panel); return how many items were skimmed."""
    rng = np.random.default_rng(seed)
    space = learners.FeatureSpace(features)
    plain = learners.make(kind, features=space, **params)
    skimmer = learners.make(kind, features=space, **params)
    passed = start = 0
    while start < len(data):
        size = int(rng.integers(1, 80))
        batch = data[start : start + size]
        start += size
        encs = [plain.encode(item) for item, _ in batch]
        ys = np.array([label for _, label in batch], dtype=np.int8)
        expected = [plain.learn_checked(enc, int(y)) for enc, y in zip(encs, ys, strict=True)]
        stops = {int(s) for s in rng.integers(0, len(batch), size=int(rng.integers(0, 3)))}
        got, skimmed = skim_through(skimmer, Rows(encs), ys, stops)
        assert got == expected
        assert skimmer.to_state() == plain.to_state()
        passed += skimmed
    return passed


@pytest.mark.parametrize(("kind", "params"), CASES)
@pytest.mark.parametrize("flags_only", [False, True])
def test_skimming_a_batch_ends_where_learning_item_by_item_does(
    kind: str, params: dict[str, Any], flags_only: bool
) -> None:
    data = stream(seed=5, length=1500)
    if flags_only:  # all values 1: the screens' flag path
        data = [({k: 1.0 for k in item if k != "signal"}, label) for item, label in data]
    passed = compare(kind, params, data, seed=11)
    probe = learners.make(kind, features=50, **params)
    if type(probe).skim is learners.Learner.skim and probe.skims():
        assert passed > 300, passed  # the stream exercised the screen, not only the fallback


def tie_stream(seed: int, length: int) -> list[tuple[dict[str, float], int]]:
    """Flags and values that are multiples of 1/4: with steps of 1/4 and 1/2 the scores land
    exactly on thresholds (0, tau, 1, theta) again and again."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(length):
        item: dict[str, float] = {}
        for i in range(6):
            if rng.random() < 0.5:
                item[f"f{i}"] = float(rng.integers(1, 5)) / 4.0
        label = int(item.get("f0", 0.0) + item.get("f1", 0.0) > item.get("f2", 0.0))
        out.append((item, label))
    return out


TIE_CASES = [
    ("perceptron", {"variant": "classic"}),
    ("perceptron", {"variant": "margin", "tau": 0.5, "eta": 0.25}),
    ("perceptron", {"variant": "margin", "tau": 1.0, "eta": 0.5, "bias": None}),
    ("passive-aggressive", {"variant": "pa"}),
    ("passive-aggressive", {"variant": "pa1", "aggressiveness": 0.5}),
    ("winnow", {"variant": "winnow2", "threshold": 1.0}),
    ("winnow", {"variant": "balanced", "threshold": 0.5}),
    ("weighted-majority", {"beta": 0.5}),
]


@pytest.mark.parametrize(("kind", "params"), TIE_CASES)
def test_skimming_on_exact_ties_ends_where_learning_item_by_item_does(
    kind: str, params: dict[str, Any]
) -> None:
    compare(kind, params, tie_stream(seed=3, length=2000), seed=4, features=6)


def test_weighted_majority_counts_passed_labels_one_by_one_beyond_its_bulk_limit(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # With many flags stored (past BULK_SCAN and BULK_RATIO times the entries), the passed
    # labels are counted one by one (a bulk count would rebuild a histogram of every stored
    # flag); both ways end in the same state.
    from learners import weighted_majority

    monkeypatch.setattr(weighted_majority, "BULK_SCAN", 0)
    monkeypatch.setattr(weighted_majority, "BULK_RATIO", 0)
    data = stream(seed=9, length=800)
    assert compare("weighted-majority", {}, data, seed=2) > 300


def test_elimination_screens_nothing_before_its_first_update() -> None:
    # Before the first positive it holds every literal; skim leaves those items to learn_checked.
    learner = learners.make("elimination", features=10)
    encs = [learner.encode(["a", "b"]), learner.encode(["a"])]
    assert learner.skim(Rows(encs), np.array([0, 0], dtype=np.int8), 0, 2) == 0
    learner.learn_checked(learner.encode(["a", "b"]), 1)
    assert learner.skim(Rows(encs), np.array([1, 0], dtype=np.int8), 0, 2) == 2
    assert learner.examples == 3


@pytest.mark.parametrize("negations", [False, True])
def test_elimination_keeps_its_masks_in_step_with_names_admitted_between_batches(
    negations: bool,
) -> None:
    # The masks skim reads are built once and then kept in step by each update; names the
    # space admits later (by another learner's items, or predictions) must be covered too.
    space = learners.FeatureSpace(100)
    plain = learners.make("elimination", features=space, negations=negations)
    skimmer = learners.make("elimination", features=space, negations=negations)
    rng = np.random.default_rng(8)
    for round_ in range(30):
        batch = []
        for _ in range(20):
            names = [f"a{i}" for i in range(3)] + [f"n{round_}-{i}" for i in range(2)]
            on = [name for name in names if rng.random() < 0.6]
            batch.append((on, int(all(f"a{i}" in on for i in range(2)))))
        encs = [space.encode(item) for item, _ in batch]
        ys = np.array([y for _, y in batch], dtype=np.int8)
        expected = [plain.learn_checked(enc, int(y)) for enc, y in zip(encs, ys, strict=True)]
        stops = {0, 7} if round_ % 2 else set()  # item 0 learned before any screen this batch
        assert skim_through(skimmer, Rows(encs), ys, stops)[0] == expected
        assert skimmer.to_state() == plain.to_state()


def assert_votes_agree(learner: learners.Learner, data: list[tuple[Any, int]], size: int) -> None:
    """Vote on each batch of ``size`` at once and item by item, then learn it item by item."""
    for start in range(0, len(data), size):
        batch = data[start : start + size]
        encs = [learner.encode(item) for item, _ in batch]
        assert learner.predict_rows(Rows(encs)) == [learner.predict_checked(e) for e in encs]
        for enc, (_, label) in zip(encs, batch, strict=True):
            learner.learn_checked(enc, label)


@pytest.mark.parametrize(("kind", "params"), CASES)
@pytest.mark.parametrize("flags_only", [False, True])
def test_votes_on_a_batch_are_the_votes_item_by_item(
    kind: str, params: dict[str, Any], flags_only: bool
) -> None:
    # predict_rows computes a batch's votes at once where it is sure of them and asks
    # predict_checked where rounding could decide; the votes must be the same.
    data = stream(seed=13, length=600)
    if flags_only:
        data = [({k: 1.0 for k in item if k != "signal"}, label) for item, label in data]
    assert_votes_agree(learners.make(kind, features=50, **params), data, 100)


@pytest.mark.parametrize(("kind", "params"), TIE_CASES)
def test_votes_on_exact_ties_are_the_votes_item_by_item(kind: str, params: dict[str, Any]) -> None:
    assert_votes_agree(learners.make(kind, features=6, **params), tie_stream(6, 1500), 50)


# Weights whose sum numpy (pairwise, eight at a time) and a running sum round differently: the
# first sums to 2.0 by numpy and to 0.0 running; the second to 0.0 and 4.0 (found by search).
ADVERSARIAL = [
    [-1e16, -1.0, 1.0, 1.0, 0.5, 1e16, -1e16, 1.0, 0.5, 1e16, 1.0, -1.0],
    [-1e16, 1.0, -1e16, 1e16, -1.0, -1.0, -1.0, 0.5, -1.0, 1e16, 3.0, 1.0],
]


@pytest.mark.parametrize("weights", ADVERSARIAL)
def test_a_vote_that_rounding_decides_is_asked_of_the_learner(weights: list[float]) -> None:
    # The screens sum in another order than the learner's own step; where the two could
    # disagree (a sum that cancels huge terms) the vote is not sure and the learner decides.
    names = [f"f{i}" for i in range(len(weights))]
    state = learners.make("perceptron", features=names, bias=None).to_state()
    state["learned"]["w"] = {"idx": list(range(len(weights))), "val": weights}
    plain = learners.from_state(state)
    skimmer = learners.from_state(state)
    enc = plain.encode(names)
    rows = Rows([enc, enc])
    assert plain.predict_rows(rows) == [plain.predict_checked(enc)] * 2
    for label in (0, 1):
        ys = np.array([label, label], dtype=np.int8)
        got, _ = skim_through(skimmer, rows, ys, set())
        assert got == [plain.learn_checked(enc, label) for _ in range(2)]
        assert skimmer.to_state() == plain.to_state()
