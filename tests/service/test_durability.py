"""Durability: a restart (clean or after a crash) replays to the ledger that was acknowledged."""

from __future__ import annotations

import json
import random
import shutil
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import pytest

from service import store as store_module
from service.store import FILE_NAME, WALSYNC, Store
from tests.service.conftest import MakeApp
from tests.service.harness import Clock, Running, running

PANEL = [
    {"name": "mono", "kind": "elimination"},
    {"name": "neg", "kind": "elimination", "negations": True},
    {"name": "perc", "kind": "perceptron", "margin": 0.5},
    {"name": "pa", "kind": "passive-aggressive"},
    {"name": "win", "kind": "winnow"},
]


def create(service: Running, name: str, features: Any = 12, **extra: Any) -> None:
    body = {"stream": name, "features": features, "learners": PANEL, "label_wait_seconds": 50,
            **extra}  # fmt: skip
    response = service.post("/v1/streams", json=body)
    assert response.status_code == 201, response.text


def drive(service: Running, clock: Clock, name: str, seed: int, steps: int) -> None:
    """A noisy stream: predicts, late and lost labels, repeats, examples, time passing."""
    rng = random.Random(seed)
    url = f"/v1/streams/{name}"
    waiting: list[tuple[str, int]] = []
    for step in range(steps):
        flags = sorted({f"f{rng.randrange(8)}" for _ in range(rng.randrange(1, 5))})
        label = int("f1" in flags and "f2" in flags) ^ (rng.random() < 0.1)
        roll = rng.random()
        if roll < 0.55:
            item: Any = (
                flags if rng.random() < 0.5 else {f: rng.choice([1, 0.5, 0.25]) for f in flags}
            )
            response = service.post(
                f"{url}/predict", json={"id": f"{name}-{step}", "features": item}
            )
            assert response.status_code == 200, response.text
            if rng.random() < 0.9:  # some labels never come
                waiting.append((f"{name}-{step}", label))
        elif roll < 0.8 and waiting:
            item_id, y = waiting.pop(rng.randrange(len(waiting)))
            response = service.post(f"{url}/feedback", json={"id": item_id, "label": y})
            assert response.status_code in (200, 404, 410), response.text  # 404: forgotten
            if rng.random() < 0.2:  # a retry
                service.post(f"{url}/feedback", json={"id": item_id, "label": y})
        elif roll < 0.9:
            batch = [{"features": flags, "label": label}, {"features": flags[:1], "label": 0}]
            assert service.post(f"{url}/examples", json={"items": batch}).status_code == 200
        else:
            clock.advance(rng.choice([1, 5, 20]))


def observe(service: Running) -> dict[str, Any]:
    """Everything the ledger shows, plus every learner's full state and the stored space."""
    out: dict[str, Any] = {}
    for name in sorted(service.registry.streams):
        stream = service.registry.get(name)
        out[name] = {
            "ledger": service.get(f"/v1/streams/{name}/ledger").json(),
            "compare": service.get(f"/v1/streams/{name}/compare").json(),
            "describe": service.get(f"/v1/streams/{name}").json(),
            "learners": [seat.learner.to_state(include_space=False) for seat in stream.seats],
            "space": stream.space.to_state(),
            "pending": sorted(stream.pending),
            "resolved": sorted(stream.resolved),
        }
    return out


def test_a_clean_restart_restores_the_exact_ledger(make_app: MakeApp, clock: Clock) -> None:
    with running(make_app()) as service:
        create(service, "north")
        create(service, "south", features=[f"f{i}" for i in range(8)], on_exceed="restart")
        drive(service, clock, "north", seed=1, steps=150)
        drive(service, clock, "south", seed=2, steps=150)
        before = observe(service)
    # The shutdown wrote snapshots; the log after them is empty.
    with running(make_app()) as service:
        assert observe(service) == before


