"""Passive-aggressive learners against scikit-learn, their mistake ceilings and their state."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.linear_model import SGDClassifier

import learners
from learners.features import FeatureSpace
from learners.passive_aggressive import PassiveAggressive
from tests.learners.linear_helpers import (
    as_vector,
    encoded,
    resume_midway,
    separable_stream,
    standardized,
)

VARIANTS = ["pa", "pa1", "pa2"]


@pytest.mark.parametrize(
    ("variant", "C"),
    [("pa1", 0.01), ("pa1", 1.0), ("pa2", 0.01), ("pa2", 1.0), ("pa", None)],
)
def test_matches_scikit_learn_sgd_pa_weights_after_every_row(variant: str, C: float | None) -> None:
    # Reference: scikit-learn 1.9's SGDClassifier(loss="hinge", learning_rate="pa1"/"pa2",
    # eta0=C, penalty=None, fit_intercept=False): read in sklearn/linear_model/_sgd_fast.pyx.tp,
    # PA1: update = min(eta0, hinge / |x|^2), PA2: update = hinge / (|x|^2 + 0.5 / eta0), then
    # w += update * y * x; with penalty=None alpha is never used and nothing decays. There is no
    # C parameter on SGDClassifier: eta0 carries it. Plain PA is PA1 with an unreachable eta0.
    # Tolerance: both sum w . x and |x|^2 over the same terms in a different order (a Cython loop
    # in index order against numpy's blocked dot), so they differ in the last bits; relative
    # 1e-12 of the largest weight (seen: below 1e-15).
    names, X, y = standardized()
    space = FeatureSpace(names)
    ours = PassiveAggressive(space, variant=variant, aggressiveness=C)
    reference = SGDClassifier(
        loss="hinge",
        learning_rate="pa1" if variant == "pa" else variant,
        eta0=1e300 if C is None else C,
        penalty=None,
        fit_intercept=False,
        shuffle=False,
    )
    sign_errors = 0
    for t, enc in enumerate(encoded(space, names, X)):
        if t:
            sign_errors += int(reference.decision_function(X[t : t + 1])[0] > 0) != y[t]
        else:
            sign_errors += int(y[t] == 1)  # w = 0 scores 0: the negative class
        ours.learn(enc, int(y[t]))
        reference.partial_fit(X[t : t + 1], y[t : t + 1], classes=[0, 1])
        weights, intercept = ours.weights()
        coef = reference.coef_[0]
        assert np.max(np.abs(as_vector(weights, names) - coef)) <= 1e-12 * np.max(np.abs(coef))
        assert intercept == 0.0 == reference.intercept_[0]
    assert ours.mistakes == sign_errors
    assert ours.updates > ours.mistakes  # it also updates on right answers with hinge loss


def test_worked_example_by_hand() -> None:
    # From the PA rule (Crammer et al. 2006), by hand, one feature, no bias: w = 0; x = 1, label 1:
    # score 0 predicts 0 (a mistake), loss 1, tau = 1 / 1 -> w = 1. x = 0.5, label 1: score 0.5
    # is right but loss 0.5, tau = 0.5 / 0.25 = 2 -> w = 2. x = 3, label 1: score 6, no loss.
    learner = PassiveAggressive(["x"], variant="pa")
    assert learner.learn({"x": 1.0}, 1) is True
    assert learner.weights() == ({"x": 1.0}, 0.0)
    assert learner.learn({"x": 0.5}, 1) is True
    assert learner.weights() == ({"x": 2.0}, 0.0)
    assert learner.learn({"x": 3.0}, 1) is False
    assert (learner.mistakes, learner.updates) == (1, 2)
    ceiling = learner.ceiling()
    assert ceiling.counts == "mistakes"
    assert ceiling.value is None
    assert ceiling.implied == {"R": 3.0, "max_margin": 3.0}  # R / sqrt(mistakes)
    # PA-I with C = 0.25 clips the first step: tau = min(0.25, 1) -> w = 0.25.
    clipped = PassiveAggressive(["x"], variant="pa1", aggressiveness=0.25, margin=0.5)
    clipped.learn({"x": 1.0}, 1)
    assert clipped.weights() == ({"x": 0.25}, 0.0)
    assert clipped.ceiling().value == 16.0  # max(1, 1 / 0.25) / 0.5^2
    # PA-II: tau = 1 / (1 + 1 / (2 * 0.25)) = 1 / 3; ceiling (1 + 2) / 0.25 = 12.
    soft = PassiveAggressive(["x"], variant="pa2", aggressiveness=0.25, margin=0.5)
    soft.learn({"x": 1.0}, 1)
    assert soft.weights()[0]["x"] == pytest.approx(1 / 3)
    assert soft.ceiling().value == 12.0


def test_zero_item_without_bias_changes_nothing() -> None:
    learner = PassiveAggressive(["x"], variant="pa")
    assert learner.learn([], 1) is False
    assert (learner.mistakes, learner.updates) == (1, 0)
    assert learner.weights() == ({}, 0.0)


@settings(max_examples=80, deadline=None)
@given(stream=separable_stream(), variant=st.sampled_from(VARIANTS), C=st.floats(0.01, 10.0))
def test_mistakes_never_exceed_the_ceiling_on_separable_streams(
    stream: dict[str, Any], variant: str, C: float
) -> None:
    # Crammer et al. 2006, JMLR 7, realizable case with margin gamma: PA (R / gamma)^2,
    # PA-I max(R^2, 1 / C) / gamma^2, PA-II (R^2 + 1 / (2 C)) / gamma^2 [derived from its lemma].
    learner = PassiveAggressive(
        [f"x{j}" for j in range(stream["d"])],
        variant=variant,
        aggressiveness=None if variant == "pa" else C,
        bias=stream["bias"],
        margin=stream["margin"],
    )
    for item, label in stream["rows"]:
        learner.learn(item, label)
        ceiling = learner.ceiling()
        assert ceiling.value is not None
        assert learner.mistakes <= ceiling.value
        assert learner.standing() != "exceeded"


def test_non_separable_stream_with_a_declared_margin_ends_exceeded() -> None:
    # XOR of two flags is no halfspace (common practice): sign mistakes keep coming.
    xor = [(["a"], 1), (["b"], 1), (["a", "b"], 0), ([], 0)]
    for variant in VARIANTS:
        learner = PassiveAggressive(["a", "b"], variant=variant, bias=1.0, margin=0.5)
        for _ in range(50):
            for item, label in xor:
                learner.learn(item, label)
        assert learner.standing() == "exceeded", variant


@pytest.mark.parametrize(
    ("params", "field"),
    [
        ({"variant": "pa3"}, "variant"),
        ({"variant": "pa1", "aggressiveness": 0}, "aggressiveness"),
        ({"variant": "pa2", "aggressiveness": -1.0}, "aggressiveness"),
        ({"variant": "pa", "aggressiveness": 1.0}, "aggressiveness"),
        ({"margin": 0}, "margin"),
        ({"margin": float("nan")}, "margin"),
        ({"bias": -1.0}, "bias"),
    ],
)
def test_bad_parameters_are_named(params: dict[str, Any], field: str) -> None:
    with pytest.raises(learners.ParameterError) as caught:
        learners.make("passive-aggressive", features=3, **params)
    assert caught.value.field == field
    assert repr(field) in str(caught.value)


def test_ceiling_counts_mistakes_and_names_its_source() -> None:
    for variant in VARIANTS:
        learner = PassiveAggressive(3, variant=variant, margin=0.3)
        ceiling = learner.ceiling()
        assert ceiling.counts == "mistakes"
        assert "Crammer" in ceiling.source and "JMLR 7" in ceiling.source
        assert "not updates" in ceiling.assumption
        assert learner.changes_only_on_update is False


@pytest.mark.parametrize("variant", VARIANTS)
def test_state_round_trip_matches_an_uninterrupted_run(variant: str) -> None:
    resumed, _ = resume_midway(
        PassiveAggressive, "passive-aggressive", {"variant": variant, "bias": 0.5}, cut=101
    )
    assert math.isfinite(resumed.ceiling().implied["R"])
