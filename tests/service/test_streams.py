"""A stream's fast paths give what the plain definitions give.

Item prints are stored in snapshots, so their fast forms (one item, a batch as arrays) must equal
their definition, and the text digests of earlier states must still be read; answers and
outcomes share read-only views of the votes, which must still say what the contract says.
"""

from __future__ import annotations

import hashlib
import json
import random
import struct
from collections.abc import Mapping
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import learners
from service.errors import Conflict
from service.streams import BATCH_AT_ONCE, ItemError, Stream, fingerprint
from tests.service.harness import with_text_prints

NAMES = st.text(min_size=1, max_size=12)
VALUES = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False),
    st.integers(min_value=-(10**20), max_value=10**20),
    st.sampled_from([0, 0.0, -0.0, 1, 1.0, True]),
)


def defined_digest(features: Any) -> str:
    """The digest as defined (and as stored by earlier versions): blake2b, 12 bytes, of the
    standard library's ``json.dumps`` of the sorted (name, value) pairs with non-zero values."""
    if isinstance(features, Mapping):
        pairs = sorted((str(k), float(v)) for k, v in features.items() if v != 0)
    else:
        pairs = sorted((str(k), 1.0) for k in features)
    # Reference: Python's standard library (hashlib.blake2b, json.dumps).
    return hashlib.blake2b(json.dumps(pairs).encode(), digest_size=12).hexdigest()


@settings(max_examples=300, deadline=None)
@given(st.one_of(st.lists(NAMES, unique=True), st.dictionaries(NAMES, VALUES)))
def test_the_digest_is_the_defined_one(features: Any) -> None:
    assert fingerprint(features) == defined_digest(features)


def test_the_digest_is_the_defined_one_for_unusual_items() -> None:
    items: list[Any] = [
        [],
        {},
        {"a": float("nan")},
        {"a": float("inf"), "b": float("-inf")},
        {"nan]": 1.5},
        ["é", "\u2028", 'q"', "\\"],
        ("a", "b"),
        [3, "a"],
        {7: 2.0},
    ]
    for item in items:
        assert fingerprint(item) == defined_digest(item), item
    # DESIGN.md (Features): a flag is 1, absent means 0.
    assert fingerprint(["b", "a"]) == fingerprint({"a": 1, "b": 1.0, "c": 0})


# splitmix64's output function (Steele, Lea and Flood, "Fast splittable pseudorandom number
# generators", OOPSLA 2014; the constants of its published reference code): from memory.
def splitmix_finish(x: int) -> int:
    x = ((x ^ (x >> 30)) * 0xBF58476D1CE4E5B9) % 2**64
    x = ((x ^ (x >> 27)) * 0x94D049BB133111EB) % 2**64
    return x ^ (x >> 31)


def defined_print(features: Any) -> int:
    """An item's print as defined (service/streams.py, "item prints"): the sum modulo 2**64,
    over the non-zero entries, of the name's blake2b digest (8 bytes, little-endian) for a value
    of 1, else of that digest xor the value's IEEE 754 bits, mixed by splitmix64's output
    function."""
    if isinstance(features, Mapping):
        pairs = [(k, float(v)) for k, v in features.items() if v != 0]
    else:
        pairs = [(k, 1.0) for k in features]
    total = 0
    for name, value in pairs:
        # Reference: Python's standard library (hashlib.blake2b, struct).
        raw = hashlib.blake2b(name.encode("utf-8", "surrogatepass"), digest_size=8).digest()
        digest = int.from_bytes(raw, "little")
        if value != 1.0:
            digest = splitmix_finish(digest ^ struct.unpack("<Q", struct.pack("<d", value))[0])
        total += digest
    return total % 2**64


FINITE = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False, min_value=-1e9, max_value=1e9),
    st.sampled_from([0, 0.0, 1, 1.0, True, 0.5, -1.0]),
)
ITEM = st.one_of(
    st.lists(NAMES, unique=True, max_size=8), st.dictionaries(NAMES, FINITE, max_size=8)
)


