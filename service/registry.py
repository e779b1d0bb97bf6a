"""The stream registry: checks requests, applies them to streams in log order, and logs them.

Each write goes: check the request against the limits (nothing changes on failure), take the
stream's lock, apply it to the stream (which raises before changing anything if the request
conflicts with the state), append its event to the store, release the lock, and return the
result with a future that resolves when the event is committed. The caller answers only then.
Holding the lock from apply to append makes the log order the apply order.

Requests that change nothing (a retried predict or label) are not logged; their future waits for
everything queued before them, so a retry never answers before the original is durable.

A background sweeper expires waiting predictions and snapshots streams that changed a while ago
(``snapshot_interval_seconds``). A stream is also snapshotted on the write path after
``snapshot_every_events`` events or ``snapshot_every_items`` items, whichever comes first. Either
way, not before the items logged since its last snapshot reach ``snapshot_size_ratio`` times the
ids the snapshot holds (its waiting predictions and remembered ids). A snapshot costs time in
proportion to those ids, so the waiting keeps its cost per item bounded however many
predictions wait for their labels; and the log after a snapshot (the replay after a crash) is
then never much longer than the snapshot itself.
"""

from __future__ import annotations

import json
import logging
import threading
import uuid
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from typing import Any

import learners
from learners import FeatureSpace, LearnerError
from service.bodies import contains_non_finite
from service.errors import (
    Conflict,
    Gone,
    InvalidInput,
    NotFound,
    ServiceError,
    Unavailable,
    from_learner,
)
from service.schemas import StreamCreate
from service.settings import Settings
from service.store import Store, StoreFailed, dumps
from service.streams import Features, ItemError, Stream

log = logging.getLogger("mistake_ledger.registry")

AlertHook = Callable[[str, str, dict[str, Any]], None]


