"""Helpers shared by the tests of the linear learners (perceptron, passive-aggressive).

Reference data: the breast-cancer rows bundled inside scikit-learn's wheel (no download). Streams:
separable by construction, with a planted unit vector and a known margin.
"""

from __future__ import annotations

import json
from typing import Any, TypeVar

import numpy as np
from hypothesis import assume
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer

import learners
from learners.features import Encoded, FeatureSpace
from learners.linear import LinearLearner

L = TypeVar("L", bound=LinearLearner)


def breast_cancer() -> tuple[list[str], np.ndarray, np.ndarray]:
    """The 569 x 30 real-valued rows that ship inside scikit-learn's wheel (no download)."""
    data = load_breast_cancer()
    return [str(n) for n in data.feature_names], data.data, data.target


def standardized() -> tuple[list[str], np.ndarray, np.ndarray]:
    """Breast-cancer rows scaled per column (mean 0, sd 1): |x|^2 is near 30, so C = 0.01 clips."""
    names, X, y = breast_cancer()
    return names, (X - X.mean(axis=0)) / X.std(axis=0), y


def encoded(space: FeatureSpace, names: list[str], X: np.ndarray) -> list[Encoded]:
    return [space.encode(dict(zip(names, row, strict=True))) for row in X]


def as_vector(weights: dict[str, float], names: list[str]) -> np.ndarray:
    return np.array([weights.get(name, 0.0) for name in names])


@st.composite
def separable_stream(draw: Any) -> dict[str, Any]:
    """Items with a planted unit vector u (bias included) and a margin; an adversarial order."""
    seed = draw(st.integers(0, 2**32 - 1))
    d = draw(st.integers(1, 6))
    bias = draw(st.sampled_from([None, 1.0, 0.5]))
    size = draw(st.integers(1, 50))
    scale = draw(st.floats(0.2, 5.0))
    gamma = draw(st.floats(0.01, 0.4)) * scale
    order = draw(st.sampled_from(["given", "hardest_first", "alternating", "hardest_repeated"]))
    epochs = draw(st.integers(1, 3))
    rng = np.random.default_rng(seed)
    dim = d + (bias is not None)
    u = rng.normal(size=dim)
    u /= np.linalg.norm(u)
    X = rng.uniform(-scale, scale, size=(40 * size, d))
    aug = X if bias is None else np.hstack([X, np.full((len(X), 1), bias)])
    m = aug @ u
    keep = np.flatnonzero(np.abs(m) >= gamma)[:size]
    assume(len(keep) > 0)
    X, m = X[keep], m[keep]
    by_margin = [int(i) for i in np.argsort(np.abs(m))]
    if order == "hardest_first":
        rank = by_margin
    elif order == "alternating":  # the hardest positive, the hardest negative, and so on
        pos = [i for i in by_margin if m[i] > 0]
        neg = [i for i in by_margin if m[i] < 0]
        rank = [i for k in range(max(len(pos), len(neg))) for i in pos[k : k + 1] + neg[k : k + 1]]
    elif order == "hardest_repeated":
        rank = by_margin[:1] * 10 + list(range(len(m)))
    else:
        rank = list(range(len(m)))
    rows = [
        ({f"x{j}": float(v) for j, v in enumerate(X[i])}, int(m[i] > 0))
        for _ in range(epochs)
        for i in rank
    ]
    # The true margin of u, a hair below so that rounding in R and gamma cannot turn an exact
    # tie into a false failure.
    margin = float(np.min(np.abs(m))) * (1 - 1e-9)
    return {"rows": rows, "bias": bias, "margin": margin, "d": d}


def resume_midway(
    cls: type[L], kind: str, params: dict[str, Any], cut: int, rows: int = 240
) -> tuple[L, L]:
    """Learn the first ``rows`` standardized rows twice: once straight through, once stopping after
    ``cut`` rows for a JSON round trip of the state. Check that both agree on every later
    prediction, update and count, and on the final weights and ceiling; return (resumed, whole).
    """
    names, X, y = standardized()
    stream = [(dict(zip(names, X[t], strict=True)), int(y[t])) for t in range(rows)]
    whole = learners.make(kind, features=64, **params)
    half = learners.make(kind, features=64, **params)
    for item, label in stream[:cut]:
        whole.learn(item, label)
        half.learn(item, label)
    resumed = learners.from_state(json.loads(json.dumps(half.to_state(), allow_nan=False)))
    assert isinstance(resumed, cls) and isinstance(whole, cls)
    for item, label in stream[cut:]:
        assert resumed.predict(item) == whole.predict(item)
        assert resumed.learn(item, label) == whole.learn(item, label)
    assert (resumed.examples, resumed.mistakes, resumed.updates) == (
        whole.examples,
        whole.mistakes,
        whole.updates,
    )
    assert resumed.weights() == whole.weights()
    assert resumed.ceiling() == whole.ceiling()
    return resumed, whole