def test_replay_from_snapshots_and_the_log_after_them(make_app: MakeApp, clock: Clock) -> None:
    with running(make_app(snapshot_every_events=7)) as service:
        create(service, "north")
        drive(service, clock, "north", seed=3, steps=200)
        before = observe(service)
        store = service.registry.store
        assert store.commits > 0
    with running(make_app(snapshot_every_events=7)) as service:
        assert observe(service) == before


def crash_copy(data_dir: Path, target: Path) -> None:
    """What a kill -9 leaves: the database and its WAL as committed, no shutdown snapshot."""
    target.mkdir(parents=True)
    for suffix in ("", "-wal"):
        source = data_dir / (FILE_NAME + suffix)
        if source.exists():
            shutil.copy(source, target / (FILE_NAME + suffix))


@pytest.mark.parametrize("snapshot_every", [10_000, 9])
def test_after_a_crash_the_log_replays_to_the_acknowledged_ledger(
    make_app: MakeApp, clock: Clock, data_dir: Path, tmp_path: Path, snapshot_every: int
) -> None:
    crashed = tmp_path / "crashed"
    with running(make_app(snapshot_every_events=snapshot_every)) as service:
        create(service, "north", on_exceed="restart")
        drive(service, clock, "north", seed=4, steps=200)
        acknowledged = observe(service)
        crash_copy(data_dir, crashed)
    with running(make_app(data_dir=crashed, snapshot_every_events=snapshot_every)) as service:
        assert observe(service) == acknowledged


def test_an_answer_waits_for_its_commit(service: Running) -> None:
    create(service, "north")
    store = service.registry.store
    gate = threading.Event()
    original = store._commit

    def held(batch: Any) -> None:
        gate.wait(10)
        original(batch)

    store._commit = held  # type: ignore[method-assign]
    try:
        outcome: dict[str, Any] = {}

        def send() -> None:
            outcome["response"] = service.post(
                "/v1/streams/north/predict", json={"id": "held", "features": ["f1"]}
            )

        sender = threading.Thread(target=send)
        sender.start()
        deadline = time.monotonic() + 5
        while "held" not in service.registry.get("north").pending and time.monotonic() < deadline:
            time.sleep(0.01)
        assert "held" in service.registry.get("north").pending  # applied ...
        sender.join(0.3)
        assert "response" not in outcome  # ... but not answered before the commit
        gate.set()
        sender.join(10)
        assert outcome["response"].status_code == 200
    finally:
        gate.set()
        store._commit = original  # type: ignore[method-assign]
    rows = sqlite3.connect(service.registry.store.path).execute(
        "SELECT count(*) FROM events WHERE body LIKE '%held%'"
    )
    assert rows.fetchone()[0] == 1


def test_concurrent_writes_share_commits_and_replay_in_order(
    make_app: MakeApp, data_dir: Path
) -> None:
    with running(make_app()) as service:
        create(service, "north")
        calls = [
            (
                "POST",
                "/v1/streams/north/predict",
                {"json": {"id": f"c{i}", "features": [f"f{i % 7}"]}},
            )
            for i in range(60)
        ]
        commits_before = service.registry.store.commits
        responses = service.concurrently(calls)
        assert all(r.status_code == 200 for r in responses)
        commits = service.registry.store.commits - commits_before
        labels = [
            ("POST", "/v1/streams/north/feedback", {"json": {"id": f"c{i}", "label": i % 2}})
            for i in range(60)
        ]
        assert all(r.status_code == 200 for r in service.concurrently(labels))
        before = observe(service)
        print(f"60 concurrent predicts took {commits} commits")
    with running(make_app()) as service:
        assert observe(service) == before


def test_a_failed_store_answers_503_and_is_not_ready(service: Running) -> None:
    create(service, "north")
    store = service.registry.store

    def broken(batch: Any) -> None:
        raise sqlite3.OperationalError("disk I/O error")

    store._commit = broken  # type: ignore[method-assign]
    response = service.post("/v1/streams/north/predict", json={"features": ["f1"]})
    assert response.status_code == 503
    assert response.json()["error"]["field"] == "store"
    assert service.post("/v1/streams/north/predict", json={"features": ["f2"]}).status_code == 503
    assert service.get("/readyz").status_code == 503