class Registry:
    """All streams of this process, their locks, and the store behind them."""

    def __init__(
        self,
        settings: Settings,
        store: Store,
        clock: Callable[[], float],
        *,
        allowed_webhook: Callable[[str], bool] = lambda url: False,
    ) -> None:
        self.settings = settings
        self.store = store
        self.clock = clock
        self.allowed_webhook = allowed_webhook
        self.on_alert: AlertHook | None = None
        self.streams: dict[str, Stream] = {}
        self.lock = threading.Lock()
        self.ready = False
        self._stop = threading.Event()
        self._sweeper: threading.Thread | None = None

    # -- life cycle ------------------------------------------------------------------------

    def open(self) -> None:
        """Open the store, restore every stream from its snapshot and the events after it."""
        self.store.open()
        snapshots = self.store.snapshots()
        for name, (seq, state) in snapshots.items():
            stream = self._stream_from_state(state)
            stream.last_seq = seq
            self.streams[name] = stream
        replayed = 0
        for seq, name, event in self.store.events():
            known = self.streams.get(name)
            if event["type"] in ("create", "import"):
                if known is not None and known.last_seq >= seq:
                    continue
                stream = self._restored(event)
                self.streams[name] = stream
            elif known is None or known.last_seq >= seq:
                continue
            else:
                stream = known
                stream.apply(event)
                stream.new_alerts.clear()
            stream.last_seq = seq
            stream.unsnapshotted += 1
            stream.unsnapshotted_items += _item_count(event)
            replayed += 1
        for stream in self.streams.values():
            if self._snapshot_due(stream):
                with stream.lock:
                    self._snapshot(stream)
        log.info("restored %d streams, replayed %d events", len(self.streams), replayed)
        self.ready = True

    def start_sweeper(self) -> None:
        self._sweeper = threading.Thread(target=self._sweep_loop, name="sweeper", daemon=True)
        self._sweeper.start()

    def close(self, snapshot: bool = True) -> None:
        """Stop the sweeper, snapshot every stream (unless told not to) and close the store."""
        self.ready = False
        self._stop.set()
        if self._sweeper is not None:
            self._sweeper.join()
            self._sweeper = None
        if snapshot and self.store.failed is None:
            for stream in list(self.streams.values()):
                with stream.lock:
                    if stream.unsnapshotted and not stream.deleted:
                        self._snapshot(stream)
        self.store.close()

    def _sweep_loop(self) -> None:
        while not self._stop.wait(self.settings.sweep_interval_seconds):
            try:
                self.sweep()
            except Exception:
                log.exception("sweep failed")

    def sweep(self) -> None:
        """Expire waiting predictions and snapshot streams that changed a while ago."""
        for stream in list(self.streams.values()):
            with stream.lock:
                if stream.deleted:
                    continue
                now = stream.advance(self.clock())
                if (
                    stream.unsnapshotted
                    and now - stream.snapshot_t >= self.settings.snapshot_interval_seconds
                    and self._worth_snapshot(stream)
                    and self.store.failed is None
                ):
                    self._snapshot(stream)

    def _snapshot(self, stream: Stream) -> None:
        self.store.snapshot(stream.name, stream.last_seq, state_text(stream.to_state()))
        stream.unsnapshotted = 0
        stream.unsnapshotted_items = 0
        stream.snapshot_t = stream.last_t

    def _snapshot_due(self, stream: Stream) -> bool:
        """Whether the write path snapshots the stream now (see the module docstring)."""
        settings = self.settings
        logged = stream.unsnapshotted_items
        if (
            stream.unsnapshotted < settings.snapshot_every_events
            and logged < settings.snapshot_every_items
        ):
            return False
        return self._worth_snapshot(stream)

    def _worth_snapshot(self, stream: Stream) -> bool:
        """Whether the items logged since the last snapshot reach ``snapshot_size_ratio`` times
        the ids a snapshot would hold."""
        held = len(stream.pending) + len(stream.resolved)
        return stream.unsnapshotted_items >= self.settings.snapshot_size_ratio * held

    def _new_stream(self, config: dict[str, Any], t: float) -> Stream:
        return Stream(
            config,
            t,
            history_points=self.settings.history_points,
            max_remembered=self.settings.max_remembered_ids,
        )

    def _restored(self, event: dict[str, Any]) -> Stream:
        """The stream a logged ``create`` or ``import`` event begins (see ``service.transfer``)."""
        if event["type"] == "import":
            return self._stream_from_state(event["state"])
        return self._new_stream(event["config"], float(event["t"]))

    def _stream_from_state(self, state: dict[str, Any]) -> Stream:
        return Stream.from_state(
            state,
            history_points=self.settings.history_points,
            max_remembered=self.settings.max_remembered_ids,
        )

    # -- streams ---------------------------------------------------------------------------

    def get(self, name: str) -> Stream:
        stream = self.streams.get(name)
        if stream is None:
            raise NotFound(
                f"No stream {name!r}.", field="stream", rule="an existing stream", value=name
            )
        return stream

    def create(self, body: StreamCreate) -> tuple[dict[str, Any], Future[int]]:
        config = self._config(body)
        with self.lock:
            self._room_for(body.stream, f"Stream {body.stream!r} exists already.")
            t = self.clock()
            stream = self._new_stream(config, t)
            with stream.lock:
                self.streams[body.stream] = stream
                event = {"type": "create", "stream": body.stream, "t": t, "config": config}
                future = self._log(stream, event)
                return stream.describe(), future

    def _room_for(self, name: str, taken: str) -> None:
        """Refuse a new stream (under ``self.lock``): its id is taken (``taken`` says so), the
        limit on streams is reached, or the store cannot take writes."""
        if name in self.streams:
            raise Conflict(taken, field="stream", rule="a new stream id", value=name)
        if len(self.streams) >= self.settings.max_streams:
            raise Conflict(
                f"This service holds its limit of {self.settings.max_streams} streams; "
                "delete one or raise MISTAKE_LEDGER_MAX_STREAMS.",
                field="stream",
                rule=f"at most {self.settings.max_streams} streams",
                value=len(self.streams) + 1,
            )
        self._writable()

    def _config(self, body: StreamCreate) -> dict[str, Any]:
        """Check a new stream's panel and return its configuration as plain data."""
        limit = self.settings.max_learners
        if len(body.learners) > limit:
            raise InvalidInput(
                f"A panel holds at most {limit} learners; got {len(body.learners)}.",
                field="learners",
                rule=f"at most {limit} learners",
                value=len(body.learners),
            )
        try:
            space_spec: int | list[str] = body.features
            FeatureSpace(space_spec)
        except LearnerError as exc:
            raise from_learner(exc) from exc
        specs = []
        names: set[str] = set()
        for index, spec in enumerate(body.learners):
            where = f"learners[{index}]"
            if spec.name in names:
                raise InvalidInput(
                    f"Learner names must be unique in a stream; {spec.name!r} appears twice.",
                    field=f"{where}.name",
                    rule="unique in the stream",
                    value=spec.name,
                )
            names.add(spec.name)
            params = spec.params()
            for key, value in params.items():
                if contains_non_finite(value):
                    raise InvalidInput(
                        f"Parameter {key!r} of learner {spec.name!r} must be finite; "
                        f"got {value!r}.",
                        field=f"{where}.{key}",
                        rule="finite number",
                        value=repr(value),
                    )
            try:
                learners.make(spec.kind, features=FeatureSpace(space_spec), **params)
            except LearnerError as exc:
                raise from_learner(exc, where, f"Learner {spec.name!r}") from exc
            specs.append({"name": spec.name, "kind": spec.kind, "params": params})
        serve = body.serve if body.serve is not None else specs[0]["name"]
        if serve not in names:
            raise InvalidInput(
                f"The serving learner {serve!r} is not in the panel; it has "
                + ", ".join(repr(s["name"]) for s in specs)
                + ".",
                field="serve",
                rule="the name of a learner in the panel",
                value=serve,
            )
        if body.webhook is not None and not self.allowed_webhook(body.webhook):
            raise InvalidInput(
                f"The webhook {body.webhook!r} is not in this service's allow list "
                "(MISTAKE_LEDGER_WEBHOOK_ALLOW).",
                field="webhook",
                rule="a URL in the webhook allow list",
                value=body.webhook,
            )
        return {
            "stream": body.stream,
            "features": space_spec,
            "learners": specs,
            "serve": serve,
            "label_wait_seconds": float(body.label_wait_seconds),
            "on_exceed": body.on_exceed,
            "near": float(body.near),
            "webhook": body.webhook,
        }

    # -- moving a stream between shards (service.transfer) ---------------------------------

    def export(self, name: str) -> tuple[str, int, float, Future[int]]:
        """The stream's state as of now (JSON text, the snapshot format), its last log position,
        the time, and a future that resolves once every write the state holds is committed."""
        stream = self.get(name)
        with stream.lock:
            self._usable(stream)
            t = stream.advance(self.clock())
            # Written out under the lock: to_state shares some lists with the live stream.
            text = state_text(stream.to_state())
            return text, stream.last_seq, t, self.store.barrier()

    def adopt(self, stream: Stream) -> tuple[dict[str, Any], Future[int]]:
        """Add a stream restored from an exported state (checked by the caller): log it as one
        ``import`` event carrying the state, then snapshot it, so the log stays short."""
        with self.lock:
            self._room_for(
                stream.name,
                f"Stream {stream.name!r} exists already on this service; delete it first "
                "to replace it.",
            )
            with stream.lock:
                event = {
                    "type": "import",
                    "stream": stream.name,
                    "t": self.clock(),
                    "state": stream.to_state(),
                }
                future = self._log(stream, event)
                self.streams[stream.name] = stream
                if stream.unsnapshotted:
                    self._snapshot(stream)
                return stream.describe(), future

    def delete(self, name: str) -> Future[int]:
        with self.lock:
            stream = self.get(name)
            with stream.lock:
                self._writable()
                del self.streams[name]
                stream.deleted = True
                return self.store.drop(name)

    def describe(self, name: str) -> dict[str, Any]:
        stream = self.get(name)
        with stream.lock:
            stream.advance(self.clock())
            return stream.describe()

    def ledger(self, name: str) -> dict[str, Any]:
        stream = self.get(name)
        with stream.lock:
            stream.advance(self.clock())
            return stream.ledger()

    def compare(self, name: str) -> dict[str, Any]:
        stream = self.get(name)
        with stream.lock:
            return stream.compare()

    # -- writes ----------------------------------------------------------------------------
    # Items come as the routes read them (service.bodies or the models of service.schemas):
    # their shapes are checked, so the streams do not check them again.

    def predict(
        self, name: str, items: Sequence[tuple[str | None, Features]], batch: bool
    ) -> tuple[list[dict[str, Any]], Future[int]]:
        self._check_batch(len(items))
        self._check_features([features for _, features in items], batch)
        ids = [item_id or uuid.uuid4().hex for item_id, _ in items]
        pairs = [(item_id, features) for item_id, (_, features) in zip(ids, items, strict=True)]
        stream = self.get(name)
        with stream.lock:
            self._usable(stream)
            t = max(self.clock(), stream.last_t)
            try:
                results = stream.apply_predict(t, pairs, checked=True)  # read by the routes
            except ItemError as exc:
                raise _located(exc, batch) from exc.error
            fresh = [
                {"id": item_id, "features": features}
                for (item_id, features), r in zip(pairs, results, strict=True)
                if not r["duplicate"]
            ]
            return results, self._log_items(stream, "predict", name, t, fresh)

    def feedback(
        self, name: str, items: Sequence[tuple[str, int]], batch: bool
    ) -> tuple[list[dict[str, Any]], Future[int]]:
        self._check_batch(len(items))
        stream = self.get(name)
        with stream.lock:
            self._usable(stream)
            t = max(self.clock(), stream.last_t)
            results = stream.apply_feedback(t, list(items))
            applied = [
                {"id": item_id, "label": label}
                for (item_id, label), r in zip(items, results, strict=True)
                if r["status"] == "applied"
            ]
            for r in results:
                if r["status"] == "duplicate":
                    stream.volatile["duplicates"] += 1
                elif r["status"] == "conflict":
                    stream.volatile["conflicts"] += 1
            if not batch:
                _raise_single(results[0], items[0][1])
            return results, self._log_items(stream, "feedback", name, t, applied)

    def examples(
        self, name: str, items: Sequence[tuple[str | None, Features, int]], batch: bool
    ) -> tuple[list[dict[str, Any]], Future[int]]:
        self._check_batch(len(items))
        self._check_features([features for _, features, _ in items], batch)
        triples = [(item_id or uuid.uuid4().hex, f, y) for item_id, f, y in items]
        stream = self.get(name)
        with stream.lock:
            self._usable(stream)
            t = max(self.clock(), stream.last_t)
            try:
                results = stream.apply_examples(t, triples, checked=True)  # read by the routes
            except ItemError as exc:
                raise _located(exc, batch) from exc.error
            fresh = [
                {"id": item_id, "features": f, "label": y}
                for (item_id, f, y), r in zip(triples, results, strict=True)
                if r["status"] == "applied"
            ]
            return results, self._log_items(stream, "examples", name, t, fresh)

    # -- helpers ---------------------------------------------------------------------------

    def _log_items(
        self, stream: Stream, kind: str, name: str, t: float, items: list[dict[str, Any]]
    ) -> Future[int]:
        """Log the items that changed the stream as one event (the stream's lock is held); when
        none did, log nothing and wait for everything queued before (a retry's future)."""
        if not items:
            return self.store.barrier()
        return self._log(stream, {"type": kind, "stream": name, "t": t, "items": items})

    def _log(self, stream: Stream, event: dict[str, Any]) -> Future[int]:
        """Append the event (the stream's lock is held) and hand its alerts over on commit."""
        try:
            seq, future = self.store.append(stream.name, event)
        except StoreFailed as exc:
            raise Unavailable(str(exc), field="store", rule="a working store") from exc
        stream.last_seq = seq
        stream.unsnapshotted += 1
        stream.unsnapshotted_items += _item_count(event)
        alerts, stream.new_alerts = stream.new_alerts, []
        webhook = stream.config.get("webhook")
        if alerts and webhook and self.on_alert is not None:
            hook = self.on_alert
            name = stream.name

            def deliver(done: Future[int]) -> None:
                if done.exception() is None:
                    for alert in alerts:
                        hook(webhook, name, alert)

            future.add_done_callback(deliver)
        if self._snapshot_due(stream):
            self._snapshot(stream)
        return future

    def _writable(self) -> None:
        if self.store.failed is not None:
            raise Unavailable(
                "The store failed; restart the service to recover from its log.",
                field="store",
                rule="a working store",
                value=None,
            )

    def _usable(self, stream: Stream) -> None:
        if stream.deleted:
            raise NotFound(
                f"No stream {stream.name!r}.",
                field="stream",
                rule="an existing stream",
                value=stream.name,
            )
        self._writable()

    def _check_batch(self, count: int) -> None:
        limit = self.settings.max_batch_items
        if count > limit:
            raise InvalidInput(
                f"A batch holds at most {limit} items; got {count}.",
                field="items",
                rule=f"at most {limit} items",
                value=count,
            )

    def _check_features(self, column: list[Features], batch: bool) -> None:
        limit = self.settings.max_features_per_item
        sizes = list(map(len, column))
        if sizes and max(sizes) > limit:
            index = next(i for i, size in enumerate(sizes) if size > limit)
            features = column[index]
            where = f"items[{index}].features" if batch else "features"
            raise InvalidInput(
                f"An item holds at most {limit} features; got {len(features)}.",
                field=where,
                rule=f"at most {limit} features",
                value=len(features),
            )


