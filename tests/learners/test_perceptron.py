"""The perceptron family against scikit-learn, the Novikoff ceiling, worked counts and its state."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.linear_model import Perceptron as SkPerceptron
from sklearn.linear_model import SGDClassifier

import learners
from learners.features import FeatureSpace
from learners.perceptron import Perceptron
from tests.learners.linear_helpers import (
    as_vector,
    breast_cancer,
    encoded,
    resume_midway,
    separable_stream,
    standardized,
)

VARIANTS = ["classic", "margin", "averaged", "voted"]


# -- scikit-learn as the reference ---------------------------------------------------------------


def test_classic_matches_scikit_learn_perceptron_weight_for_weight() -> None:
    # Reference: THEORY.md "Reference implementations": scikit-learn's
    # Perceptron(eta0=1, penalty=None, shuffle=False), one dense row per partial_fit, applies
    # "update when y p <= 0, w += y x, intercept += y", the bias being a constant feature 1.
    # Exact equality holds: from w = 0 both add the same +-x_j to the same weights in the same
    # order, so the weights are the same floats as long as every update decision agrees, and no
    # score on these rows lies within rounding of 0.
    names, X, y = breast_cancer()
    space = FeatureSpace(names)
    ours = Perceptron(space)
    reference = SkPerceptron(eta0=1, penalty=None, shuffle=False)
    for t, enc in enumerate(encoded(space, names, X)):
        ours.learn(enc, int(y[t]))
        reference.partial_fit(X[t : t + 1], y[t : t + 1], classes=[0, 1])
        weights, intercept = ours.weights()
        assert np.array_equal(as_vector(weights, names), reference.coef_[0]), t
        assert intercept == reference.intercept_[0], t
    assert ours.updates > 100  # the comparison covered many updates, not a still start


def test_margin_variant_with_tau_one_matches_scikit_learn_hinge_sgd() -> None:
    # Reference: scikit-learn's SGDClassifier(loss="hinge", learning_rate="constant",
    # penalty=None) updates w += eta0 y x (and the intercept by eta0 y) whenever y p <= 1
    # (read in sklearn/linear_model/_sgd_fast.pyx.tp: Hinge(threshold=1), update = -eta * dloss),
    # which is the margin perceptron with tau = 1, eta = eta0. Exact for the reason above.
    names, X, y = breast_cancer()
    space = FeatureSpace(names)
    ours = Perceptron(space, variant="margin", tau=1.0, eta=0.5)
    reference = SGDClassifier(
        loss="hinge", learning_rate="constant", eta0=0.5, penalty=None, shuffle=False
    )
    for t, enc in enumerate(encoded(space, names, X)):
        ours.learn(enc, int(y[t]))
        reference.partial_fit(X[t : t + 1], y[t : t + 1], classes=[0, 1])
        weights, intercept = ours.weights()
        assert np.array_equal(as_vector(weights, names), reference.coef_[0]), t
        assert intercept == reference.intercept_[0], t


def test_averaged_matches_scikit_learn_averaged_sgd_without_bias() -> None:
    # Reference: SGDClassifier(loss="perceptron", average=True, learning_rate="constant", eta0=1,
    # penalty=None) gives as coef_ the mean of the post-step weights over every row seen (THEORY.md;
    # sklearn/utils/_weight_vector.pyx.tp add_average). Both keep the mean lazily in different
    # ways, so they agree to rounding: relative 1e-12 of the largest weight (seen: about 3e-15).
    names, X, y = breast_cancer()
    space = FeatureSpace(names)
    ours = Perceptron(space, variant="averaged", bias=None)
    reference = SGDClassifier(
        loss="perceptron",
        average=True,
        learning_rate="constant",
        eta0=1,
        penalty=None,
        shuffle=False,
        fit_intercept=False,
    )
    rows = encoded(space, names, X)
    for t, enc in enumerate(rows):
        ours.learn(enc, int(y[t]))
        reference.partial_fit(X[t : t + 1], y[t : t + 1], classes=[0, 1])
        weights, intercept = ours.weights()
        coef = reference.coef_[0]
        assert np.max(np.abs(as_vector(weights, names) - coef)) <= 1e-12 * np.max(np.abs(coef))
        assert intercept == 0.0
        if t + 1 < len(rows):
            # The served prediction is the averaged one: sklearn's decision on the next row.
            decision = float(reference.decision_function(X[t + 1 : t + 2])[0])
            if abs(decision) > 1e-9 * np.max(np.abs(coef)):
                assert ours.predict(rows[t + 1]) == int(decision > 0), t


def test_averaged_with_bias_matches_scikit_learn_fed_each_prefix_in_one_call() -> None:
    # Reference as above, with fit_intercept=True. Row-by-row partial_fit cannot serve here: in
    # scikit-learn 1.9 its averaged branch never stores the running (non-averaged) intercept between
    # calls (_fit_binary sets _standard_intercept only when not averaging), so each call restarts
    # the intercept at 0. One call over the first t rows keeps it, so each prefix is fed to a fresh
    # estimator in one call (max_iter=1, tol=None: one pass, no early stop).
    names, X, y = breast_cancer()
    X, y = X[:250], y[:250]
    space = FeatureSpace(names)
    ours = Perceptron(space, variant="averaged", bias=1.0)
    for t, enc in enumerate(encoded(space, names, X)):
        ours.learn(enc, int(y[t]))
        reference = SGDClassifier(
            loss="perceptron",
            average=True,
            learning_rate="constant",
            eta0=1,
            penalty=None,
            shuffle=False,
            max_iter=1,
            tol=None,
        )
        reference.partial_fit(X[: t + 1], y[: t + 1], classes=[0, 1])
        weights, intercept = ours.weights()
        coef = reference.coef_[0]
        assert np.max(np.abs(as_vector(weights, names) - coef)) <= 1e-12 * np.max(np.abs(coef))
        assert intercept == pytest.approx(reference.intercept_[0], rel=1e-12, abs=1e-12)


# -- the voted perceptron against a direct dense rendering of its definition -----------------------


def test_voted_matches_a_dense_rendering_of_the_definition() -> None:
    # Source: Freund and Schapire 1999, Machine Learning 37(3), the voted perceptron: keep every
    # hypothesis v_i with the number of rows c_i it survived; predict sign(sum c_i sign(v_i . x)).
    # The rendering keeps full dense copies; the learner keeps sparse deltas.
    names, X, y = standardized()
    X, y = X[:200], y[:200]
    space = FeatureSpace(names)
    ours = Perceptron(space, variant="voted", bias=1.0)
    hyps: list[np.ndarray] = [np.zeros(len(names) + 1)]
    counts = [0]
    mistakes = 0
    for t, enc in enumerate(encoded(space, names, X)):
        x = np.append(X[t], 1.0)
        s = 1 if y[t] else -1
        vote = sum(c * np.sign(v @ x) for v, c in zip(hyps, counts, strict=True))
        assert ours.predict(enc) == int(vote > 0), t
        mistakes += int(vote > 0) != y[t]
        if s * (hyps[-1] @ x) <= 0:
            hyps.append(hyps[-1] + s * x)
            counts.append(1)
        else:
            counts[-1] += 1
        ours.learn(enc, int(y[t]))
        assert ours.updates == len(hyps) - 1
    assert ours.mistakes == mistakes
    weights, intercept = ours.weights()  # voted: the current learning vector
    assert np.allclose(as_vector(weights, names), hyps[-1][:-1], rtol=1e-12, atol=1e-12)
    assert intercept == hyps[-1][-1]


# -- worked counts -------------------------------------------------------------------------------


def test_worked_example_by_hand() -> None:
    # From the update rule, by hand (bias None): w = 0; (3, 4) label 0 scores 0 -> update,
    # w = (-3, -4), a score of 0 predicts 0, so no served mistake. (1, 0) label 1 scores -3 ->
    # update and mistake, w = (-2, -4). R = 5 (the longest item), so the largest margin two
    # updates allow is R / sqrt(2) (Novikoff: updates <= (R / gamma)^2).
    learner = Perceptron(["x1", "x2"], bias=None)
    assert learner.learn({"x1": 3, "x2": 4}, 0) is True
    assert (learner.updates, learner.mistakes) == (1, 0)
    assert learner.learn({"x1": 1}, 1) is True
    assert (learner.updates, learner.mistakes) == (2, 1)
    assert learner.weights() == ({"x1": -2.0, "x2": -4.0}, 0.0)
    ceiling = learner.ceiling()
    assert ceiling.value is None
    assert ceiling.implied["R"] == 5.0
    assert ceiling.implied["max_margin"] == pytest.approx(5 / math.sqrt(2))
    assert learner.learn({"x1": 1}, 0) is False  # scores -2: right, no update
    # Declared margin 1 on the same stream: ceiling (5 / 1)^2 = 25; margin variant with
    # tau = 1, eta = 0.5: (25 + 2 * 1 / 0.5) / 1 = 29.
    declared = Perceptron(["x1", "x2"], bias=None, margin=1.0)
    declared.learn({"x1": 3, "x2": 4}, 0)
    assert declared.ceiling().value == 25.0
    margin = Perceptron(["x1", "x2"], variant="margin", tau=1.0, eta=0.5, bias=None, margin=1.0)
    margin.learn({"x1": 3, "x2": 4}, 0)
    assert margin.ceiling().value == 29.0


def test_bias_is_a_constant_feature_of_value_c() -> None:
    # From the rule, by hand: bias c = 2 adds a feature of value 2; the empty item (all 0) has
    # augmented norm 2 and, at w = 0, label 1: update, bias weight 2, intercept 2 * 2 = 4.
    learner = Perceptron(3, bias=2.0, margin=1.0)
    assert learner.learn([], 1) is True
    assert learner.weights() == ({}, 4.0)
    assert learner.predict([]) == 1
    assert learner.ceiling().implied["R"] == 2.0
    assert learner.ceiling().value == 4.0  # (R / gamma)^2
    assert learner.space.names == []  # the bias is not a name of the space


# -- the ceiling holds on separable streams ------------------------------------------------------


@settings(max_examples=80, deadline=None)
@given(
    stream=separable_stream(),
    variant=st.sampled_from(VARIANTS),
    tau=st.floats(0.0, 3.0),
    eta=st.floats(0.05, 3.0),
)
def test_updates_never_exceed_the_ceiling_on_separable_streams(
    stream: dict[str, Any], variant: str, tau: float, eta: float
) -> None:
    # Novikoff 1962 / Block 1962: updates <= (R / gamma)^2; margin variant
    # (R^2 + 2 tau / eta) / gamma^2 [derived, THEORY.md]; averaged and voted learn as classic.
    extra = {"tau": tau, "eta": eta} if variant == "margin" else {}
    features = [f"x{j}" for j in range(stream["d"])]
    learner = Perceptron(
        features, variant=variant, bias=stream["bias"], margin=stream["margin"], **extra
    )
    classic = Perceptron(features, bias=stream["bias"])
    c2 = 0.0 if stream["bias"] is None else stream["bias"] ** 2
    r2 = 0.0
    for item, label in stream["rows"]:
        learner.learn(item, label)
        classic.learn(item, label)
        r2 = max(r2, sum(v * v for v in item.values()) + c2)
        ceiling = learner.ceiling()
        assert ceiling.value is not None
        assert learner.updates <= ceiling.value
        assert learner.standing() != "exceeded"
        numerator = r2 + (2 * tau / eta if variant == "margin" else 0.0)
        assert ceiling.value == pytest.approx(numerator / stream["margin"] ** 2, rel=1e-9)
    if variant in ("averaged", "voted"):
        assert learner.updates == classic.updates  # they learn as the classic perceptron


def test_non_separable_stream_with_a_declared_margin_ends_exceeded() -> None:
    # XOR of two flags is no halfspace (common practice): every pass over the four items costs
    # the perceptron at least one update, so a declared margin's ceiling must be exceeded.
    xor = [(["a"], 1), (["b"], 1), (["a", "b"], 0), ([], 0)]
    for variant in VARIANTS:
        learner = Perceptron(["a", "b"], variant=variant, margin=0.5)
        assert learner.standing() != "exceeded"
        for _ in range(50):
            for item, label in xor:
                learner.learn(item, label)
        assert learner.ceiling().value == pytest.approx(12.0 if variant != "margin" else 20.0)
        assert learner.standing() == "exceeded", variant


# -- parameters, flags and state -----------------------------------------------------------------


@pytest.mark.parametrize(
    ("params", "field"),
    [
        ({"variant": "nope"}, "variant"),
        ({"variant": "margin", "eta": 0}, "eta"),
        ({"variant": "margin", "eta": -1.0}, "eta"),
        ({"variant": "margin", "tau": -1}, "tau"),
        ({"variant": "margin", "tau": float("nan")}, "tau"),
        ({"variant": "classic", "tau": 0.5}, "tau"),
        ({"variant": "averaged", "eta": 2.0}, "eta"),
        ({"margin": 0}, "margin"),
        ({"margin": -0.1}, "margin"),
        ({"margin": "0.1"}, "margin"),
        ({"bias": 0}, "bias"),
        ({"bias": True}, "bias"),
        ({"bias": float("inf")}, "bias"),
    ],
)
def test_bad_parameters_are_named(params: dict[str, Any], field: str) -> None:
    with pytest.raises(learners.ParameterError) as caught:
        learners.make("perceptron", features=3, **params)
    assert caught.value.field == field
    assert repr(field) in str(caught.value)
    assert caught.value.rule


def test_only_classic_and_margin_change_only_on_update() -> None:
    # THEORY.md, delays: the served ceiling needs predictions that move only at updates.
    flags = {v: Perceptron(3, variant=v).changes_only_on_update for v in VARIANTS}
    assert flags == {"classic": True, "margin": True, "averaged": False, "voted": False}
    assert Perceptron.changes_only_on_update is True  # the class default is left alone


def test_ceiling_texts_name_their_assumption_and_source() -> None:
    for variant in VARIANTS:
        ceiling = Perceptron(3, variant=variant, margin=0.2).ceiling()
        assert ceiling.counts == "updates"
        assert "gamma" in ceiling.formula and "margin" in ceiling.assumption
        assert "Novikoff 1962" in ceiling.source and "Block 1962" in ceiling.source
        if variant in ("averaged", "voted"):
            assert "Freund and Schapire 1999" in ceiling.source
            assert "no known worst-case" in ceiling.assumption


@pytest.mark.parametrize("variant", VARIANTS)
def test_state_round_trip_matches_an_uninterrupted_run(variant: str) -> None:
    # A JSON round trip after a prefix, then the rest: same predictions, counts and weights.
    extra = {"tau": 0.7, "eta": 0.3} if variant == "margin" else {}
    resumed, whole = resume_midway(Perceptron, "perceptron", {"variant": variant, **extra}, cut=97)
    assert resumed.updates > 0 and resumed.variant == whole.variant == variant


def test_corrupt_state_is_refused_with_the_field_named() -> None:
    learner = Perceptron(["a", "b"], variant="voted")
    learner.learn(["a"], 1)
    state = json.loads(json.dumps(learner.to_state()))
    state["learned"]["w"]["idx"] = [7]
    with pytest.raises(learners.StateError) as caught:
        learners.from_state(state)
    assert caught.value.field == "learned.w.idx"
    state = json.loads(json.dumps(learner.to_state()))
    state["learned"]["deltas"]["sizes"] = [2]
    with pytest.raises(learners.StateError) as caught:
        learners.from_state(state)
    assert caught.value.field == "learned.deltas"
