"""Checks every learner must pass, written once and run over every kind in the registry."""

from __future__ import annotations

import json
import subprocess
import sys
from typing import Any

import numpy as np
import pytest

import learners

FLAGS = [f"f{i}" for i in range(8)]

# Every kind with the variants the shared checks run. A new kind must add itself here.
CONFIGS: dict[str, list[dict[str, Any]]] = {
    "elimination": [{}, {"negations": True}],
    "halving": [{"rules": [[], ["f0"], ["f0", "!f3"], ["!f1"], ["f2", "f5"], ["f7"]]}],
    "perceptron": [
        {"variant": "classic"},
        {"variant": "margin", "tau": 0.5, "eta": 0.25},
        {"variant": "margin", "tau": 0.5, "eta": 0.25, "margin": 0.2},
        {"variant": "averaged"},
        {"variant": "voted"},
        {"variant": "classic", "bias": None, "margin": 0.1},
    ],
    "passive-aggressive": [
        {"variant": "pa"},
        {"variant": "pa1", "aggressiveness": 0.5},
        {"variant": "pa2", "aggressiveness": 0.5, "bias": 1.0},
        {"variant": "pa1", "margin": 0.25},
    ],
    "winnow": [
        {"variant": "winnow2"},
        {"variant": "winnow1", "relevant": 2},
        {"variant": "balanced"},
        {"variant": "winnow2", "target": "conjunction", "relevant": 2},
    ],
    "weighted-majority": [
        {},
        {"beta": 0.0},
        {"rules": ["f0", "!f3", "true", "false", "f5"], "beta": 0.3},
    ],
}

CASES = [
    pytest.param(kind, params, id=f"{kind}-{i}")
    for kind, variants in CONFIGS.items()
    for i, params in enumerate(variants)
    if kind in learners.KINDS
]


