"""Passive-aggressive: learns a halfspace by the smallest weight change that fixes the hinge loss.

What it learns
    A halfspace over the numeric features: predict 1 when ``w . x + b c > 0`` and 0 otherwise
    (a score of exactly 0 is the negative class). ``bias=c`` adds a constant feature of value ``c``
    whose weight ``b`` is kept beside ``w``; the default ``bias=None`` has no bias (as
    scikit-learn's ``fit_intercept=False``). Below, ``x`` is the augmented item, ``s = +1`` for
    label 1 and ``-1`` for label 0, and ``loss = max(0, 1 - s (w . x))`` is the hinge loss at label
    time.

Update rule
    ``w`` starts at 0. On every item with ``loss > 0`` (a mistake, or a correct answer with margin
    below 1) ``w += tau s x`` with
    ``pa``: ``tau = loss / |x|^2`` (the new ``w`` is the closest one with zero loss on the item);
    ``pa1``: ``tau = min(C, loss / |x|^2)``; ``pa2``: ``tau = loss / (|x|^2 + 1 / (2 C))``, where
    ``C = aggressiveness > 0`` (default 1) limits how far one item can move ``w``. An item with
    ``|x| = 0`` cannot be fitted and changes nothing.

    Because it updates on correct but unconfident answers too, its ``updates`` exceed its
    ``mistakes``; its ceiling counts ``mistakes``: label-time sign errors. For the same reason the
    served ceiling under delayed labels, which needs the prediction to change only at counted
    events, does not apply (``changes_only_on_update`` is False).

Mistake ceiling (counts mistakes)
    Precondition: some unit vector ``u`` in the augmented space has ``s (u . x) >= gamma > 0`` on
    every labelled item, ``gamma`` the declared ``margin`` (realizable with margin gamma); ``R`` is
    the largest norm of an augmented item learned so far.
    ``pa``:  ``mistakes <= (R / gamma)^2``,
    ``pa1``: ``mistakes <= max(R^2, 1 / C) / gamma^2``,
    ``pa2``: ``mistakes <= (R^2 + 1 / (2 C)) / gamma^2``.
    Derivation [derived] from the paper's basic lemma: with ``v = u / gamma`` (so ``s v . x >= 1``
    and ``|v|^2 = 1 / gamma^2``) every item has zero loss under ``v``, and
    ``sum_t tau_t (2 loss_t - tau_t |x_t|^2) <= |v|^2``. A sign mistake has ``loss_t >= 1``.
    ``pa``: the term equals ``loss_t^2 / |x_t|^2 >= 1 / R^2`` on a mistake (the paper's separable
    bound ``sum loss_t^2 <= R^2 |v|^2``).
    ``pa1``: ``tau_t |x_t|^2 <= loss_t``, so the term is at least
    ``tau_t loss_t >= min(C, 1 / R^2)``.
    ``pa2``: the term is at least ``tau_t (2 loss_t - tau_t (|x_t|^2 + 1 / (2 C))) = tau_t loss_t =
    loss_t^2 / (|x_t|^2 + 1 / (2 C)) >= 1 / (R^2 + 1 / (2 C))``.
    Summing over the mistakes gives the three ceilings. Without a declared margin no ceiling is
    claimed; ``implied["max_margin"]`` is the largest margin consistent with the mistakes so far
    (the ceiling's numerator over the mistakes, square-rooted). ``implied["R"]`` is always reported.

Cost
    Weights are a numpy array indexed by the shared space's indices and grown lazily: memory follows
    the features seen. Predict and learn cost O(active features).

References
    K. Crammer, O. Dekel, J. Keshet, S. Shalev-Shwartz and Y. Singer, "Online passive-aggressive
    algorithms", Journal of Machine Learning Research 7, 2006.
"""

from __future__ import annotations

import math
from typing import Any

from learners.base import Ceiling, check_choice, check_number
from learners.errors import ParameterError, shown
from learners.features import Encoded, FeatureSpace
from learners.linear import LinearLearner

VARIANTS = ("pa", "pa1", "pa2")

SOURCE = (
    'Crammer, Dekel, Keshet, Shalev-Shwartz and Singer 2006, "Online passive-aggressive '
    'algorithms", JMLR 7; mistake form derived from its basic lemma'
)