def state_text(state: dict[str, Any]) -> str:
    """A stream's state (``Stream.to_state``) as the JSON text of a snapshot or an export.

    Written as log records are (``service.store.dumps``: orjson, several times faster than the
    json module; a snapshot holds up the stream's requests while it is written). A snapshot
    never holds NaN or infinity: the learners' part, where a fault could put one, is checked
    first with the json module (allow_nan=False), which raises ValueError; the rest is
    validated input, clock times and counts.
    """
    json.dumps(state["seats"], allow_nan=False)
    return dumps(state)


def _located(exc: ItemError, batch: bool) -> ServiceError:
    """The item's error with its field under ``items[i]`` for a batch."""
    error = exc.error
    assert isinstance(error, ServiceError)
    if batch:
        error.field = f"items[{exc.index}].{error.field}"
    return error


def _raise_single(result: dict[str, Any], label: int) -> None:
    status = result["status"]
    item_id = result["id"]
    if status == "conflict":
        raise Conflict(result["message"], field="label", rule="the label given before", value=label)
    if status == "unknown":
        raise NotFound(result["message"], field="id", rule="a known prediction id", value=item_id)
    if status == "expired":
        raise Gone(result["message"], field="id", rule="a prediction still waiting", value=item_id)


def committed(future: Future[int]) -> None:
    """Raise Unavailable if a store future failed (for synchronous callers)."""
    exc = future.exception()
    if exc is not None:
        raise Unavailable(str(exc), field="store", rule="a working store") from exc


def _item_count(event: dict[str, Any]) -> int:
    """The items an event carries (predict, feedback, examples); 0 for the others."""
    items = event.get("items")
    return len(items) if isinstance(items, list) else 0


__all__ = ["Registry", "StoreFailed", "committed"]