def stream(seed: int, length: int) -> list[tuple[dict[str, float], int]]:
    """A noisy stream over eight flags and one signal in [0, 1]; the label is f0 and not f3."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(length):
        on = [f for f in FLAGS if rng.random() < 0.4]
        item: dict[str, float] = {f: 1.0 for f in on}
        item["signal"] = round(float(rng.random()), 3)
        label = int("f0" in on and "f3" not in on)
        if rng.random() < 0.05:
            label = 1 - label
        out.append((item, label))
    return out


def test_every_registered_kind_has_shared_checks() -> None:
    assert set(learners.KINDS) <= set(CONFIGS), "add the new kind to CONFIGS"


@pytest.mark.parametrize(("kind", "params"), CASES)
def test_state_round_trip_continues_exactly(kind: str, params: dict[str, Any]) -> None:
    data = stream(seed=7, length=300)
    whole = learners.make(kind, features=50, **params)
    half = learners.make(kind, features=50, **params)
    for item, label in data[:137]:
        whole.learn(item, label)
        half.learn(item, label)
    text = json.dumps(half.to_state(), allow_nan=False)  # plain JSON-safe data, no NaN
    resumed = learners.from_state(json.loads(text))
    assert type(resumed) is type(whole)
    for item, label in data[137:]:
        assert resumed.predict(item) == whole.predict(item)
        assert resumed.learn(item, label) == whole.learn(item, label)
    for attr in ("examples", "mistakes", "updates", "contradicted"):
        assert getattr(resumed, attr) == getattr(whole, attr)
    assert resumed.ceiling() == whole.ceiling()
    assert resumed.to_state() == whole.to_state()


@pytest.mark.parametrize(("kind", "params"), CASES)
def test_learning_a_label_known_to_be_predicted_ends_where_learning_it_does(
    kind: str, params: dict[str, Any]
) -> None:
    # A stream tells a learner whose prediction changes only at updates that its vote stands
    # (learn_checked(right=True), service.streams), so it may skip computing the prediction.
    # On every label it predicts, the hint must change nothing in the outcome: the same
    # (wrong, updated), the same state, the same next predictions.
    space = learners.FeatureSpace(50)  # shared, as in a stream's panel
    hinted = learners.make(kind, features=space, **params)
    plain = learners.make(kind, features=space, **params)
    right = 0
    for item, label in stream(seed=21, length=300):
        enc = plain.encode(item)
        hint = plain.changes_only_on_update and plain.predict(enc) == label
        right += hint
        assert hinted.learn_checked(enc, label, right=hint) == plain.learn_checked(enc, label)
        assert hinted.to_state() == plain.to_state()
    if plain.changes_only_on_update:
        assert right > 50  # the stream exercised the hint


@pytest.mark.parametrize(("kind", "params"), CASES)
@pytest.mark.parametrize("flags_only", [False, True])
def test_ceiling_value_and_counts_agree_with_ceiling_after_every_label(
    kind: str, params: dict[str, Any], flags_only: bool
) -> None:
    # The cheap per-label read (ceiling_value, counts) must be the very number and the very count
    # that the full ceiling() reports, at every step, also after a restore. flags_only drops the
    # [0, 1] signal, so that Winnow's ceiling stays claimed (a fractional update withdraws it).
    data = stream(seed=13, length=160)
    if flags_only:
        data = [({k: v for k, v in item.items() if k != "signal"}, y) for item, y in data]
    learner = learners.make(kind, features=50, **params)

    def agree(learner: learners.Learner) -> None:
        ceiling = learner.ceiling()
        assert learner.ceiling_value() == ceiling.value
        assert learner.counts == ceiling.counts
        assert learner.counted == (
            learner.updates if ceiling.counts == "updates" else learner.mistakes
        )
        assert learner.standing() == learners.standing(
            learner.counted, ceiling, learner.contradicted
        )

    agree(learner)
    for i, (item, label) in enumerate(data):
        learner.learn(item, label)
        agree(learner)
        if i == 80:
            learner = learners.from_state(json.loads(json.dumps(learner.to_state())))
            agree(learner)


@pytest.mark.parametrize(("kind", "params"), CASES)
def test_counts_and_ceiling_are_well_formed(kind: str, params: dict[str, Any]) -> None:
    learner = learners.make(kind, features=50, **params)
    for item, label in stream(seed=3, length=200):
        updated = learner.learn(item, label)
        assert isinstance(updated, bool)
        assert learner.predict(item) in (0, 1)
    assert 0 <= learner.mistakes <= learner.examples == 200
    assert 0 <= learner.updates <= learner.examples
    ceiling = learner.ceiling()
    assert ceiling.counts in ("updates", "mistakes")
    assert ceiling.value is None or ceiling.value >= 0
    assert ceiling.formula and ceiling.assumption and ceiling.source
    assert learner.standing() in ("within", "near", "exceeded", "contradicted")
    json.dumps(ceiling.to_dict(), allow_nan=False)


@pytest.mark.parametrize(("kind", "params"), CASES)
@pytest.mark.parametrize(
    ("item", "label", "error"),
    [
        ({"f0": 1.0}, 2, learners.LabelError),
        ({"f0": 1.0}, "1", learners.LabelError),
        ({"f0": 1.0}, None, learners.LabelError),
        ({"f0": float("nan"), "new_flag": 1.0}, 1, learners.FeatureError),
        ({"f0": float("inf")}, 0, learners.FeatureError),
        ({"f0": "1"}, 1, learners.FeatureError),
        (["f0", "f0"], 1, learners.FeatureError),
        ("f0", 1, learners.FeatureError),
    ],
)
def test_bad_input_is_refused_and_changes_nothing(
    kind: str, params: dict[str, Any], item: Any, label: Any, error: type[Exception]
) -> None:
    learner = learners.make(kind, features=50, **params)
    for good, y in stream(seed=5, length=40):
        learner.learn(good, y)
    before = json.dumps(learner.to_state(), sort_keys=True)
    with pytest.raises(error) as caught:
        learner.learn(item, label)
    assert caught.value.field  # names the field
    assert caught.value.rule  # and the rule
    assert json.dumps(learner.to_state(), sort_keys=True) == before


@pytest.mark.parametrize(("kind", "params"), CASES)
def test_memory_follows_features_seen(kind: str, params: dict[str, Any]) -> None:
    # DESIGN.md: a stream with n = 10^8 must be cheap. The state of a learner on a space of 10^8
    # declared features stays the size of what it has seen.
    learner = learners.make(kind, features=10**8, **params)
    for item, label in stream(seed=11, length=200):
        learner.learn(item, label)
    assert len(learner.space) <= len(FLAGS) + 1
    assert len(json.dumps(learner.to_state())) < 50_000


def test_closed_space_refuses_unknown_feature() -> None:
    learner = learners.make("elimination", features=["a", "b"])
    with pytest.raises(learners.FeatureError, match="'zz'") as caught:
        learner.predict({"a": 1, "zz": 1})
    assert caught.value.field == "features.zz"


def test_open_space_refuses_past_its_size_without_admitting() -> None:
    learner = learners.make("elimination", features=2)
    learner.predict(["a"])
    with pytest.raises(learners.FeatureError, match="full"):
        learner.predict(["a", "b", "c"])
    assert learner.space.names == ["a"]


def test_unknown_kind_and_parameter_are_named() -> None:
    with pytest.raises(learners.ParameterError, match="'nope'"):
        learners.make("nope", features=3)
    with pytest.raises(learners.ParameterError, match="'colour'") as caught:
        learners.make("elimination", features=3, colour=1)
    assert caught.value.field == "colour"


def test_learners_import_no_web_sql_or_metrics_module() -> None:
    # STYLE.md: learners/ is pure (standard library and numpy only).
    code = "import sys, learners; print('\\n'.join(sorted(sys.modules)))"
    loaded = set(
        subprocess.run(
            [sys.executable, "-c", code], check=True, capture_output=True, text=True
        ).stdout.split()
    )
    assert "learners.elimination" in loaded  # the check sees what got loaded
    for banned in (
        "fastapi",
        "starlette",
        "sqlite3",
        "prometheus_client",
        "pydantic",
        "httpx",
        "service",
        "sklearn",
        "scipy",
    ):
        assert banned not in loaded, banned