def test_nothing_is_pickled(make_app: MakeApp, clock: Clock, data_dir: Path) -> None:
    """Every stored row is JSON text."""
    import json

    with running(make_app(snapshot_every_events=5)) as service:
        create(service, "north")
        drive(service, clock, "north", seed=5, steps=40)
    conn = sqlite3.connect(data_dir / FILE_NAME)
    rows = conn.execute("SELECT body FROM events UNION ALL SELECT body FROM snapshots").fetchall()
    assert rows
    for (body,) in rows:
        assert isinstance(body, str)
        json.loads(body)


def test_snapshots_shorten_the_log(make_app: MakeApp, clock: Clock, data_dir: Path) -> None:
    app = make_app(snapshot_every_events=10, snapshot_interval_seconds=60, snapshot_size_ratio=0)
    with running(app) as service:
        create(service, "north")
        for i in range(25):
            service.post("/v1/streams/north/predict", json={"id": f"s{i}", "features": ["f1"]})
        conn = sqlite3.connect(data_dir / FILE_NAME)
        service.registry.store.barrier().result(5)
        # 26 events (create + 25 predicts): snapshots at 10 and 20 leave the last 6 in the log.
        assert conn.execute("SELECT count(*) FROM events").fetchone()[0] == 6
        # A changed stream is snapshotted by the sweeper once the interval has passed.
        service.registry.sweep()
        service.registry.store.barrier().result(5)
        assert conn.execute("SELECT count(*) FROM events").fetchone()[0] == 6
        clock.advance(61)
        service.registry.sweep()
        service.registry.store.barrier().result(5)
        assert conn.execute("SELECT count(*) FROM events").fetchone()[0] == 0
        (seq,) = conn.execute("SELECT seq FROM snapshots WHERE stream = 'north'").fetchone()
        assert seq == service.registry.get("north").last_seq


def test_a_snapshot_waits_until_the_log_since_the_last_is_as_long_as_itself(
    make_app: MakeApp, clock: Clock, data_dir: Path
) -> None:
    """With predictions waiting, a snapshot holds them all; it is written once the items logged
    since the last snapshot reach as many (snapshot_size_ratio = 1), not every N events, so its
    cost per logged item stays bounded; batches count by their items. The sweeper's snapshot
    after the interval waits the same way."""
    app = make_app(
        snapshot_every_events=4,
        snapshot_every_items=10**6,
        snapshot_size_ratio=1,
        snapshot_interval_seconds=60,
    )
    with running(app) as service:
        create(service, "north", label_wait_seconds=10**6)
        conn = sqlite3.connect(data_dir / FILE_NAME)

        def logged() -> int:
            service.registry.store.barrier().result(5)
            return int(conn.execute("SELECT count(*) FROM events").fetchone()[0])

        # Events 1..3 (create + 2 predicts of 10): fewer than 4 events, no snapshot.
        for k in range(2):
            items = [{"id": f"a{k}-{j}", "features": ["f1"]} for j in range(10)]
            assert service.post("/v1/streams/north/predict", json={"items": items}).is_success
        assert logged() == 3
        # Event 4 (30 items since the start >= 30 waiting): the snapshot is due and taken.
        items = [{"id": f"a2-{j}", "features": ["f1"]} for j in range(10)]
        assert service.post("/v1/streams/north/predict", json={"items": items}).is_success
        assert logged() == 0
        # Four single predictions: 4 events, but 4 items < 34 waiting: no snapshot yet.
        for j in range(4):
            service.post("/v1/streams/north/predict", json={"id": f"b{j}", "features": ["f2"]})
        assert logged() == 4
        clock.advance(61)
        service.registry.sweep()
        assert logged() == 4
        # 20 labels: 24 items since the snapshot < 34 ids held (14 waiting, 20 remembered).
        labels = [{"id": f"a{k}-{j}", "label": 1} for k in range(3) for j in range(10)]
        response = service.post("/v1/streams/north/feedback", json={"items": labels[:20]})
        assert response.is_success
        assert logged() == 5
        # 10 more: 34 items since >= 34 held (4 waiting, 30 remembered): taken.
        response = service.post("/v1/streams/north/feedback", json={"items": labels[20:]})
        assert response.is_success
        assert logged() == 0


