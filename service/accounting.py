"""One learner's seat in a stream's panel: its ledger, its epochs, its alerts, its comparison.

A seat holds a learner and counts, per *epoch* (a run of the learner from a fresh start):

- served mistakes: labelled predictions whose vote, made in this epoch, differed from the label;
- updates and mistakes: read from the learner (it counts them at label time);
- outstanding: predictions made in this epoch still waiting for their label; ``max_outstanding``
  (G) is the most of them at any update, and the served ceiling is ``(1 + G) U`` when the ceiling
  ``U`` counts updates and the learner's prediction changes only at updates (THEORY.md, delays);
- the state against the ceiling (``learners.standing``) and the alerts raised on reaching
  exceeded or contradicted, with the ids of the last labels the learner was wrong on as evidence.

Across all epochs it keeps totals and the discordance counts against the serving learner on items
both predicted and labelled, from which :func:`mcnemar_exact` gives the exact McNemar p-value.
"""

from __future__ import annotations

import math
from fractions import Fraction
from typing import Any

import learners
from learners import Ceiling, FeatureSpace, Learner, standing

EVIDENCE = 8  # ids kept as evidence for an alert
MAX_ALERTS = 50  # alerts kept per seat
MAX_EPOCHS = 20  # past epochs kept per seat
EXACT_LIMIT = 2000  # discordant pairs up to which the p-value is summed in exact integers


def mcnemar_exact(b: int, c: int) -> float:
    """Exact two-sided McNemar p-value for ``b`` and ``c`` discordant pairs.

    ``p = min(1, 2 * sum_{i <= min(b, c)} C(b + c, i) / 2^(b + c))``: the two-sided binomial test
    of ``min(b, c)`` successes in ``b + c`` trials with probability one half (McNemar 1947,
    Psychometrika 12(2); the exact form of the test). Exact integers up to 2000 pairs, above that
    a sum of terms in floating point from the largest term down until they stop mattering.
    """
    n = b + c
    if n == 0:
        return 1.0
    k = min(b, c)
    if n <= EXACT_LIMIT:
        tail = sum(math.comb(n, i) for i in range(k + 1))
        return float(min(Fraction(1), Fraction(2 * tail, 2**n)))
    log_term = math.lgamma(n + 1) - math.lgamma(k + 1) - math.lgamma(n - k + 1) - n * math.log(2)
    term, total, i = 1.0, 1.0, k
    while i > 0:
        term *= i / (n - i + 1)
        total += term
        if term < 1e-18 * total:
            break
        i -= 1
    log_p = math.log(2) + log_term + math.log(total)
    return 1.0 if log_p >= 0 else math.exp(log_p)


