"""SQLite storage: an append-only event log, a snapshot per stream, and group commit.

The file is ``<data-dir>/ledger.sqlite3`` in WAL mode; ``synchronous=FULL`` by default (an
acknowledged write survives power loss), ``NORMAL`` on request (it survives a crash of the
process). Tables::

    events(seq INTEGER PRIMARY KEY, stream TEXT, body TEXT)     JSON event, in the order applied
    snapshots(stream TEXT PRIMARY KEY, seq INTEGER, body TEXT)  JSON state as of event ``seq``
    meta(key TEXT PRIMARY KEY, value TEXT)                      schema version

Group commit: callers :meth:`Store.append` an event and get a future. One writer thread takes
every job queued so far (up to a limit), writes them in one transaction, commits, and only then
resolves their futures; a request answers after its future resolves. A commit of events only is
one multi-row INSERT, its own transaction: SQLite then runs it, fsync included, in one call that
releases the GIL once. Each call into SQLite hands the GIL back to the event loop's thread, and
getting it again can take up to the interpreter's switch interval while that thread is busy, so
a commit made of many calls (BEGIN, each row, COMMIT) took 2-3 times its fsync under load
(benchmarks/service.py). Callers append while holding
the stream's lock, so sequence numbers (assigned here) follow the order events were applied.
A caller that knows more writes are about to come (the app: requests its event loop is about to
run) may :meth:`Store.hold` the next commit until it calls :meth:`Store.release`, so they share
one commit (one fsync) instead of each waiting for the previous one; a hold lasts at most
``HOLD_SECONDS``, and nothing waits when nobody holds.

A snapshot replaces the stream's previous one and deletes the stream's events up to its position
in the same transaction, so the log stays short. Everything is JSON; nothing is pickled.

If a commit fails, the store stops: every waiting and later job fails, and the service must be
restarted, which replays the log to the last committed event.
"""

from __future__ import annotations

import json
import logging
import sqlite3
import threading
import time
from collections import deque
from collections.abc import Iterator
from concurrent.futures import Future
from pathlib import Path
from typing import Any

import orjson

log = logging.getLogger("mistake_ledger.store")

SCHEMA_VERSION = "1"
FILE_NAME = "ledger.sqlite3"
HOLD_SECONDS = 0.005  # the longest a hold delays a commit


class StoreFailed(RuntimeError):
    """The store could not commit; it accepts nothing more until the service restarts."""


class _Job:
    __slots__ = ("kind", "stream", "seq", "body", "future")

    def __init__(self, kind: str, stream: str, seq: int, body: Any) -> None:
        self.kind = kind  # "event", "snapshot", "drop" or "barrier"
        self.stream = stream
        self.seq = seq
        self.body = body
        self.future: Future[int] = Future()


# json.dumps(body, separators=(",", ":"), allow_nan=False), without an encoder per call
_json_dumps = json.JSONEncoder(separators=(",", ":"), allow_nan=False).encode


def dumps(body: Any) -> str:
    """Compact JSON text of a log record or a stream's state: orjson's (the same values, read
    back by any JSON reader), or the json module's for what orjson does not write (integers past
    64 bits). orjson writes NaN and infinity as null: callers hand it none."""
    try:
        return orjson.dumps(body).decode()
    except TypeError:
        return _json_dumps(body)


_INSERT = "INSERT INTO events (seq, stream, body) VALUES (?, ?, ?)"
_MORE = ", (?, ?, ?)"  # each further row of a multi-row INSERT