def test_batches_are_snapshotted_by_their_items(make_app: MakeApp, data_dir: Path) -> None:
    """A few large events count by their items (snapshot_every_items), not as single events,
    so the log a crash must replay stays short under batch traffic."""
    app = make_app(
        snapshot_every_events=1000,
        snapshot_every_items=25,
        snapshot_size_ratio=0,
        snapshot_interval_seconds=3600,
    )
    with running(app) as service:
        create(service, "north")
        conn = sqlite3.connect(data_dir / FILE_NAME)
        counts = []
        for k in range(3):
            items = [{"id": f"a{k}-{j}", "features": ["f1"]} for j in range(10)]
            assert service.post("/v1/streams/north/predict", json={"items": items}).is_success
            service.registry.store.barrier().result(5)
            counts.append(conn.execute("SELECT count(*) FROM events").fetchone()[0])
        # 10 and 20 items: no snapshot (2, then 3 events logged); 30 >= 25: taken.
        assert counts == [2, 3, 0]


@pytest.mark.parametrize("setting", ["full", "normal"])
def test_the_durability_setting_decides_whether_writes_wait_for_a_wal_sync(
    make_app: MakeApp, setting: str
) -> None:
    """SQLite's synchronous=FULL in WAL mode is NORMAL plus a sync of the WAL file after each
    commit (sqlite.org/pragma.html#pragma_synchronous). The store commits with NORMAL (the
    pragma reads 1) and, for ``full``, answers a write only after that sync: through the helper
    process on the event loop's thread, by the writing thread elsewhere."""
    with running(make_app(durability=setting)) as service:
        store = service.registry.store
        conn = store._conn
        assert conn.execute("PRAGMA synchronous").fetchone()[0] == 1
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        body = {"stream": "s", "features": 4, "learners": [{"name": "p", "kind": "perceptron"}]}
        assert service.post("/v1/streams", json=body).status_code == 201
        for i in range(5):
            answer = service.post("/v1/streams/s/predict", json={"id": f"p{i}", "features": ["a"]})
            assert answer.status_code == 200
        written, before = store._written, store.syncs
        if setting == "full":
            assert store._helper is not None and store._helper.poll() is None
            assert store._durable == written >= 6  # every acknowledged write was synced
            store.barrier().result(5)  # from this thread (not the loop's): synced here if due
            assert store.syncs == before
        else:
            assert store._helper is None and store.syncs == 0


def test_a_write_from_another_thread_syncs_itself_and_what_waits_before_it(
    tmp_path: Path,
) -> None:
    store = Store(tmp_path)
    store.open()
    try:
        before = store.syncs
        futures = [store.append("s", {"type": "noop", "n": i})[1] for i in range(3)]
        assert all(f.done() and f.result() == i + 1 for i, f in enumerate(futures))
        assert store.syncs == before + 3  # no loop: each write synced by its own thread
        assert store.barrier().result() == 4 and store.syncs == before + 3  # nothing new
    finally:
        store.close()


def test_the_sync_helper_answers_the_largest_count_it_read(tmp_path: Path) -> None:
    wal = tmp_path / "x-wal"
    wal.write_bytes(b"frames")
    helper = subprocess.Popen(
        [sys.executable, "-I", "-S", str(WALSYNC), str(wal)],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
    )
    out, _ = helper.communicate((3).to_bytes(8, "big") + (7).to_bytes(8, "big"), timeout=10)
    assert helper.returncode == 0
    assert len(out) % 8 == 0 and int.from_bytes(out[-8:], "big") == 7