@settings(max_examples=150, deadline=None)
@given(st.lists(ITEM, min_size=1, max_size=3 * BATCH_AT_ONCE))
def test_prints_are_the_defined_sum_one_by_one_and_in_batches(items: list[Any]) -> None:
    """The prints kept for labelled examples, whether computed item by item or over a batch's
    arrays, and the print of an item not encoded yet, all equal the definition."""
    one, many = (
        Stream(
            stream_config([{"name": "p", "kind": "perceptron", "params": {}}], "p", features=10**4),
            0.0,
            history_points=10,
            max_remembered=10**4,
        )
        for _ in range(2)
    )
    for k, item in enumerate(items):
        one.apply_examples(1.0, [(f"i{k}", item, k % 2)])
    many.apply_examples(1.0, [(f"i{k}", item, k % 2) for k, item in enumerate(items)])
    for k, item in enumerate(items):
        expected = defined_print(item)
        assert one.resolved[f"i{k}"].fp == many.resolved[f"i{k}"].fp == expected, item
        assert many._print_of(item) == expected
    # DESIGN.md (Features): a flag is 1, absent means 0; the form does not matter.
    assert one._print_of(["b", "a"]) == one._print_of({"a": 1, "b": 1.0, "c": 0})


def test_a_state_with_text_prints_still_tells_repeats_from_conflicts() -> None:
    """A state of version 1 (text digests) restores; its remembered and waiting ids answer a
    repeat as a duplicate and other features as a conflict."""
    stream = two_learner_stream(("e", "p"))
    items = {f"i{n}": [f"f{n % 7}", f"f{(n + 3) % 11}"] for n in range(40)}
    waiting = list(items.items())[:20]
    stream.apply_predict(1.0, waiting)
    stream.apply_feedback(2.0, [(item_id, 1) for item_id, _ in waiting[:10]])
    examples = [(item_id, features, 0) for item_id, features in list(items.items())[20:]]
    stream.apply_examples(3.0, examples)
    state = json.loads(json.dumps(stream.to_state()))
    with_text_prints(state, items.__getitem__)
    old = Stream.from_state(state, history_points=50, max_remembered=1000)
    assert all(isinstance(r.fp, str) for r in old.resolved.values())
    for probe in (old, stream):
        again = probe.apply_predict(4.0, waiting[5:15])  # labelled ones and waiting ones
        assert all(answer["duplicate"] for answer in again)
        repeats = probe.apply_examples(4.0, examples[:5])
        assert {r["status"] for r in repeats} == {"duplicate"}
        changes = [
            ("predict", ("i3", ["f3", "f9"])),
            ("predict", ("i14", {"f0": 0.5})),
            ("examples", ("i25", ["f4"], 0)),
        ]
        for kind, item in changes:
            apply = probe.apply_predict if kind == "predict" else probe.apply_examples
            with pytest.raises(ItemError) as refused:
                apply(5.0, [item])
            assert isinstance(refused.value.error, Conflict)


def stream_config(
    learners_: list[dict[str, Any]],
    serve: str,
    *,
    features: int = 6,
    wait: float = 1e9,
    policy: str = "keep",
) -> dict[str, Any]:
    """A stream's configuration as the registry stores it."""
    return {
        "stream": "s",
        "features": features,
        "learners": learners_,
        "serve": serve,
        "label_wait_seconds": wait,
        "on_exceed": policy,
        "near": 0.8,
        "webhook": None,
    }


ELIM_ONLY = [{"name": "elim", "kind": "elimination", "params": {}}]


def two_learner_stream(names: tuple[str, str]) -> Stream:
    config = {
        "stream": "s",
        "features": 50,
        "learners": [
            {"name": names[0], "kind": "elimination", "params": {}},
            {"name": names[1], "kind": "perceptron", "params": {}},
        ],
        "serve": names[1],
        "label_wait_seconds": 1000.0,
        "on_exceed": "keep",
        "near": 0.8,
        "webhook": None,
    }
    return Stream(config, 0.0, history_points=50, max_remembered=1000)