def finite_or_none(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def ceiling_view(ceiling: Ceiling) -> dict[str, Any]:
    view = ceiling.to_dict()
    view["value"] = finite_or_none(view["value"])
    view["implied"] = {k: finite_or_none(float(v)) for k, v in view["implied"].items()}
    return view


class Seat:
    """A learner in a panel with the accounting around it (see the module docstring)."""

    def __init__(
        self,
        name: str,
        kind: str,
        params: dict[str, Any],
        space: FeatureSpace,
        near: float,
        history_points: int,
        t: float,
    ) -> None:
        self.name = name
        self.kind = kind
        self.params = params
        self.near = near
        self.history_points = history_points
        self.learner: Learner = learners.make(kind, features=space, **params)
        self.epoch = 0
        # The stream's prediction count at this seat's last update (``Stream._learn``). Not
        # stored: after a restore every later prediction follows every earlier update, and the
        # restored predictions are never skipped (``Pending.seq`` is -1).
        self.changed_at = 0
        self._fresh(t)
        self.past: list[dict[str, Any]] = []
        self.alerts: list[dict[str, Any]] = []
        self.alert_counts = {"exceeded": 0, "contradicted": 0}
        self.total_served = 0
        self.total_updates = 0
        self.compared = 0  # labelled predictions, all epochs
        self.vote_wrong = 0  # of those, how many its vote got wrong
        self.only_this_wrong = 0
        self.only_served_wrong = 0

    def _fresh(self, t: float) -> None:
        self.started = t
        self.served_mistakes = 0
        self.outstanding = 0
        self.max_outstanding = 0
        self.recent_wrong: list[str] = []  # the last EVIDENCE ids (a list: small per seat)
        self.alerted: str | None = None
        self.history: list[list[Any]] = []

    # -- accounting ------------------------------------------------------------------------

    def count(self, ceiling: Ceiling) -> int:
        """The quantity the ceiling bounds."""
        return self.learner.updates if ceiling.counts == "updates" else self.learner.mistakes

    def served_ceiling(self, ceiling: Ceiling) -> float | None:
        value = finite_or_none(ceiling.value)
        if value is None or ceiling.counts != "updates":
            return None
        if not self.learner.changes_only_on_update:
            return None
        return (1 + self.max_outstanding) * value

    def state(self, ceiling: Ceiling) -> str:
        return standing(self.count(ceiling), ceiling, self.learner.contradicted, self.near)

    def observe_vote(self, vote_wrong: bool, served_wrong: bool, same_epoch: bool) -> None:
        """A labelled prediction: count the comparison, and the served mistake if this epoch's."""
        self.compared += 1
        self.vote_wrong += vote_wrong
        if vote_wrong and not served_wrong:
            self.only_this_wrong += 1
        elif served_wrong and not vote_wrong:
            self.only_served_wrong += 1
        if same_epoch and vote_wrong:
            self.served_mistakes += 1
            self.total_served += 1

    def pass_votes(
        self,
        count: int,
        vote_wrong: int,
        only_this: int,
        only_served: int,
        this_epoch: int,
        served: int,
    ) -> None:
        """:meth:`observe_vote` for ``count`` labelled predictions at once (``served`` of them
        served mistakes: wrong votes of this epoch), and the release of those of this epoch."""
        self.compared += count
        self.vote_wrong += vote_wrong
        self.only_this_wrong += only_this
        self.only_served_wrong += only_served
        self.outstanding -= this_epoch
        self.served_mistakes += served
        self.total_served += served

    def learn(self, item_id: str, enc: Any, y: int, right: bool = False) -> tuple[bool, bool]:
        """Let the learner learn one label; return (hypothesis was wrong, it updated).
        ``right``: it is known to predict the label (see ``Learner.learn_checked``)."""
        learner = self.learner
        wrong, updated = learner.learn_checked(enc, y, right=right)  # enc and y checked once
        if updated:
            self.total_updates += 1
            if self.outstanding > self.max_outstanding:
                self.max_outstanding = self.outstanding
        if wrong:
            recent = self.recent_wrong
            recent.append(item_id)
            if len(recent) > EVIDENCE:
                del recent[0]
        return wrong, updated

    def settle(self, t: float, updated: bool, policy: str) -> dict[str, Any] | None:
        """After a label: a history point if it ``updated`` the learner, and an alert on
        reaching exceeded/contradicted.

        The ceiling's value is read once per label (its live inputs may move on any label) with
        the learner's cheap ``ceiling_value()``, and serves both the history point and the state.
        """
        learner = self.learner
        value = learner.ceiling_value()
        if updated:
            self._point(t, value)
        count = learner.updates if learner.counts == "updates" else learner.mistakes
        state = standing(count, value, learner.contradicted, self.near)
        if state != "exceeded" and state != "contradicted":
            self.alerted = None
            return None
        if self.alerted == state:
            return None
        self.alerted = state
        alert = {
            "learner": self.name,
            "epoch": self.epoch,
            "state": state,
            "at": t,
            "count": count,
            "ceiling": finite_or_none(value),
            "evidence": list(self.recent_wrong),
            "policy": policy,
        }
        self.alert_counts[state] += 1
        self.alerts.append(alert)
        del self.alerts[:-MAX_ALERTS]
        if policy == "restart":
            self.restart(t)
        return alert

    def restart(self, t: float) -> None:
        """Start the learner afresh as a new epoch; the old epoch's ledger is kept."""
        record = self.epoch_view(t)
        record["ended"] = t
        self.past.append(record)
        del self.past[:-MAX_EPOCHS]
        self.learner = learners.make(self.kind, features=self.learner.space, **self.params)
        self.epoch += 1
        self._fresh(t)

    def close_batch(self, t: float) -> None:
        """After a batch of labels: a history point if served mistakes moved since the last one.

        The history has a point after every update and after every batch whose labels found
        served mistakes; each shows the counts as they stood after that label."""
        last = self.history[-1] if self.history else None
        if self.served_mistakes != (0 if last is None else last[2]):
            self._point(t, self.learner.ceiling_value())

    def _point(self, t: float, value: float | None) -> None:
        self.history.append(
            [
                t,
                self.learner.examples,
                self.served_mistakes,
                self.learner.updates,
                finite_or_none(value),
            ]
        )
        if len(self.history) > self.history_points:
            last = self.history[-1]
            self.history = self.history[:-1:2] + [last]

    # -- views -----------------------------------------------------------------------------

    def epoch_view(self, t: float) -> dict[str, Any]:
        ceiling = self.learner.ceiling()
        return {
            "epoch": self.epoch,
            "started": self.started,
            "examples": self.learner.examples,
            "served_mistakes": self.served_mistakes,
            "mistakes": self.learner.mistakes,
            "updates": self.learner.updates,
            "ceiling": ceiling_view(ceiling),
            "served_ceiling": self.served_ceiling(ceiling),
            "max_outstanding": self.max_outstanding,
            "state": self.state(ceiling),
        }

    def view(self, t: float) -> dict[str, Any]:
        out = {"name": self.name, "kind": self.kind, **self.epoch_view(t)}
        out["changes_only_on_update"] = bool(self.learner.changes_only_on_update)
        out["alerts"] = [dict(a) for a in self.alerts]
        out["epochs"] = [dict(e) for e in self.past]
        out["history"] = [
            {"t": p[0], "labels": p[1], "served_mistakes": p[2], "updates": p[3], "ceiling": p[4]}
            for p in self.history
        ]
        return out

    # -- plain data ------------------------------------------------------------------------

    def to_state(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "kind": self.kind,
            "params": self.params,
            "learner": self.learner.to_state(include_space=False),
            "epoch": self.epoch,
            "started": self.started,
            "served_mistakes": self.served_mistakes,
            "outstanding": self.outstanding,
            "max_outstanding": self.max_outstanding,
            "recent_wrong": list(self.recent_wrong),
            "alerted": self.alerted,
            "history": [list(p) for p in self.history],
            "past": self.past,
            "alerts": self.alerts,
            "alert_counts": dict(self.alert_counts),
            "totals": [
                self.total_served,
                self.total_updates,
                self.compared,
                self.vote_wrong,
                self.only_this_wrong,
                self.only_served_wrong,
            ],
        }

    def restore(self, state: dict[str, Any], space: FeatureSpace) -> None:
        """Set everything from :meth:`to_state` output (the seat was built from the same spec)."""
        self.learner = learners.from_state(state["learner"], space)
        self.epoch = int(state["epoch"])
        self.started = float(state["started"])
        self.served_mistakes = int(state["served_mistakes"])
        self.outstanding = int(state["outstanding"])
        self.max_outstanding = int(state["max_outstanding"])
        self.recent_wrong = list(state["recent_wrong"])[-EVIDENCE:]
        self.alerted = state["alerted"]
        self.history = [list(p) for p in state["history"]]
        self.past = list(state["past"])
        self.alerts = list(state["alerts"])
        self.alert_counts = {k: int(v) for k, v in state["alert_counts"].items()}
        (
            self.total_served,
            self.total_updates,
            self.compared,
            self.vote_wrong,
            self.only_this_wrong,
            self.only_served_wrong,
        ) = (int(v) for v in state["totals"])