class Store:
    """The event log and snapshots of every stream in one SQLite file."""

    def __init__(self, directory: Path, *, durability: str = "full", max_batch: int = 1000) -> None:
        self.path = Path(directory) / FILE_NAME
        self.durability = durability.upper()
        self.max_batch = max_batch
        self.failed: BaseException | None = None
        self.commits = 0  # transactions committed
        self.committed_jobs = 0  # jobs written by them
        self._conn: sqlite3.Connection | None = None
        self._queue: deque[_Job] = deque()
        self._cond = threading.Condition()
        self._next_seq = 1
        self._closing = False
        self._held = 0  # holders that will release
        self._rows_per_insert = 1  # the most rows one INSERT may bind (SQLite's variable limit)
        self._writer: threading.Thread | None = None

    # -- opening and reading ---------------------------------------------------------------

    def open(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute(f"PRAGMA synchronous={self.durability}")
        conn.execute(
            "CREATE TABLE IF NOT EXISTS events "
            "(seq INTEGER PRIMARY KEY, stream TEXT NOT NULL, body TEXT NOT NULL)"
        )
        conn.execute("CREATE INDEX IF NOT EXISTS events_by_stream ON events(stream, seq)")
        conn.execute(
            "CREATE TABLE IF NOT EXISTS snapshots "
            "(stream TEXT PRIMARY KEY, seq INTEGER NOT NULL, body TEXT NOT NULL)"
        )
        conn.execute("CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)")
        row = conn.execute("SELECT value FROM meta WHERE key = 'schema'").fetchone()
        if row is None:
            conn.execute("INSERT INTO meta VALUES ('schema', ?)", (SCHEMA_VERSION,))
        elif row[0] != SCHEMA_VERSION:
            conn.close()
            raise StoreFailed(
                f"The store {self.path} has schema version {row[0]}; this service reads "
                f"version {SCHEMA_VERSION}."
            )
        last = conn.execute(
            "SELECT max(coalesce((SELECT max(seq) FROM events), 0), "
            "coalesce((SELECT max(seq) FROM snapshots), 0))"
        ).fetchone()[0]
        self._next_seq = int(last) + 1
        self._rows_per_insert = max(1, conn.getlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER) // 3)
        self._conn = conn

    def snapshots(self) -> dict[str, tuple[int, dict[str, Any]]]:
        """Every stream's latest snapshot: name -> (position, state)."""
        assert self._conn is not None
        rows = self._conn.execute("SELECT stream, seq, body FROM snapshots").fetchall()
        return {stream: (int(seq), json.loads(body)) for stream, seq, body in rows}

    def events(self) -> Iterator[tuple[int, str, dict[str, Any]]]:
        """Every logged event in order: (position, stream, event)."""
        assert self._conn is not None
        cursor = self._conn.execute("SELECT seq, stream, body FROM events ORDER BY seq")
        for seq, stream, body in cursor:
            yield int(seq), stream, json.loads(body)

    # -- writing ---------------------------------------------------------------------------

    def start(self) -> None:
        self._writer = threading.Thread(target=self._write_loop, name="ledger-writer", daemon=True)
        self._writer.start()

    def append(self, stream: str, event: dict[str, Any]) -> tuple[int, Future[int]]:
        """Queue an event; the future resolves (to its position) once it is committed."""
        job = self._enqueue("event", stream, event)
        return job.seq, job.future

    def snapshot(self, stream: str, seq: int, state: str) -> Future[int]:
        """Queue a stream's state (serialised JSON, taken under its lock) as of event ``seq``."""
        return self._enqueue("snapshot", stream, (seq, state)).future

    def drop(self, stream: str) -> Future[int]:
        """Queue the removal of everything stored for a stream."""
        return self._enqueue("drop", stream, None).future

    def barrier(self) -> Future[int]:
        """A future that resolves once everything queued before it is committed."""
        return self._enqueue("barrier", "", None).future

    def hold(self) -> None:
        """Keep the next commit waiting (at most HOLD_SECONDS) until :meth:`release`."""
        with self._cond:
            self._held += 1

    def release(self) -> None:
        with self._cond:
            self._held -= 1
            if not self._held:
                self._cond.notify()

    def _enqueue(self, kind: str, stream: str, body: Any) -> _Job:
        with self._cond:
            if self.failed is not None:
                raise StoreFailed(f"The store failed earlier: {self.failed}")
            if self._closing:
                raise StoreFailed("The store is closing.")
            job = _Job(kind, stream, self._next_seq, body)
            self._next_seq += 1
            self._queue.append(job)
            if not self._held or len(self._queue) in (1, self.max_batch):
                self._cond.notify()  # held: only to start the writer's bounded wait
        return job

    def _write_loop(self) -> None:
        while True:
            with self._cond:
                while not self._queue and not self._closing:
                    self._cond.wait()
                if self._held:
                    deadline = time.monotonic() + HOLD_SECONDS
                    while self._held and len(self._queue) < self.max_batch and not self._closing:
                        left = deadline - time.monotonic()
                        if left <= 0:
                            break
                        self._cond.wait(left)
                if not self._queue:
                    return
                batch = [
                    self._queue.popleft() for _ in range(min(self.max_batch, len(self._queue)))
                ]
            try:
                self._commit(batch)
            except Exception as exc:  # the disk, not the caller: stop and report
                log.exception("commit failed; the store stops accepting writes")
                with self._cond:
                    self.failed = exc
                    batch.extend(self._queue)
                    self._queue.clear()
                for job in batch:
                    if not job.future.done():
                        job.future.set_exception(StoreFailed(f"The commit failed: {exc}"))
                return
            for job in batch:
                job.future.set_result(job.seq)

    def _commit(self, batch: list[_Job]) -> None:
        if all(job.kind == "barrier" for job in batch):
            return
        conn = self._conn
        assert conn is not None
        if len(batch) <= self._rows_per_insert and all(job.kind == "event" for job in batch):
            values: list[Any] = []
            for job in batch:
                values += (job.seq, job.stream, dumps(job.body))
            conn.execute(_INSERT + _MORE * (len(batch) - 1), values)  # one implicit transaction
        else:
            self._commit_mixed(conn, batch)
        self.commits += 1
        self.committed_jobs += len(batch)

    def _commit_mixed(self, conn: sqlite3.Connection, batch: list[_Job]) -> None:
        conn.execute("BEGIN IMMEDIATE")
        try:
            rows: list[tuple[int, str, str]] = []  # events not inserted yet, in order
            for job in batch:
                if job.kind == "event":
                    rows.append((job.seq, job.stream, dumps(job.body)))
                    continue
                if rows:
                    conn.executemany(_INSERT, rows)
                    rows.clear()
                if job.kind == "snapshot":
                    seq, state = job.body
                    conn.execute(
                        "INSERT OR REPLACE INTO snapshots (stream, seq, body) VALUES (?, ?, ?)",
                        (job.stream, seq, state),
                    )
                    conn.execute(
                        "DELETE FROM events WHERE stream = ? AND seq <= ?", (job.stream, seq)
                    )
                elif job.kind == "drop":
                    conn.execute("DELETE FROM events WHERE stream = ?", (job.stream,))
                    conn.execute("DELETE FROM snapshots WHERE stream = ?", (job.stream,))
            if rows:
                conn.executemany(_INSERT, rows)
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise

    # -- closing ---------------------------------------------------------------------------

    def close(self) -> None:
        """Write what is queued, stop the writer and close the file."""
        with self._cond:
            self._closing = True
            self._cond.notify()
        if self._writer is not None:
            self._writer.join()
            self._writer = None
        if self._conn is not None:
            self._conn.close()
            self._conn = None