def test_answers_and_outcomes_say_what_the_contract_says() -> None:
    """Votes name each learner's vote; feedback ``wrong`` = its vote differed from the label
    (the HTTP contract); two learners make vote keys and outcome keys of the same length."""
    # DESIGN.md (Accounting): every learner predicts every item; served mistakes.
    rng = random.Random(3)
    stream = two_learner_stream(("e", "p"))
    other = two_learner_stream(("x", "y"))
    flags = [f"f{i}" for i in range(12)]
    items = [(f"i{n}", rng.sample(flags, 4)) for n in range(120)]
    answers = stream.apply_predict(1.0, items)
    assert [a["id"] for a in answers] == [i for i, _ in items]
    for answer in answers:
        assert set(answer["votes"]) == {"e", "p"}
        assert answer["label"] == answer["votes"]["p"] and answer["served_by"] == "p"
    labels = [rng.randint(0, 1) for _ in items]
    outcomes = stream.apply_feedback(2.0, [(i, y) for (i, _), y in zip(items, labels, strict=True)])
    for answer, outcome, y in zip(answers, outcomes, labels, strict=True):
        assert outcome["status"] == "applied"
        for name in ("e", "p"):
            assert outcome["learners"][name]["wrong"] == (answer["votes"][name] != y)
    updated = sum(o["learners"]["p"]["updated"] for o in outcomes)
    assert updated == stream.seats[1].learner.updates
    # Another stream's views carry its own names.
    assert set(other.apply_predict(1.0, items[:3])[0]["votes"]) == {"x", "y"}
    # Idempotent retries: common practice.
    # A repeated predict answers from the stored votes, marked as a duplicate.
    again = stream.apply_predict(3.0, items[:5])
    assert [a["votes"] for a in again] == [a["votes"] for a in answers[:5]]
    assert all(a["duplicate"] for a in again)


SKIP_PANEL = [
    {"name": "elim", "kind": "elimination", "params": {}},
    {"name": "elim-neg", "kind": "elimination", "params": {"negations": True}},
    {"name": "win", "kind": "winnow", "params": {}},
    {"name": "win-bal", "kind": "winnow", "params": {"variant": "balanced"}},
    {"name": "perc", "kind": "perceptron", "params": {}},
    {"name": "wm", "kind": "weighted-majority", "params": {}},
]


def panel_stream() -> Stream:
    config = stream_config(SKIP_PANEL, "elim")
    return Stream(config, 0.0, history_points=50, max_remembered=10**6)


def step_lists(kinds: list[str], largest: int, most: int) -> st.SearchStrategy[list[Any]]:
    """Lists of (what, how many, seed) steps for the stream tests."""
    return st.lists(
        st.tuples(
            st.sampled_from(kinds),
            st.integers(min_value=1, max_value=largest),
            st.integers(min_value=0, max_value=2**32 - 1),
        ),
        min_size=1,
        max_size=most,
    )


STEPS = step_lists(["predict", "feedback", "examples", "restore"], 6, 60)


@settings(max_examples=200, deadline=None)
@given(STEPS)
def test_the_panel_learns_as_each_learner_would_alone(steps: list[tuple[str, int, int]]) -> None:
    """A stream checks each item once for the panel, and tells a learner whose vote was right,
    with no update since, that its vote stands (``learn_checked(right=True)``). Across
    predictions labelled late and out of order, labelled examples in between, and restores
    from a snapshot, every learner must still end where the same learner run alone through the
    plain protocol (``predict``, then ``learn`` on each label in the stream's order) ends: the
    same counts and the same learned state, and the same per-label outcomes."""
    # The reference is the learners' own public protocol (learners.base: predict and learn),
    # with DESIGN.md's accounting: each label's "wrong" is the vote cast at predict time.
    stream = panel_stream()
    stream.at_once = stream.feedback_at_once = 1  # every batch at once, however small
    space = learners.FeatureSpace(6)
    alone = [learners.make(spec["kind"], features=space, **spec["params"]) for spec in SKIP_PANEL]
    flags = [f"f{i}" for i in range(6)]
    waiting: dict[str, tuple[Any, list[int], list[str]]] = {}
    count = 0
    t = 1.0
    for kind, size, seed in steps:
        rng = random.Random(seed)
        t += 1.0
        if kind == "restore":
            state = json.loads(json.dumps(stream.to_state()))
            stream = Stream.from_state(state, history_points=50, max_remembered=10**6)
            stream.at_once = stream.feedback_at_once = 1  # every batch at once, however small
            continue
        if kind == "feedback":
            ids = rng.sample(sorted(waiting), min(size, len(waiting)))
            labels = [rng.randint(0, 1) for _ in ids]
            outcomes = stream.apply_feedback(t, list(zip(ids, labels, strict=True)))
            for item_id, y, outcome in zip(ids, labels, outcomes, strict=True):
                enc, votes, _ = waiting.pop(item_id)
                for i, learner in enumerate(alone):
                    updated = learner.learn(enc, y)
                    name = SKIP_PANEL[i]["name"]
                    assert outcome["learners"][name] == {"wrong": votes[i] != y, "updated": updated}
            continue
        items = []
        for _ in range(size):
            count += 1
            items.append((f"i{count}", rng.sample(flags, rng.randint(0, 4))))
        if kind == "predict":
            answers = stream.apply_predict(t, items)
            for (item_id, features), answer in zip(items, answers, strict=True):
                enc = space.encode(features)
                votes = [learner.predict(enc) for learner in alone]
                assert [answer["votes"][spec["name"]] for spec in SKIP_PANEL] == votes
                waiting[item_id] = (enc, votes, features)
        else:
            labelled = [(item_id, f, rng.randint(0, 1)) for item_id, f in items]
            outcomes = stream.apply_examples(t, labelled)
            for (_, features, y), outcome in zip(labelled, outcomes, strict=True):
                enc = space.encode(features)
                for i, learner in enumerate(alone):
                    before = learner.mistakes
                    updated = learner.learn(enc, y)
                    wrong = learner.mistakes > before
                    name = SKIP_PANEL[i]["name"]
                    assert outcome["learners"][name] == {"wrong": wrong, "updated": updated}
    for seat, learner in zip(stream.seats, alone, strict=True):
        ours = seat.learner.to_state(include_space=False)
        assert ours == learner.to_state(include_space=False), seat.name


