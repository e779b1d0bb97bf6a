"""A stream: one feature space, a panel of learners, the predictions waiting for labels, the ledger.

Everything that changes a stream goes through one of the ``apply_*`` methods with a time ``t``
and the content of one logged event; the same methods replay the log after a restart, so the
restored ledger is the one that was acknowledged. ``apply_*`` either raises before changing
anything (a conflict, a feature outside a closed space) or applies the whole event.

Time only moves forward: ``advance(t)`` expires the predictions whose wait ran out at ``t``
(counted as expired, never silently dropped) and forgets labelled ids after their retention.
Expiry depends only on ``t``, so the sweeps and reads that expire predictions between events
need no log entry: the next event's ``t`` expires the very same ones on replay.

Ids are remembered after their label (or expiry) for ``label_wait_seconds`` and at most
``max_remembered_ids`` per stream, so a retried feedback is a duplicate (not learned twice), a
different label is a conflict, and a late label for an expired prediction is told apart from an
unknown id. After that an id is unknown.
"""

from __future__ import annotations

import hashlib
import json
import re
import struct
import threading
from array import array
from bisect import bisect_left
from collections import deque
from collections.abc import Mapping, Sequence
from json.encoder import encode_basestring_ascii as _quote  # what json.dumps uses
from typing import Any, cast

import numpy as np

from learners import Encoded, FeatureSpace, Learner, LearnerError
from learners.features import Rows
from service.accounting import Seat, mcnemar_exact
from service.errors import Conflict, InvalidInput

Features = Mapping[str, float] | Sequence[str]

STATE_VERSION = 2  # of Stream.to_state; version 1 held text prints
VIEW_CACHE = 64  # distinct vote / outcome views kept per stream
# Predict and examples batches of at least BATCH_AT_ONCE items, and feedback batches of at least
# FEEDBACK_AT_ONCE, are voted and learned by each learner at once (screens over the whole batch,
# ``Learner.predict_rows``, ``Learner.skim``); smaller ones item by item, where the screens'
# fixed cost outweighs what they save (where each pays: ``python -m benchmarks.at_once``;
# feedback's item-by-item step is cheaper, as a stream knows when a vote still stands). The
# same answers either way.
BATCH_AT_ONCE = 8
FEEDBACK_AT_ONCE = 24

# Label delay histogram buckets in seconds (one second to thirty days).
DELAY_BUCKETS = (
    1.0,
    10.0,
    60.0,
    300.0,
    900.0,
    3600.0,
    4 * 3600.0,
    12 * 3600.0,
    86400.0,
    2 * 86400.0,
    7 * 86400.0,
    30 * 86400.0,
)


# -- item prints ----------------------------------------------------------------------------
#
# A stream remembers a print of each item's features, to tell a repeat (the same features under
# the same id) from a conflict. A print is a 64-bit integer: the sum, modulo 2**64, of one share
# per non-zero entry, so neither the order of the names nor the form of the item ({"a": 1} or
# ["a"]) changes it. A flag's share (value 1) is its name's digest (blake2b, 8 bytes); another
# value's share mixes the digest with the value's bits (the splitmix64 finaliser). A stream keeps
# its names' digests in index order, so the prints of a batch are a few array operations over its
# encoded indices. Two different items under one id get the same print by chance about once in
# 2**64 (for shares that behave as random 64-bit numbers).
#
# Stream states of version 1 hold text prints (``fingerprint``); an id remembered with one is
# compared in that form.

PRINT_MASK = (1 << 64) - 1
_MIX1 = 0xBF58476D1CE4E5B9
_MIX2 = 0x94D049BB133111EB
_DOUBLE = struct.Struct("<d")
_WORD = struct.Struct("<Q")


def name_digest(name: str) -> int:
    """A feature name's 64-bit digest, the same in every process."""
    data = name.encode("utf-8", "surrogatepass")
    return int.from_bytes(hashlib.blake2b(data, digest_size=8).digest(), "little")


def value_share(digest: int, value: float) -> int:
    """An entry's share of its item's print: the name's digest when the value is 1, else the
    digest and the value's bits mixed."""
    if value == 1.0:
        return digest
    x = digest ^ _WORD.unpack(_DOUBLE.pack(value))[0]
    x = ((x ^ (x >> 30)) * _MIX1) & PRINT_MASK
    x = ((x ^ (x >> 27)) * _MIX2) & PRINT_MASK
    return x ^ (x >> 31)


def _value_shares(digests: np.ndarray, values: np.ndarray) -> np.ndarray:
    """:func:`value_share` over arrays (uint64 digests, float64 values; products wrap)."""
    x: np.ndarray = digests ^ values.view(np.uint64)
    x = (x ^ (x >> np.uint64(30))) * np.uint64(_MIX1)
    x = (x ^ (x >> np.uint64(27))) * np.uint64(_MIX2)
    x = x ^ (x >> np.uint64(31))
    return np.where(values == 1.0, digests, x)


