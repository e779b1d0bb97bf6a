"""Helpers shared by the learner tests that feed streams in special orders."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from learners import Learner


def predict_learn_twice(learner: Learner, items: Sequence[Any], labels: Sequence[int]) -> list[int]:
    """Encode each item once and send that same object twice (predict, learn, predict, learn).

    A learner that keeps what it read for the last item must drop it when it updates; the answers
    returned here are compared with a reference run on the doubled stream.
    """
    preds: list[int] = []
    for item, label in zip(items, labels, strict=True):
        enc = learner.space.encode(item)
        for _ in range(2):
            preds.append(learner.predict(enc))
            learner.learn(enc, label)
    return preds