ALERT_PANEL = [
    {"name": "elim", "kind": "elimination", "params": {}},
    {"name": "elim-neg", "kind": "elimination", "params": {"negations": True}},
    {"name": "perc", "kind": "perceptron", "params": {"variant": "margin", "margin": 0.5}},
    {"name": "pa", "kind": "passive-aggressive", "params": {"variant": "pa1", "margin": 0.5}},
    {"name": "win", "kind": "winnow", "params": {"relevant": 1}},
    {"name": "wm", "kind": "weighted-majority", "params": {"beta": 0.5}},
    {"name": "wm0", "kind": "weighted-majority", "params": {"beta": 0.0}},
    {"name": "halving", "kind": "halving", "params": {"rules": [["f0"], ["f1"], ["!f2"]]}},
]

BATCH_STEPS = step_lists(["predict", "feedback", "examples"], 40, 25)


def seed_of(steps: list[tuple[str, int, int]]) -> int:
    return steps[0][2]


def noisy_label(features: list[str], rng: random.Random, noise: float) -> int:
    """f0 and not f2, flipped with probability ``noise``."""
    y = int("f0" in features and "f2" not in features)
    return 1 - y if rng.random() < noise else y


@settings(max_examples=60, deadline=None)
@given(BATCH_STEPS, st.sampled_from(["keep", "restart"]), st.floats(0.0, 0.5))
def test_a_skimmed_batch_leaves_the_ledger_of_one_item_at_a_time(
    steps: list[tuple[str, int, int]], policy: str, noise: float
) -> None:
    """Labelled batches are learned by skimming (``Learner.skim``: the items a learner surely
    gets right and keeps are passed in bulk, the standing read once after them). Against the
    same stream learning one item at a time, with small ceilings and noisy labels so that
    learners cross them, raise alerts and (policy restart) start new epochs mid-batch: the same
    answers, the same outcomes, the same alerts in the same order, the same stored state."""
    config = stream_config(ALERT_PANEL, "perc", policy=policy)
    skimming = Stream(config, 0.0, history_points=8, max_remembered=10**6)
    skimming.at_once = skimming.feedback_at_once = 1 + seed_of(steps) % 3  # small batches too
    single = Stream(config, 0.0, history_points=8, max_remembered=10**6)
    single.skim = False
    single.at_once = single.feedback_at_once = 10**9
    flags = [f"f{i}" for i in range(6)]
    waiting: list[str] = []
    count = 0
    t = 1.0
    for kind, size, seed in steps:
        rng = random.Random(seed)
        t += 1.0
        if kind == "feedback":
            ids = rng.sample(waiting, min(size, len(waiting)))
            ids += rng.sample(ids, min(2, len(ids))) + ["never-predicted"]  # repeats, unknown
            labels = [rng.randint(0, 1) for _ in ids]
            batch: list[Any] = list(zip(ids, labels, strict=True))
            waiting = [i for i in waiting if i not in set(ids)]
            outs = [s.apply_feedback(t, batch) for s in (skimming, single)]
        else:
            items = []
            for _ in range(size):
                count += 1
                items.append((f"i{count}", rng.sample(flags, rng.randint(0, 4))))
            if kind == "predict":
                outs = [s.apply_predict(t, items) for s in (skimming, single)]
                waiting += [item_id for item_id, _ in items]
            else:
                labelled = [(i, f, noisy_label(f, rng, noise)) for i, f in items]
                outs = [s.apply_examples(t, labelled) for s in (skimming, single)]
        assert outs[0] == outs[1]
        assert skimming.new_alerts == single.new_alerts
        assert skimming.to_state() == single.to_state()