def fingerprint(features: Features) -> str:
    """The text print of stream states of version 1, which does not depend on the form either.

    The digest is of ``json.dumps(sorted((name, float(value)) for the non-zero values))``; states
    of version 1 keep it, so it must not change. The common forms (a list of string names, a dict
    of string names to finite numbers) build that same text without the general encoder.
    """
    try:
        if type(features) is list:
            names = sorted(features)
            if not names:
                text = "[]"
            elif _plain_text("".join(names)):  # every name written as itself: no quoting
                text = '[["' + '", 1.0], ["'.join(names) + '", 1.0]]'
            else:
                text = "[" + ", ".join([f"[{_quote(k)}, 1.0]" for k in names]) + "]"
        elif type(features) is dict:
            pairs = sorted([(k, float(v)) for k, v in features.items() if v != 0])
            text = "[" + ", ".join([f"[{_quote(k)}, {v!r}]" for k, v in pairs]) + "]"
            if "n" in text and ("nan]" in text or "inf]" in text):
                text = _fingerprint_text(features)  # json writes NaN/Infinity, not nan/inf
        else:
            text = _fingerprint_text(features)
    except TypeError:  # a name that is not a string: the general form decides
        text = _fingerprint_text(features)
    return hashlib.blake2b(text.encode(), digest_size=12).hexdigest()


# A character json.dumps writes other than as itself (ensure_ascii): anything outside printable
# ASCII, the quote and the backslash.
_QUOTED = re.compile(r"[^\x20\x21\x23-\x5b\x5d-\x7e]")


def _plain_text(text: str) -> bool:
    """True when json.dumps writes every character of ``text`` as itself."""
    return text.isascii() and _QUOTED.search(text) is None


def _fingerprint_text(features: Features) -> str:
    if isinstance(features, Mapping):
        pairs = sorted((str(k), float(v)) for k, v in features.items() if v != 0)
    else:
        pairs = sorted((str(k), 1.0) for k in features)
    return json.dumps(pairs)


class ItemError(Exception):
    """Wraps a service error raised for the ``index``-th item of an event."""

    def __init__(self, index: int, error: Exception) -> None:
        super().__init__(str(error))
        self.index = index
        self.error = error


class Pending:
    """A served prediction waiting for its label."""

    __slots__ = ("item_id", "t", "enc", "votes", "epochs", "fp", "seq")

    def __init__(
        self,
        item_id: str,
        t: float,
        enc: Encoded,
        votes: tuple[int, ...],
        epochs: tuple[int, ...],
        fp: int | str,  # a print; text in states of version 1
        seq: int = -1,
    ) -> None:
        self.item_id = item_id
        self.t = t
        self.enc = enc
        self.votes = votes
        self.epochs = epochs
        self.fp = fp
        # The stream's prediction count before this one's batch; -1 when restored (unknown).
        self.seq = seq


class Resolved:
    """What is remembered of an id after its label or its expiry."""

    __slots__ = ("kind", "at", "fp", "label", "votes", "wrong", "updated")

    def __init__(
        self,
        kind: str,  # "labelled", "expired" or "example"
        at: float,
        fp: int | str,  # a print; text in states of version 1
        label: int | None,
        votes: tuple[int, ...] | None,
        wrong: int,
        updated: int,
    ) -> None:
        self.kind = kind
        self.at = at
        self.fp = fp
        self.label = label
        self.votes = votes
        self.wrong = wrong  # bit i: learner i was wrong
        self.updated = updated  # bit i: learner i updated

    def to_list(self) -> list[Any]:
        votes = None if self.votes is None else list(self.votes)
        return [self.kind, self.at, self.fp, self.label, votes, self.wrong, self.updated]

    @classmethod
    def from_list(cls, data: list[Any]) -> Resolved:
        kind, at, fp, label, votes, wrong, updated = data
        return cls(kind, at, fp, label, None if votes is None else tuple(votes), wrong, updated)


class _Labelled:
    """What :meth:`Stream._learn_many` shares with each learner's share of the work."""

    __slots__ = (
        "t",
        "ids",
        "encs",
        "ys",
        "labels",
        "taken",
        "rows",
        "votes",
        "epochs",
        "served_wrong",
        "wrong",
        "updated",
        "alerts",
    )

    def __init__(
        self,
        t: float,
        ids: list[str],
        encs: list[Encoded],
        ys: list[int],
        taken: list[Pending] | None,
    ) -> None:
        self.t = t
        self.ids = ids
        self.encs = encs
        self.ys = ys
        self.labels = np.array(ys, dtype=np.int8)
        self.taken = taken
        self.rows: Rows | None = None  # built when some learner skims
        self.votes: np.ndarray | None = None  # item x learner, when the items were predicted
        self.epochs: np.ndarray | None = None
        self.served_wrong: np.ndarray | None = None
        self.wrong = [0] * len(encs)  # per item, bit i: learner i was wrong
        self.updated = [0] * len(encs)  # per item, bit i: learner i updated
        # (item, learner, alert), put in the order item by item would raise them.
        self.alerts: list[tuple[int, int, dict[str, Any]]] = []