FORMULAS = {
    "pa": "mistakes <= (R / gamma)^2",
    "pa1": "mistakes <= max(R^2, 1 / C) / gamma^2",
    "pa2": "mistakes <= (R^2 + 1 / (2 C)) / gamma^2",
}


class PassiveAggressive(LinearLearner):
    """Passive-aggressive learning of a halfspace: PA, PA-I and PA-II."""

    kind = "passive-aggressive"
    counts = "mistakes"
    # Its prediction changes at updates, but the ceiling counts mistakes, which are fewer.
    changes_only_on_update = False

    def __init__(
        self,
        features: int | list[str] | FeatureSpace,
        variant: str = "pa1",
        aggressiveness: float | None = None,
        bias: float | None = None,
        margin: float | None = None,
    ) -> None:
        super().__init__(features)
        kind = self.kind
        self.variant = check_choice(kind, "variant", variant, VARIANTS)
        if self.variant == "pa":
            if aggressiveness is not None:
                raise ParameterError(
                    "The 'aggressiveness' parameter of passive-aggressive applies only to "
                    f"variants 'pa1' and 'pa2'; got {shown(aggressiveness)} with variant 'pa'.",
                    field="aggressiveness",
                    rule="unset unless variant is 'pa1' or 'pa2'",
                    value=aggressiveness
                    if isinstance(aggressiveness, int | float | str)
                    else shown(aggressiveness),
                )
            self.aggressiveness: float | None = None
        else:
            self.aggressiveness = (
                1.0
                if aggressiveness is None
                else check_number(kind, "aggressiveness", aggressiveness, low=0, low_open=True)
            )
        self._check_bias_and_margin(bias, margin)
        self._C = self.aggressiveness or math.inf
        self.clear_above = 1.0  # no hinge loss from s (w . x + b c) >= 1 on: no error, no step

    def params(self) -> dict[str, Any]:
        return {
            "variant": self.variant,
            "aggressiveness": self.aggressiveness,
            "bias": self.bias,
            "margin": self.margin,
        }

    def _predict(self, enc: Encoded) -> int:
        return int(self._score(enc) > 0)

    def _learn(self, enc: Encoded, y: int) -> tuple[bool, bool]:
        # The hot path, inline (as a call into the linear core it ran 2-8% slower): one gather
        # of the item's weights serves the score and the update.
        if len(self._w) < len(self.space.names):
            self._grow()
        c = self._c
        idx = enc.idx
        current = self._w[idx]
        if enc.binary:
            sq = len(idx) + c * c
            score = float(current.sum()) + self._b * c
        else:
            val = enc.val
            sq = float(val.dot(val)) + c * c
            score = float(current.dot(val)) + self._b * c
        if sq > self._r2:
            self._r2 = sq
        wrong = (score > 0) != (y == 1)
        s = 1.0 if y else -1.0
        loss = 1.0 - s * score
        if loss <= 0.0 or sq == 0.0:
            return wrong, False
        variant = self.variant
        if variant == "pa1":
            tau = min(self._C, loss / sq)
        elif variant == "pa2":
            tau = loss / (sq + 0.5 / self._C)
        else:
            tau = loss / sq
        step = tau * s
        self._w[idx] = current + (step if enc.binary else step * enc.val)
        self._b += step * c
        return wrong, True

    def weights(self) -> tuple[dict[str, float], float]:
        """The weights by feature name (absent means 0) and the intercept (bias weight times c)."""
        return self._named(self._w, self._b)

    def _numerator(self) -> float:
        r2 = self._r2
        if self.variant == "pa1":
            return max(r2, 1.0 / self._C)
        if self.variant == "pa2":
            return r2 + 0.5 / self._C
        return r2

    def ceiling(self) -> Ceiling:
        formula = FORMULAS[self.variant] + "; R = largest norm of a learned item, bias included"
        value, assumption, implied = self._margin_terms(self._numerator())
        assumption += (
            "; counts label-time sign mistakes, not updates (it updates on any hinge loss)"
        )
        return Ceiling(value, formula, assumption, SOURCE, "mistakes", implied)