EXPIRY_STEPS = step_lists(["predict", "feedback", "examples", "wait"], 30, 40)


@settings(max_examples=80, deadline=None)
@given(EXPIRY_STEPS)
def test_expiry_and_forgetting_follow_arrival_order(steps: list[tuple[str, int, int]]) -> None:
    """Waiting predictions expire oldest first once their wait ran out, and remembered ids are
    forgotten oldest first once past the wait or past the count bound, as the module docstring
    says; here against a plain model of those two rules (ordered lists), across labels that
    leave holes, ids reused after they are forgotten, and restores from a snapshot."""
    wait, bound = 10.0, 25
    config = stream_config(ELIM_ONLY, "elim", wait=wait)
    stream = Stream(config, 0.0, history_points=8, max_remembered=bound)
    waiting: list[tuple[str, float]] = []  # the model: (id, predicted at), in arrival order
    remembered: list[tuple[str, float]] = []  # (id, resolved at)
    t = 0.0
    ids = [f"i{k}" for k in range(40)]  # few ids: reused once forgotten

    def model_advance(now: float) -> None:
        while waiting and waiting[0][1] + wait <= now:
            item_id, at = waiting.pop(0)
            remembered.append((item_id, at + wait))
        while remembered and (remembered[0][1] + wait <= now or len(remembered) > bound):
            remembered.pop(0)

    for kind, size, seed in steps:
        rng = random.Random(seed)
        t += rng.choice([0.5, 1.0, 3.0])
        if kind == "wait":
            t += size
            stream.advance(t)
            model_advance(t)
        elif kind == "feedback":
            chosen = rng.sample([i for i, _ in waiting], min(size % 5, len(waiting)))
            model_advance(t)
            stream.apply_feedback(t, [(i, rng.randint(0, 1)) for i in chosen])
            for item_id in chosen:
                if item_id in dict(waiting):
                    waiting.remove((item_id, dict(waiting)[item_id]))
                    remembered.append((item_id, t))
            model_advance(t)
        else:
            model_advance(t)
            known = {i for i, _ in waiting} | {i for i, _ in remembered}
            fresh = [i for i in rng.sample(ids, min(size % 6 + 1, len(ids))) if i not in known]
            items = [(i, [f"f{rng.randint(0, 5)}"]) for i in fresh]
            if kind == "predict":
                stream.apply_predict(t, items)
                waiting += [(i, t) for i in fresh]
            else:
                stream.apply_examples(t, [(i, f, rng.randint(0, 1)) for i, f in items])
                remembered += [(i, t) for i in fresh]
            model_advance(t)
        if rng.random() < 0.2:
            state = json.loads(json.dumps(stream.to_state()))
            stream = Stream.from_state(state, history_points=8, max_remembered=bound)
        assert list(stream.pending) == [i for i, _ in waiting]
        assert list(stream.resolved) == [i for i, _ in remembered]


def test_labelled_predictions_leave_the_expiry_queue_short() -> None:
    # A label leaves its prediction's entry in the queue of waiting predictions; once such
    # entries outnumber the waiting ones (twice, plus 1024) the queue is rebuilt, in order.
    config = stream_config(ELIM_ONLY, "elim", wait=100.0)
    stream = Stream(config, 0.0, history_points=8, max_remembered=10**6)
    for k in range(30):
        stream.apply_predict(1.0 + k, [(f"p{k}-{j}", ["f0"]) for j in range(100)])
    stream.apply_feedback(50.0, [(f"p{k}-{j}", 1) for k in range(30) for j in range(99)])
    assert len(stream.pending) == 30
    assert len(stream._waiting) <= 2 * 30 + 1024  # rebuilt
    stream.advance(115.5)  # the predictions of t = 1 .. 15 expire, oldest first
    assert list(stream.pending) == [f"p{k}-99" for k in range(15, 30)]
    assert list(stream.resolved)[-15:] == [f"p{k}-99" for k in range(15)]
    assert stream.counts["expired"] == 15