class Stream:
    """One stream's state; callers hold :attr:`lock` around every call (see ``registry``)."""

    def __init__(
        self, config: dict[str, Any], t: float, *, history_points: int, max_remembered: int
    ) -> None:
        self.config = config
        self.name: str = config["stream"]
        self.created = t
        self.last_t = t
        self.space = FeatureSpace(config["features"])
        self._digests = array("Q")  # the digests of the space's first names, in index order
        self.label_wait = float(config["label_wait_seconds"])
        self.policy: str = config["on_exceed"]
        self.max_remembered = max_remembered
        self.seats = [
            Seat(
                spec["name"],
                spec["kind"],
                dict(spec["params"]),
                self.space,
                float(config["near"]),
                history_points,
                t,
            )
            for spec in config["learners"]
        ]
        self.serve_index = [s.name for s in self.seats].index(config["serve"])
        self.serve_name: str = config["serve"]
        # Per-learner views of votes and of outcomes shared by the answers (see _answer).
        self._vote_views: dict[tuple[int, ...], dict[str, int]] = {}
        self._outcome_views: dict[tuple[int, int], dict[str, Any]] = {}
        self.epochs = tuple(s.epoch for s in self.seats)
        # Waiting predictions and remembered ids by id, each in the order it arrived (plain
        # dicts keep it); beside each, that order as a queue, oldest first, so expiring and
        # forgetting read the oldest in O(1) (a dict's first entry is not: it skips the holes
        # its deletions left). A label leaves its prediction in ``_waiting``: skipped there
        # when it comes first, and the queue is rebuilt when such entries outnumber the rest.
        self.pending: dict[str, Pending] = {}
        self._waiting: deque[Pending] = deque()
        self.resolved: dict[str, Resolved] = {}
        self._remembered: deque[str] = deque()
        self.counts = {"predictions": 0, "labels": 0, "examples": 0, "expired": 0}
        self.delay_buckets = [0] * (len(DELAY_BUCKETS) + 1)
        self.delay_sum = 0.0
        # Not part of the replayed state: counted since this process started.
        self.volatile = {"duplicates": 0, "conflicts": 0}
        self.new_alerts: list[dict[str, Any]] = []
        # Learn labelled batches by skimming (Learner.skim); False: one item at a time (the
        # same ledger; kept for the tests that compare the two). Batches of at least
        # ``at_once`` items (``feedback_at_once`` for feedback) go at once.
        self.skim = True
        self.at_once = BATCH_AT_ONCE
        self.feedback_at_once = FEEDBACK_AT_ONCE
        # Bookkeeping for the registry and the store.
        self.lock = threading.RLock()
        self.deleted = False
        self.last_seq = 0
        self.unsnapshotted = 0  # events logged since the last snapshot
        self.unsnapshotted_items = 0  # items in them
        self.snapshot_t = t

    # -- time ------------------------------------------------------------------------------

    def advance(self, t: float) -> float:
        """Move the stream's time to ``t`` (never backwards); expire and forget by it."""
        t = max(t, self.last_t)
        self.last_t = t
        wait = self.label_wait
        pending, waiting = self.pending, self._waiting
        while waiting:
            p = waiting[0]
            if pending.get(p.item_id) is not p:  # labelled since
                waiting.popleft()
                continue
            if p.t + wait > t:
                break
            waiting.popleft()
            del pending[p.item_id]
            self._release(p)
            self._remember(p.item_id, Resolved("expired", p.t + wait, p.fp, None, p.votes, 0, 0))
            self.counts["expired"] += 1
        if len(waiting) > 2 * len(pending) + 1024:
            self._waiting = deque(pending.values())  # the dict keeps the order
        resolved, remembered = self.resolved, self._remembered
        while remembered:
            item_id = remembered[0]
            if resolved[item_id].at + wait > t and len(resolved) <= self.max_remembered:
                break
            remembered.popleft()
            del resolved[item_id]
        return t

    def _wait(self, p: Pending) -> None:
        """Add a prediction waiting for its label (its id is new to the stream)."""
        self.pending[p.item_id] = p
        self._waiting.append(p)

    def _remember(self, item_id: str, r: Resolved) -> None:
        """Remember a labelled, expired or example id (new to ``resolved``)."""
        self.resolved[item_id] = r
        self._remembered.append(item_id)

    def _release(self, p: Pending) -> None:
        for seat, epoch in zip(self.seats, p.epochs, strict=True):
            if epoch == seat.epoch:
                seat.outstanding -= 1

    # -- events ----------------------------------------------------------------------------

    def apply(self, event: Mapping[str, Any]) -> list[dict[str, Any]]:
        """Apply one logged event (used by replay)."""
        kind = event["type"]
        items = event["items"]
        t = float(event["t"])
        if kind == "predict":
            return self.apply_predict(t, [(i["id"], i["features"]) for i in items])
        if kind == "feedback":
            return self.apply_feedback(t, [(i["id"], int(i["label"])) for i in items])
        if kind == "examples":
            return self.apply_examples(
                t, [(i["id"], i["features"], int(i["label"])) for i in items]
            )
        raise ValueError(f"unknown event type {kind!r}")

    def apply_predict(
        self, t: float, items: Sequence[tuple[str, Features]], checked: bool = False
    ) -> list[dict[str, Any]]:
        """Every learner votes on every new item; the serving learner's vote is the answer.

        Returns one answer per item, with ``duplicate`` for ids already answered with the same
        features. Raises (changing nothing) on an id reused with other features or a feature the
        space does not admit. ``checked``: the items' shapes are checked already (see
        ``FeatureSpace.encode``).
        """
        t = self.advance(t)
        first: dict[str, int] = {}
        fresh: list[int] = []
        for index, (item_id, features) in enumerate(items):
            if item_id in first:
                if self._print_of(items[first[item_id]][1]) != self._print_of(features):
                    raise ItemError(index, self._reused(item_id, "earlier in this batch"))
                continue
            first[item_id] = index
            known = self.pending.get(item_id) or self.resolved.get(item_id)
            if known is None:
                fresh.append(index)
            elif not self._same_item(known.fp, features) or (
                isinstance(known, Resolved) and known.votes is None
            ):
                raise ItemError(index, self._reused(item_id, "before"))
        encoded, panel_votes, rows = self._encode(
            [items[i][1] for i in fresh], fresh, checked=checked
        )
        prints = self._prints(encoded, rows)
        epochs, seq = self.epochs, self.counts["predictions"]
        fresh_votes: dict[int, tuple[int, ...]] = {}
        for index, enc, votes, fp in zip(fresh, encoded, panel_votes, prints, strict=True):
            # The bare indices only: the views the learners built are rebuilt at label time,
            # so a waiting prediction costs little memory.
            bare = Encoded(enc.keys, enc.vals)
            self._wait(Pending(items[index][0], t, bare, votes, epochs, fp, seq))
            fresh_votes[index] = votes
        if fresh:
            for seat in self.seats:
                seat.outstanding += len(fresh)
            self.counts["predictions"] += len(fresh)
        out = []
        for index, (item_id, _) in enumerate(items):
            answered = fresh_votes.get(index)
            if answered is not None:
                out.append(self._answer(item_id, answered, duplicate=False))
                continue
            known = self.pending.get(item_id) or self.resolved[item_id]
            assert known.votes is not None
            out.append(self._answer(item_id, known.votes, duplicate=True))
        return out

    def apply_feedback(self, t: float, items: Sequence[tuple[str, int]]) -> list[dict[str, Any]]:
        """Apply labels in order; each gets a status: applied, duplicate, conflict, unknown,
        expired. Only ``applied`` changes anything."""
        t = self.advance(t)
        if len(items) < self.feedback_at_once or not self.skim:
            return self._feedback_one_by_one(t, items)
        out: list[dict[str, Any] | None] = []
        applied: list[int] = []
        taken: list[Pending] = []
        later: list[int] = []  # ids met earlier in this batch: judged once that one is labelled
        seen: set[str] = set()
        for index, (item_id, y) in enumerate(items):
            out.append(None)
            if item_id in seen:
                later.append(index)
                continue
            seen.add(item_id)
            p = self.pending.pop(item_id, None)
            if p is None:
                out[index] = self._not_pending(item_id, y)
                continue
            applied.append(index)
            taken.append(p)
        if applied:
            ids = [items[i][0] for i in applied]
            ys = [items[i][1] for i in applied]
            bits = self._learn_many(t, ids, [p.enc for p in taken], ys, taken)
            resolved, remembered = self.resolved, self._remembered
            buckets, total = self.delay_buckets, self.delay_sum
            outcome = self._outcome
            for index, p, (wrong, updated) in zip(applied, taken, bits, strict=True):
                item_id, y = items[index]
                delay = t - p.t if t > p.t else 0.0
                total += delay
                buckets[bisect_left(DELAY_BUCKETS, delay)] += 1
                resolved[item_id] = Resolved("labelled", t, p.fp, y, p.votes, wrong, updated)
                remembered.append(item_id)  # as _remember does
                out[index] = outcome(item_id, "applied", wrong, updated)
            self.delay_sum = total
            self.counts["labels"] += len(applied)
        for index in later:
            out[index] = self._not_pending(*items[index])
        self.advance(t)  # keeps the remembered ids within their bound
        assert None not in out
        return cast(list[dict[str, Any]], out)

    def _feedback_one_by_one(
        self, t: float, items: Sequence[tuple[str, int]]
    ) -> list[dict[str, Any]]:
        """:meth:`apply_feedback` item by item (a batch too small to skim, or skimming off)."""
        out = []
        for item_id, y in items:
            p = self.pending.pop(item_id, None)
            if p is None:
                out.append(self._not_pending(item_id, y))
                continue
            wrong, updated = self._learn_one(t, item_id, p.enc, y, p)
            delay = t - p.t if t > p.t else 0.0
            self.delay_sum += delay
            self.delay_buckets[bisect_left(DELAY_BUCKETS, delay)] += 1
            self._remember(item_id, Resolved("labelled", t, p.fp, y, p.votes, wrong, updated))
            self.counts["labels"] += 1
            out.append(self._outcome(item_id, "applied", wrong, updated))
        for seat in self.seats:
            seat.close_batch(t)
        self.advance(t)  # keeps the remembered ids within their bound
        return out

    def apply_examples(
        self, t: float, items: Sequence[tuple[str, Features, int]], checked: bool = False
    ) -> list[dict[str, Any]]:
        """Labelled items never predicted: every learner learns; no served mistake is counted.
        ``checked`` as for :meth:`apply_predict`."""
        t = self.advance(t)
        first: dict[str, int] = {}
        fresh: list[int] = []
        for index, (item_id, features, y) in enumerate(items):
            if item_id in first:
                _, earlier, label = items[first[item_id]]
                if label != y or self._print_of(earlier) != self._print_of(features):
                    raise ItemError(index, self._reused(item_id, "earlier in this batch"))
                continue
            first[item_id] = index
            if item_id in self.pending:
                raise ItemError(
                    index,
                    Conflict(
                        f"Item id {item_id!r} names a prediction waiting for its label; send "
                        "its label as feedback instead.",
                        field="id",
                        rule="an id not already used for a prediction",
                        value=item_id,
                    ),
                )
            known = self.resolved.get(item_id)
            if known is None:
                fresh.append(index)
            elif (
                known.kind != "example"
                or known.label != y
                or not self._same_item(known.fp, features)
            ):
                raise ItemError(index, self._reused(item_id, "before"))
        encoded, _, rows = self._encode(
            [items[i][1] for i in fresh], fresh, vote=False, checked=checked
        )
        prints = self._prints(encoded, rows)
        ids = [items[i][0] for i in fresh]
        bits = self._learn_many(t, ids, encoded, [items[i][2] for i in fresh], None, rows)
        out: list[dict[str, Any] | None] = [None] * len(items)
        resolved, remembered, outcome = self.resolved, self._remembered, self._outcome
        for index, fp, (wrong, updated) in zip(fresh, prints, bits, strict=True):
            item_id, _, y = items[index]
            resolved[item_id] = Resolved("example", t, fp, y, None, wrong, updated)
            remembered.append(item_id)  # as _remember does
            out[index] = outcome(item_id, "applied", wrong, updated)
        self.counts["examples"] += len(fresh)
        if len(fresh) < len(items):  # the others were learned before, here or earlier
            for index, (item_id, _, _) in enumerate(items):
                if out[index] is None:
                    r = resolved[item_id]
                    out[index] = outcome(item_id, "duplicate", r.wrong, r.updated)
        self.advance(t)
        return cast(list[dict[str, Any]], out)

    # -- the accounting step ---------------------------------------------------------------

    def _learn_many(
        self,
        t: float,
        ids: list[str],
        encs: list[Encoded],
        ys: list[int],
        taken: list[Pending] | None,
        rows: Rows | None = None,
    ) -> list[tuple[int, int]]:
        """Every learner learns the labelled items in order; returns per item the bits of the
        learners that were wrong and of those that updated.

        ``taken``: the predictions the labels are for (None: labelled examples, never predicted;
        "wrong" is then the hypothesis at label time, else the vote); ``rows``: the items as
        :class:`Rows`, when the caller has them. A batch under ``at_once``
        items (``feedback_at_once`` for feedback) goes item by item (:meth:`_learn_one`). A
        larger one goes learner by learner (they do not read each other): the items a learner
        certainly gets right and keeps are skimmed (``Learner.skim``) and counted in bulk,
        served mistakes among them included; the others go one by one. The ledger ends exactly
        as it would item by item: over skimmed items nothing the standing reads moves towards an
        alert, so one settle after them decides what one per item would; the history gets a
        point at each update and one at the end of the batch (``Seat.close_batch``).
        """
        if not (
            self.skim
            and len(encs) >= (self.at_once if taken is None else self.feedback_at_once)
            and any(seat.learner.skims() for seat in self.seats)
        ):
            bits = [
                self._learn_one(t, ids[k], encs[k], ys[k], None if taken is None else taken[k])
                for k in range(len(encs))
            ]
            if taken is not None:  # (examples find no served mistakes)
                for seat in self.seats:
                    seat.close_batch(t)
            return bits
        batch = _Labelled(t, ids, encs, ys, taken)
        batch.rows = Rows(encs) if rows is None else rows
        if taken is not None:
            width = len(self.seats)
            batch.votes = np.array([p.votes for p in taken], dtype=np.int8).reshape(-1, width)
            batch.epochs = np.array([p.epochs for p in taken], dtype=np.int64).reshape(-1, width)
            batch.served_wrong = batch.votes[:, self.serve_index] != batch.labels
        for i in range(len(self.seats)):
            self._seat_learns(i, batch)
        for _, _, alert in sorted(batch.alerts, key=lambda found: found[:2]):
            self._alerted(alert)  # in the order item by item would raise them
        return list(zip(batch.wrong, batch.updated, strict=True))

    def _learn_one(
        self, t: float, item_id: str, enc: Encoded, y: int, p: Pending | None
    ) -> tuple[int, int]:
        """Every learner learns one labelled item (a batch too small to skim, or skimming
        off); returns the bits of the learners that were wrong and of those that updated."""
        wrong_bits = updated_bits = 0
        for i, seat in enumerate(self.seats):
            wrong, updated = self._seat_step(i, seat, item_id, enc, y, p)
            wrong_bits |= wrong << i
            updated_bits |= updated << i
            alert = seat.settle(t, updated, self.policy)
            if alert is not None:
                self._alerted(alert)
        return wrong_bits, updated_bits

    def _seat_step(
        self, i: int, seat: Seat, item_id: str, enc: Encoded, y: int, p: Pending | None
    ) -> tuple[bool, bool]:
        """Learner ``i`` learns one labelled item (its settle is the caller's); returns (wrong,
        updated). ``p``: the prediction the label is for; None for a labelled example, whose
        "wrong" is the hypothesis at label time (else the vote)."""
        if p is None:
            wrong, updated = seat.learn(item_id, enc, y)
        else:
            same_epoch = p.epochs[i] == seat.epoch
            if same_epoch:
                seat.outstanding -= 1
            wrong = p.votes[i] != y
            seat.observe_vote(wrong, p.votes[self.serve_index] != y, same_epoch)
            # Its vote was right and it has not updated since: it still predicts the label.
            right = (
                not wrong
                and same_epoch
                and seat.changed_at <= p.seq
                and seat.learner.changes_only_on_update
            )
            _, updated = seat.learn(item_id, enc, y, right)
        if updated:
            seat.changed_at = self.counts["predictions"]
        return wrong, updated

    def _seat_learns(self, i: int, batch: _Labelled) -> None:
        """One learner's share of :meth:`_learn_many` for a batch it skims."""
        seat, n, t, policy = self.seats[i], len(batch.encs), batch.t, self.policy
        ys, taken, wrong, updated = batch.ys, batch.taken, batch.wrong, batch.updated
        bit = 1 << i
        tallies: tuple[list[int], ...] = ()
        rows = batch.rows
        assert rows is not None
        if taken is not None:
            assert batch.votes is not None and batch.served_wrong is not None
            vote_wrong = batch.votes[:, i] != batch.labels
            served_wrong = batch.served_wrong
            for k in np.flatnonzero(vote_wrong).tolist():
                wrong[k] |= bit
            # Running counts, so a skimmed run's share is two lookups each.
            tallies = tuple(
                np.concatenate(([0], np.cumsum(flags))).tolist()
                for flags in (vote_wrong, vote_wrong & ~served_wrong, served_wrong & ~vote_wrong)
            )
        epoch = -1
        k = 0
        while k < n:
            if seat.epoch != epoch:  # first, and after a restart: which votes are this epoch's
                epoch = seat.epoch
                if taken is not None:
                    assert batch.epochs is not None
                    this_epoch = batch.epochs[:, i] == epoch
                    tallies = (
                        *tallies[:3],
                        np.concatenate(([0], np.cumsum(this_epoch))).tolist(),
                        np.concatenate(([0], np.cumsum(this_epoch & vote_wrong))).tolist(),
                    )
            j = seat.learner.skim(rows, batch.labels, k, n)
            if j > k:
                if taken is not None:
                    seat.pass_votes(j - k, *(counts[j] - counts[k] for counts in tallies))
                alert = seat.settle(t, False, policy)
                if alert is not None:
                    batch.alerts.append((j - 1, i, alert))
                k = j
                if seat.epoch != epoch:
                    continue  # a restart: which votes are this epoch's, before item j
            if j == n:
                break
            p = None if taken is None else taken[j]
            was_wrong, did_update = self._seat_step(i, seat, batch.ids[j], batch.encs[j], ys[j], p)
            if was_wrong:
                wrong[j] |= bit
            if did_update:
                updated[j] |= bit
            alert = seat.settle(t, did_update, policy)
            if alert is not None:
                batch.alerts.append((j, i, alert))
            k = j + 1
        if taken is not None:  # (examples find no served mistakes)
            seat.close_batch(t)

    def _alerted(self, alert: dict[str, Any]) -> None:
        self.new_alerts.append(alert)
        self.epochs = tuple(s.epoch for s in self.seats)  # a restart begins a new epoch

    def _encode(
        self,
        features: list[Features],
        indices: list[int],
        *,
        vote: bool = True,
        checked: bool = False,
    ) -> tuple[list[Encoded], list[tuple[int, ...]], Rows | None]:
        """Encode the items and let every learner vote on them (or only check them, when
        ``vote`` is false), all or nothing; with them, as :class:`Rows`, a batch of at least
        ``at_once`` items.

        A learner may refuse an item the space accepts (Winnow reads values in [0, 1] only);
        then, as when the space refuses one, the names this call admitted are taken back and
        nothing has changed. Voting does not change a learner.
        """
        space = self.space
        panel = [seat.learner for seat in self.seats]
        # Only the learners with their own check read an item twice (check, then vote).
        checkers = [learner for learner in panel if type(learner).check is not Learner.check]
        mark = len(space.names)
        encoded: list[Encoded] = []
        votes: list[tuple[int, ...]] = []
        read = 0  # items every learner has read
        flat = None
        if checked and len(features) >= self.at_once and all(type(f) is list for f in features):
            done = space.encode_flags(cast(list[list[str]], features))
            if done is not None:
                encoded, flat = done
        try:
            if flat is None:
                for item in features:
                    encoded.append(space.encode(item, checked))
            for enc in encoded:
                for learner in checkers:
                    learner.check(enc)
                read += 1
        except LearnerError as exc:
            space.forget(mark)
            where = read if len(encoded) == len(features) else len(encoded)
            error = InvalidInput(str(exc), field=exc.field, rule=exc.rule, value=exc.value)
            raise ItemError(indices[where], error) from exc
        rows = Rows(encoded, flat) if len(encoded) >= self.at_once else None
        if vote and rows is not None:  # each learner votes on the whole batch at once
            votes = list(zip(*[learner.predict_rows(rows) for learner in panel], strict=True))
        elif vote:
            votes = [tuple([learner.predict_checked(e) for learner in panel]) for e in encoded]
        return encoded, votes, rows

    # -- prints ----------------------------------------------------------------------------

    def _digest_table(self) -> array[int]:
        """The digests of the space's names, in index order (extended to new names). Names a
        refused batch takes back (:meth:`_encode`) are never in it: it is extended only once
        encoding succeeded, or before encoding starts."""
        table, names = self._digests, self.space.names
        if len(table) < len(names):
            table.extend(map(name_digest, names[len(table) :]))
        return table

    def _prints(self, encoded: list[Encoded], rows: Rows | None) -> list[int]:
        """The prints of encoded items (``rows``: the same items as :class:`Rows`, or None)."""
        table = self._digest_table()
        if rows is None:
            share = table.__getitem__
            return [
                (
                    sum(map(share, enc.keys))
                    if enc.vals is None
                    else sum(map(value_share, map(share, enc.keys), enc.vals))
                )
                & PRINT_MASK
                for enc in encoded
            ]
        if len(table):
            shares = np.frombuffer(table, dtype=np.uint64)[rows.keys]
        else:  # no names, so no entries
            shares = np.zeros(0, dtype=np.uint64)
        if rows.vals is not None:
            shares = _value_shares(shares, rows.vals)
        running = np.zeros(len(shares) + 1, dtype=np.uint64)
        np.cumsum(shares, out=running[1:])
        starts = rows.starts
        return cast(list[int], (running[starts[1:]] - running[starts[:-1]]).tolist())

    def _print_of(self, features: Features) -> int | None:
        """The print of an item not encoded yet (a repeated id's), or None for a shape no
        encoding accepts."""
        index, table = self.space.index, self._digest_table()
        total = 0
        try:
            pairs = (
                [(name, float(v)) for name, v in features.items() if v != 0]
                if isinstance(features, Mapping)
                else [(name, 1.0) for name in features]
            )
            for name, value in pairs:
                key = index.get(name)
                total += value_share(name_digest(name) if key is None else table[key], value)
        except (TypeError, ValueError, AttributeError):
            return None
        return total & PRINT_MASK

    def _same_item(self, fp: int | str, features: Features) -> bool:
        """True when ``features`` are those of the item remembered with print ``fp``."""
        if type(fp) is str:  # a text print, from a state of version 1
            return fp == fingerprint(features)
        return fp == self._print_of(features)

    # -- answers ---------------------------------------------------------------------------

    def _answer(self, item_id: str, votes: tuple[int, ...], duplicate: bool) -> dict[str, Any]:
        # Answers with the same votes share one (read-only) mapping of the votes.
        views = self._vote_views
        shown = views.get(votes)
        if shown is None:
            if len(views) >= VIEW_CACHE:
                views.clear()
            shown = views[votes] = {s.name: v for s, v in zip(self.seats, votes, strict=True)}
        return {
            "id": item_id,
            "label": votes[self.serve_index],
            "served_by": self.serve_name,
            "votes": shown,
            "duplicate": duplicate,
        }

    def _outcome(self, item_id: str, status: str, wrong: int, updated: int) -> dict[str, Any]:
        # Outcomes with the same bits share one (read-only) mapping of the learners.
        views = self._outcome_views
        key = (wrong, updated)
        shown = views.get(key)
        if shown is None:
            if len(views) >= VIEW_CACHE:
                views.clear()
            shown = views[key] = {
                s.name: {"wrong": bool(wrong >> i & 1), "updated": bool(updated >> i & 1)}
                for i, s in enumerate(self.seats)
            }
        return {"id": item_id, "status": status, "learners": shown}

    def _not_pending(self, item_id: str, y: int) -> dict[str, Any]:
        r = self.resolved.get(item_id)
        if r is None:
            message = f"No prediction with id {item_id!r} is known on stream {self.name!r}."
            return {"id": item_id, "status": "unknown", "message": message}
        if r.kind == "expired":
            message = (
                f"The prediction {item_id!r} expired: its label did not come within "
                f"{self.label_wait:g} seconds. Send it as a labelled example instead."
            )
            return {"id": item_id, "status": "expired", "message": message}
        if r.label == y:
            return self._outcome(item_id, "duplicate", r.wrong, r.updated)
        message = f"Item {item_id!r} was already labelled {r.label}; got {y}."
        return {"id": item_id, "status": "conflict", "message": message}

    def _reused(self, item_id: str, when: str) -> Conflict:
        return Conflict(
            f"Item id {item_id!r} was used {when} with other features or for another purpose; "
            "an id names one item.",
            field="id",
            rule="an id names one item",
            value=item_id,
        )

    # -- views -----------------------------------------------------------------------------

    def describe(self) -> dict[str, Any]:
        config = self.config
        return {
            "stream": self.name,
            "features": config["features"],
            "known_features": len(self.space),
            "learners": [
                {"name": s["name"], "kind": s["kind"], **s["params"]} for s in config["learners"]
            ],
            "serve": config["serve"],
            "label_wait_seconds": self.label_wait,
            "on_exceed": self.policy,
            "near": config["near"],
            "webhook": config["webhook"],
            "created": self.created,
            "pending": len(self.pending),
        }

    def ledger(self) -> dict[str, Any]:
        seats = [seat.view(self.last_t) for seat in self.seats]
        alerts = sorted((a for s in self.seats for a in s.alerts), key=lambda a: a["at"])
        return {
            "stream": self.name,
            "serve": self.seats[self.serve_index].name,
            "pending": len(self.pending),
            "expired": self.counts["expired"],
            "max_outstanding": max(s.max_outstanding for s in self.seats),
            "alerts": alerts[-100:],
            "learners": seats,
        }

    def compare(self) -> dict[str, Any]:
        rows = []
        for seat in self.seats:
            ceiling = seat.learner.ceiling()
            b, c = seat.only_this_wrong, seat.only_served_wrong
            rows.append(
                {
                    "name": seat.name,
                    "served_mistakes": seat.vote_wrong,
                    "updates": seat.total_updates,
                    "state": seat.state(ceiling),
                    "compared": seat.compared,
                    "only_this_wrong": b,
                    "only_served_wrong": c,
                    "p_value": mcnemar_exact(b, c),
                }
            )
        rows.sort(key=lambda r: (r["served_mistakes"], r["name"]))
        return {"serve": self.seats[self.serve_index].name, "learners": rows}

    # -- plain data ------------------------------------------------------------------------

    def to_state(self) -> dict[str, Any]:
        """Everything the log has built, as JSON-safe data (never pickled)."""
        return {
            "version": STATE_VERSION,
            "config": self.config,
            "created": self.created,
            "last_t": self.last_t,
            "space": self.space.to_state(),
            "seats": [seat.to_state() for seat in self.seats],
            "pending": [
                [
                    item_id,
                    p.t,
                    list(p.enc.keys),
                    None if p.enc.vals is None else list(p.enc.vals),
                    list(p.votes),
                    list(p.epochs),
                    p.fp,
                ]
                for item_id, p in self.pending.items()
            ],
            "resolved": [[item_id, *r.to_list()] for item_id, r in self.resolved.items()],
            "counts": dict(self.counts),
            "delay": {"buckets": list(self.delay_buckets), "sum": self.delay_sum},
        }

    @classmethod
    def from_state(
        cls, state: Mapping[str, Any], *, history_points: int, max_remembered: int
    ) -> Stream:
        if state.get("version") not in (1, STATE_VERSION):  # 1: text prints
            raise ValueError(f"unknown stream snapshot version {state.get('version')!r}")
        stream = cls(
            dict(state["config"]),
            float(state["created"]),
            history_points=history_points,
            max_remembered=max_remembered,
        )
        stream.last_t = float(state["last_t"])
        stream.space.adopt(state["space"]["names"])
        stream._digest_table()  # now, at the restart, rather than in the first write after it
        for seat, seat_state in zip(stream.seats, state["seats"], strict=True):
            seat.restore(seat_state, stream.space)
        stream.epochs = tuple(s.epoch for s in stream.seats)
        interned: dict[tuple[int, ...], tuple[int, ...]] = {stream.epochs: stream.epochs}
        for item_id, t, keys, vals, votes, epochs, fp in state["pending"]:
            enc = Encoded(
                [int(k) for k in keys], None if vals is None else [float(v) for v in vals]
            )
            key = tuple(epochs)
            stream._wait(
                Pending(item_id, float(t), enc, tuple(votes), interned.setdefault(key, key), fp)
            )
        for item_id, *rest in state["resolved"]:
            stream._remember(item_id, Resolved.from_list(rest))
        stream.counts = {k: int(v) for k, v in state["counts"].items()}
        stream.delay_buckets = [int(v) for v in state["delay"]["buckets"]]
        stream.delay_sum = float(state["delay"]["sum"])
        return stream
