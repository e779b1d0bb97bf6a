"""Perceptron: learns a linear threshold function by adding each misjudged item to its weights.

What it learns
    A halfspace over the numeric features: predict 1 when ``w . x + b c > 0`` and 0 otherwise
    (a score of exactly 0 is the negative class, as in scikit-learn). With ``bias=c`` (default 1.0)
    every item carries one more constant feature of value ``c`` whose weight ``b`` is kept beside
    ``w`` (it is not a name of the feature space); with ``bias=None`` the halfspace passes through
    the origin. Below, ``x`` means the augmented item ``(x, c)`` and ``s = +1`` for label 1,
    ``s = -1`` for label 0.

Update rule (one core, four variants)
    ``classic``: ``w`` starts at 0; when ``s (w . x) <= 0`` then ``w += s x`` (Rosenblatt 1958).
    ``margin``: when ``s (w . x) <= tau`` then ``w += eta s x`` (parameters ``tau >= 0``, default 1,
    and ``eta > 0``, default 1). It also updates on correct answers whose score is below ``tau``.
    ``averaged``: learns as ``classic``; predicts with the mean of the post-step weight vectors over
    all labelled items so far (Freund and Schapire 1999). Kept lazily: with ``U = sum over updates
    of t * (s x)`` (``t`` the item's 1-based position), the sum of the first ``T`` post-step vectors
    is ``(T + 1) w - U``, so each item costs O(active features), never O(d).
    ``voted``: learns as ``classic``; every update starts a new hypothesis ``w_i`` whose survival
    count ``c_i`` is the number of labelled items after which it was the current one (the item that
    created it included); predicts ``sign(sum_i c_i sign(w_i . x))`` (Freund and Schapire 1999).
    The updates are stored as sparse deltas.

    ``updated`` means the variant's rule fired; ``wrong`` means the hypothesis the variant serves
    (the averaged or voted one for those variants) was wrong on the item at label time. A classic
    update on a score of exactly 0 with label 0 is an update without a served mistake.

Ceiling (counts updates)
    Precondition: some unit vector ``u`` in the augmented space (bias included) has
    ``s (u . x) >= gamma > 0`` on every labelled item, with ``gamma`` the declared ``margin``; and
    ``R`` is the largest norm of an augmented item learned so far (observed live: the bound on the
    updates so far holds with the ``R`` so far).
    ``classic``, ``averaged``, ``voted``: ``updates <= (R / gamma)^2`` (Novikoff 1962; Block 1962).
    The step size does not matter from ``w = 0``.
    ``margin``: ``updates <= (R^2 + 2 tau / eta) / gamma^2`` [derived]: each update adds at least
    ``eta gamma`` to ``u . w`` and at most ``2 eta tau + eta^2 R^2`` to ``|w|^2``, so after ``k``
    updates ``k eta gamma <= |w| <= sqrt(k (2 eta tau + eta^2 R^2))``.
    For ``averaged`` and ``voted`` the bound is on the underlying perceptron's updates; the
    predictions they serve have no known worst-case mistake ceiling (Freund and Schapire give an
    expected-error bound for i.i.d. items only), and they change between updates, so the served
    ceiling under delayed labels does not apply (``changes_only_on_update`` is False for them).
    Without a declared margin no ceiling is claimed; ``implied["max_margin"]`` is the largest margin
    consistent with the updates so far, ``R / sqrt(updates)`` (``sqrt((R^2 + 2 tau / eta) /
    updates)`` for ``margin``). ``implied["R"]`` is always reported.

Cost
    Weights are numpy arrays indexed by the shared space's indices and grown lazily, so memory
    follows the features seen, never the declared size. ``classic``, ``margin`` and ``averaged``:
    predict and learn cost O(active features) (plus an amortised grow when the space admits new
    names). ``voted``: memory O(total active features over all updates), and every predict and learn
    costs the same: it grows with the number of updates.

References
    F. Rosenblatt, "The perceptron: a probabilistic model for information storage and organization
    in the brain", Psychological Review 65(6), 1958.
    A. B. J. Novikoff, "On convergence proofs on perceptrons", Symposium on the Mathematical Theory
    of Automata 12, Polytechnic Institute of Brooklyn, 1962.
    H. D. Block, "The perceptron: a model for brain functioning", Reviews of Modern Physics 34(1),
    1962.
    Y. Freund and R. E. Schapire, "Large margin classification using the perceptron algorithm",
    Machine Learning 37(3), 1999.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from learners.base import Ceiling, check_choice, check_number, ensure_length
from learners.errors import ParameterError, StateError, shown
from learners.features import Encoded, FeatureSpace
from learners.linear import (
    LinearLearner,
    dense_from_state,
    finite,
    float_list,
    int_list,
    sparse_state,
)

VARIANTS = ("classic", "margin", "averaged", "voted")

SOURCE = (
    'Novikoff 1962, "On convergence proofs on perceptrons"; '
    'Block 1962, "The perceptron: a model for brain functioning", Reviews of Modern Physics 34(1)'
)
SOURCE_MARGIN = SOURCE + "; margin form derived from the same proof"
SOURCE_AVERAGED = (
    SOURCE + '; Freund and Schapire 1999, "Large margin classification using the perceptron '
    'algorithm", Machine Learning 37(3)'
)


class Perceptron(LinearLearner):
    """The perceptron and its margin, averaged and voted variants, with an optional bias."""

    kind = "perceptron"

    def __init__(
        self,
        features: int | list[str] | FeatureSpace,
        variant: str = "classic",
        bias: float | None = 1.0,
        margin: float | None = None,
        tau: float | None = None,
        eta: float | None = None,
    ) -> None:
        super().__init__(features)
        kind = self.kind
        self.variant = check_choice(kind, "variant", variant, VARIANTS)
        self._check_bias_and_margin(bias, margin)
        if self.variant == "margin":
            self.tau: float | None = 1.0 if tau is None else check_number(kind, "tau", tau, low=0)
            self.eta: float | None = (
                1.0 if eta is None else check_number(kind, "eta", eta, low=0, low_open=True)
            )
        else:
            for name, value in (("tau", tau), ("eta", eta)):
                if value is not None:
                    raise ParameterError(
                        f"The {name!r} parameter of perceptron applies only to variant 'margin'; "
                        f"got {shown(value)} with variant {self.variant!r}.",
                        field=name,
                        rule="unset unless variant is 'margin'",
                        value=value if isinstance(value, int | float | str) else shown(value),
                    )
            self.tau = self.eta = None
        # Per instance, not per class: averaged and voted predictions move between updates.
        self.changes_only_on_update = self.variant in ("classic", "margin")
        self._threshold = self.tau or 0.0
        self._step = self.eta or 1.0
        self._averaged = self.variant == "averaged"
        if self.changes_only_on_update:  # averaged and voted serve another score: not screened
            self.clear_above = self._threshold
        self._voted = self.variant == "voted"
        # Learned state beyond the linear core's weights, bias weight and R^2.
        # averaged: U = sum over updates of t * (step s x), and its bias part.
        self._u = np.zeros(0)
        self._ub = 0.0
        # voted: the updates as flat sparse deltas (index, signed value, owner update), the sign of
        # each update (its bias part), each hypothesis' survival count, and a scratch row.
        self._vidx = np.zeros(0, dtype=np.int64)
        self._vval = np.zeros(0)
        self._vowner = np.zeros(0, dtype=np.int64)
        self._vsign = np.zeros(0)
        self._vcount = np.zeros(0)
        self._vn = 0  # entries used in the flat arrays
        self._k = 0  # hypotheses stored (updates)
        self._buf = np.zeros(0)

    def params(self) -> dict[str, Any]:
        return {
            "variant": self.variant,
            "bias": self.bias,
            "margin": self.margin,
            "tau": self.tau,
            "eta": self.eta,
        }

    # -- scoring ----------------------------------------------------------------------------

    def _grow(self) -> None:
        """Make the arrays cover every index the shared space has admitted."""
        super()._grow()
        n = len(self.space.names)
        if self._averaged:
            self._u = ensure_length(self._u, n, 0.0)
        if self._voted:
            self._buf = ensure_length(self._buf, n, 0.0)

    def _averaged_score(self, enc: Encoded, score: float) -> float:
        """T times the averaged score, T the labelled items so far; ``score`` is w . x + b c."""
        u = self._u[enc.idx]
        ux = float(u.sum()) if enc.binary else float(u.dot(enc.val))
        return (self.examples + 1) * score - (ux + self._ub * self._c)

    def _voted_score(self, enc: Encoded) -> float:
        """sum_i c_i sign(w_i . x) over the stored hypotheses (the zero vector adds nothing)."""
        k = self._k
        if k == 0:
            return 0.0
        n = self._vn
        buf = self._buf
        buf[enc.idx] = 1.0 if enc.binary else enc.val
        gathered = buf[self._vidx[:n]] * self._vval[:n]
        buf[enc.idx] = 0.0
        dots: np.ndarray = np.bincount(self._vowner[:n], weights=gathered, minlength=k)
        if self._c:
            dots += self._vsign[:k] * (self._c * self._c)
        return float(self._vcount[:k] @ np.sign(np.cumsum(dots)))

    def _predict(self, enc: Encoded) -> int:
        score = self._score(enc)
        if self._averaged:
            return int(self._averaged_score(enc, score) > 0)
        if self._voted:
            return int(self._voted_score(enc) > 0)
        return int(score > 0)

    # -- learning ---------------------------------------------------------------------------

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
        s = 1.0 if y else -1.0
        if self._averaged:
            served = self._averaged_score(enc, score)
        elif self._voted:
            served = self._voted_score(enc)
        else:
            served = score
        wrong = (served > 0) != (y == 1)
        if s * score > self._threshold:
            if self._voted and self._k:
                self._vcount[self._k - 1] += 1.0
            return wrong, False
        step = self._step * s
        self._w[idx] = current + (step if enc.binary else step * enc.val)
        self._b += step * c
        if self._averaged:
            t_step = (self.examples + 1) * step
            self._u[idx] += t_step if enc.binary else t_step * enc.val
            self._ub += t_step * c
        elif self._voted:
            self._add_delta(enc, step)
        return wrong, True

    def _add_delta(self, enc: Encoded, step: float) -> None:
        start, k = self._vn, self._k
        end = start + len(enc.idx)
        self._vidx = ensure_length(self._vidx, end, 0)
        self._vval = ensure_length(self._vval, end, 0.0)
        self._vowner = ensure_length(self._vowner, end, 0)
        self._vsign = ensure_length(self._vsign, k + 1, 0.0)
        self._vcount = ensure_length(self._vcount, k + 1, 0.0)
        self._vidx[start:end] = enc.idx
        self._vval[start:end] = step if enc.binary else step * enc.val
        self._vowner[start:end] = k
        self._vsign[k] = step
        self._vcount[k] = 1.0
        self._vn, self._k = end, k + 1

    # -- what it reports --------------------------------------------------------------------

    def weights(self) -> tuple[dict[str, float], float]:
        """The weights the variant predicts with, by feature name (absent means 0), and the
        intercept (bias weight times ``c``; 0.0 without a bias).

        ``averaged``: the mean of the post-step vectors over the labelled items. ``voted`` predicts
        by a vote that no single vector expresses: this returns its current (learning) vector.
        """
        w, b = self._w, self._b
        if self._averaged:
            t = self.examples
            if t == 0:
                w, b = np.zeros(0), 0.0
            else:
                w = ((t + 1) * w - self._u) / t
                b = ((t + 1) * b - self._ub) / t
        return self._named(w, b)

    def _numerator(self) -> float:
        if self.variant == "margin":
            return self._r2 + 2.0 * self._threshold / self._step
        return self._r2

    def ceiling(self) -> Ceiling:
        if self.variant == "margin":
            formula = "updates <= (R^2 + 2 tau / eta) / gamma^2"
            source = SOURCE_MARGIN
        else:
            formula = "updates <= (R / gamma)^2"
            source = SOURCE_AVERAGED if self.variant in ("averaged", "voted") else SOURCE
        formula += "; R = largest norm of a learned item, bias feature included"
        value, assumption, implied = self._margin_terms(self._numerator())
        if self.variant in ("averaged", "voted"):
            assumption += (
                f"; the ceiling bounds the underlying perceptron's updates: {self.variant} "
                "predictions have no known worst-case mistake ceiling"
            )
        return Ceiling(value, formula, assumption, source, "updates", implied)

    # -- state --------------------------------------------------------------------------------

    def _learned_state(self) -> dict[str, Any]:
        n = len(self.space.names)
        learned = super()._learned_state()
        if self._averaged:
            learned["u"] = sparse_state(self._u, n)
            learned["ub"] = self._ub
        if self._voted:
            k, m = self._k, self._vn
            learned["deltas"] = {
                "sizes": np.bincount(self._vowner[:m], minlength=k).tolist(),
                "idx": self._vidx[:m].tolist(),
                "val": self._vval[:m].tolist(),
                "sign": self._vsign[:k].tolist(),
                "count": self._vcount[:k].tolist(),
            }
        return learned

    def _restore(self, learned: Mapping[str, Any]) -> None:
        super()._restore(learned)
        n = len(self.space.names)
        if self._averaged:
            self._u = dense_from_state(learned.get("u"), "learned.u", n)
            self._ub = finite(learned.get("ub"), "learned.ub")
        if self._voted:
            self._restore_deltas(learned.get("deltas"), n)
            self._buf = np.zeros(n)

    def _restore_deltas(self, deltas: Any, n: int) -> None:
        field = "learned.deltas"
        if not isinstance(deltas, Mapping):
            raise StateError(
                f"A voted perceptron state needs a mapping of deltas; got {shown(deltas)}.",
                field=field,
                rule="mapping with sizes, idx, val, sign, count",
                value=shown(deltas),
            )
        sizes = int_list(deltas.get("sizes"), f"{field}.sizes", None)
        k = len(sizes)
        idx = int_list(deltas.get("idx"), f"{field}.idx", n)
        val = float_list(deltas.get("val"), f"{field}.val")
        sign = float_list(deltas.get("sign"), f"{field}.sign")
        count = float_list(deltas.get("count"), f"{field}.count")
        if len(idx) != len(val) or sum(sizes) != len(idx) or len(sign) != k or len(count) != k:
            raise StateError(
                "The voted perceptron's deltas do not fit together: sum(sizes) must equal the "
                f"lengths of idx and val, and sign and count need {k} entries.",
                field=field,
                rule="consistent lengths",
                value=shown([len(idx), len(val), len(sign), len(count)]),
            )
        self._vidx = np.array(idx, dtype=np.int64)
        self._vval = np.array(val, dtype=np.float64)
        self._vowner = np.repeat(np.arange(k, dtype=np.int64), sizes)
        self._vsign = np.array(sign, dtype=np.float64)
        self._vcount = np.array(count, dtype=np.float64)
        self._vn, self._k = len(idx), k