def test_a_snapshot_text_reads_back_as_the_state_and_never_holds_nan() -> None:
    # The snapshot's text is orjson's (the json module's past 64-bit integers); the json module
    # reads either back to the same state. A learner state holding NaN or infinity is refused
    # (ValueError), as json.dumps(allow_nan=False) refuses it: never written as null.
    from service.registry import state_text
    from service.streams import Stream

    config = {
        "stream": "s",
        "features": 10,
        "learners": [
            {"name": "p", "kind": "perceptron", "params": {}},
            {"name": "w", "kind": "weighted-majority", "params": {}},
        ],
        "serve": "p",
        "label_wait_seconds": 60.0,
        "on_exceed": "keep",
        "near": 0.8,
        "webhook": None,
    }
    stream = Stream(config, 0.0, history_points=10, max_remembered=100)
    stream.apply_examples(1.0, [("a", {"x": 0.25, "y": 1e-7}, 1), ("b", ["y"], 0)])
    stream.apply_predict(2.0, [("c", ["x", "z"])])
    state = stream.to_state()
    assert json.loads(state_text(state)) == json.loads(json.dumps(state))
    state["created"] = 10**30  # past what orjson writes
    assert json.loads(state_text(state))["created"] == 10**30
    for bad in (float("nan"), float("inf")):
        state["seats"][0]["learner"]["learned"]["b"] = bad
        with pytest.raises(ValueError):
            state_text(state)


def test_checkpoints_run_on_their_own_thread_once_enough_was_written(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """SQLite's automatic checkpoint is off on the writing connection (it would run inside
    whichever write crosses its threshold, perhaps the event loop's); the store's checkpoint
    thread copies the WAL into the database file instead, after about CHECKPOINT_PAGES pages, and
    the writes after it copy the rest, so that the WAL file starts over rather than grows."""
    monkeypatch.setattr(store_module, "CHECKPOINT_PAGES", 30)
    store = Store(tmp_path)
    store.open()
    try:
        assert store._conn.execute("PRAGMA wal_autocheckpoint").fetchone()[0] == 0
        database = tmp_path / FILE_NAME
        before = database.stat().st_size
        for i in range(40):  # about 2,000 bytes each: past the threshold once
            store.append("s", {"type": "noop", "n": i, "pad": "x" * 2000})
        deadline = time.monotonic() + 10
        while database.stat().st_size <= before and time.monotonic() < deadline:
            time.sleep(0.02)
        assert database.stat().st_size > before  # pages copied out of the WAL
        wal = store.wal_path.stat().st_size
        for i in range(400):  # many thresholds' worth, written while checkpoints run
            store.append("s", {"type": "noop", "n": i, "pad": "x" * 2000})
        assert store.wal_path.stat().st_size < wal + 20 * 30 * 4096
    finally:
        store.close()


def test_a_sync_helper_that_dies_stops_the_store_and_nothing_is_acknowledged_after(
    make_app: MakeApp,
) -> None:
    """If the WAL sync helper ends (killed, or a sync failed), no write can be made durable:
    the store stops, writes are refused with 503 and readiness fails, as for a failed commit."""
    with running(make_app(durability="full")) as service:
        body = {"stream": "s", "features": 4, "learners": [{"name": "p", "kind": "perceptron"}]}
        assert service.post("/v1/streams", json=body).status_code == 201
        store = service.registry.store
        store._helper.kill()
        deadline = time.monotonic() + 10
        while store.failed is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert store.failed is not None
        answer = service.post("/v1/streams/s/predict", json={"id": "p1", "features": ["a"]})
        assert answer.status_code == 503, answer.text
        assert answer.json()["error"]["field"] == "store"
        assert service.get("/readyz").status_code == 503
