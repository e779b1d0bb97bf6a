"""SQLite storage: an append-only event log, a snapshot per stream, and group commit.

The file is ``<data-dir>/ledger.sqlite3`` in WAL mode. Durability ``full`` (the default): an
acknowledged write survives power loss; ``normal``: it survives a crash of the process. Tables::

    events(seq INTEGER PRIMARY KEY, stream TEXT, body TEXT)     JSON event, in the order applied
    snapshots(stream TEXT PRIMARY KEY, seq INTEGER, body TEXT)  JSON state as of event ``seq``
    meta(key TEXT PRIMARY KEY, value TEXT)                      schema version

Writing: callers :meth:`Store.append` an event and get a future that resolves (to the event's
position) once the event is durable. Callers append while holding the stream's lock, so sequence
numbers (assigned here) follow the order events were applied. The caller's thread writes the
event at once, in one transaction (a group of events is one multi-row INSERT), except while that
thread :meth:`holds <Store.hold>` the store: the app's event loop holds it while it runs the
requests that are ready (and, while more keep starting, a little longer: ``service.writes``),
then :meth:`releases <Store.release>` it, so those requests share one transaction. A write from
another thread first writes what a hold kept back, so positions stay in order in the file.

Durability ``full`` is SQLite's ``synchronous=FULL``, done in two steps: the transaction commits
with ``synchronous=NORMAL`` (in WAL mode, FULL is NORMAL plus one sync of the WAL file after
each commit, per SQLite's documentation of the pragma), and the futures resolve only after that
sync of the WAL file. On the event loop's thread (once :meth:`attach` ed) a small helper process
(``service/walsync.py``) makes the sync and the loop reads its answer like any socket, so the
loop goes on running requests meanwhile and no other thread of this process needs the
interpreter lock to finish a write; elsewhere (other threads, no loop) the writing thread syncs
the file itself. One sync covers every transaction committed before it began, so under load
many transactions share one. Before, a writer thread committed with FULL; beside a busy event
loop it waited for the interpreter lock after each call into SQLite, so a commit took 3-6 times
its fsync (benchmarks/service.py prints both).

Checkpoints (copying the WAL into the database file) run on a thread of their own with its own
connection, once about ``CHECKPOINT_PAGES`` pages were written, instead of inside whichever write
crosses SQLite's threshold; the next write copies the few pages written meanwhile (with that
checkpoint's syncs, on the writing thread), so that the WAL file starts over rather than grows. A
big snapshot is still written by the thread that takes it (the event loop's, mostly): 20-35 ms for
4.7 MB here, during which the loop waits.

A snapshot replaces the stream's previous one and deletes the stream's events up to its position
in the same transaction, so the log stays short. Everything is JSON; nothing is pickled.

If a write or a sync fails, the store stops: every waiting and later write fails, and the
service must be restarted, which replays the log to the last durable event.
"""

from __future__ import annotations

import asyncio
import json
import logging
import os
import sqlite3
import subprocess
import sys
import threading
from collections import deque
from collections.abc import Iterator
from concurrent.futures import Future
from pathlib import Path
from typing import Any

import orjson

from service import walsync

log = logging.getLogger("mistake_ledger.store")

SCHEMA_VERSION = "1"
FILE_NAME = "ledger.sqlite3"
WALSYNC = Path(__file__).with_name("walsync.py")  # the helper process that syncs the WAL file
# Pages written to the WAL between two checkpoints (SQLite's own default), counted roughly: a
# transaction writes at least the pages its rows change (a leaf of the table and of its index,
# often more) plus one page per 4 KiB of text.
CHECKPOINT_PAGES = 1000
_PAGES_PER_WRITE = 3


class StoreFailed(RuntimeError):
    """The store could not write or sync; it accepts nothing more until the service restarts."""


class _Job:
    __slots__ = ("kind", "stream", "seq", "body", "future")

    def __init__(self, kind: str, stream: str, seq: int, body: Any) -> None:
        self.kind = kind  # "event", "snapshot", "drop" or "barrier" (writes nothing)
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
        self.max_batch = max_batch  # the most events a hold keeps back
        self.failed: BaseException | None = None
        self.commits = 0  # transactions committed
        self.committed_jobs = 0  # jobs written by them
        self.syncs = 0  # syncs of the WAL file made by this process's threads
        self._conn: sqlite3.Connection | None = None
        self._lock = threading.RLock()  # the connection, the positions and what follows
        self._next_seq = 1
        self._rows_per_insert = 1  # the most rows one INSERT may bind (SQLite's variable limit)
        self._held = 0  # holds of the holder thread not yet released
        self._holder: int | None = None  # the thread whose writes a hold keeps back
        self._kept: list[_Job] = []  # kept back by a hold, not written yet
        self._written = 0  # transactions written (the sync tokens)
        self._durable = 0  # transactions known synced
        self._unsynced: deque[tuple[int, list[_Job]]] = deque()  # written, sync asked, not done
        self._loop: asyncio.AbstractEventLoop | None = None
        self._loop_thread: int | None = None
        self._helper: subprocess.Popen[bytes] | None = None
        self._answers = b""  # a partial answer of the helper
        self._closing = False
        self._since_checkpoint = 0  # pages written since the last checkpoint was asked (roughly)
        self._checkpoint_due = threading.Event()
        self._catch_up = False  # the checkpoint thread copied most of the WAL; finish here
        self._checkpointer: threading.Thread | None = None

    # -- opening and reading ---------------------------------------------------------------

    def open(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
        conn.execute("PRAGMA journal_mode=WAL")
        # FULL is NORMAL plus a sync of the WAL file after each commit (_write makes it).
        conn.execute("PRAGMA synchronous=NORMAL")
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
        # Checkpoints (copying the WAL into the database file, with their syncs) run on a thread
        # of their own rather than inside whichever write crosses SQLite's threshold, which may
        # be the event loop's.
        conn.execute("PRAGMA wal_autocheckpoint=0")
        self._conn = conn
        self._checkpointer = threading.Thread(
            target=self._checkpoint_loop, name="ledger-checkpoint", daemon=True
        )
        self._checkpointer.start()
        if self.durability == "FULL":
            self._sync_file()  # what an earlier process wrote, before anything new is acknowledged

    @property
    def wal_path(self) -> Path:
        return self.path.with_name(self.path.name + "-wal")

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

    # -- the event loop's syncs ------------------------------------------------------------

    def attach(self, loop: asyncio.AbstractEventLoop) -> None:
        """Sync the writes made on ``loop``'s thread (the caller's) through the helper process,
        whose answers ``loop`` reads; with durability ``normal`` there is nothing to sync."""
        if self.durability != "FULL" or self._helper is not None:
            return
        helper = subprocess.Popen(
            [sys.executable, "-I", "-S", str(WALSYNC), str(self.wal_path)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            bufsize=0,
        )
        assert helper.stdout is not None
        os.set_blocking(helper.stdout.fileno(), False)
        with self._lock:
            self._helper = helper
            self._loop = loop
            self._loop_thread = threading.get_ident()
        loop.add_reader(helper.stdout.fileno(), self._on_answer)

    def _on_answer(self) -> None:
        """On the loop: the helper synced; resolve every write its answer covers."""
        helper = self._helper
        if helper is None or helper.stdout is None:
            return
        error: OSError | None = None
        try:
            data = os.read(helper.stdout.fileno(), 4096)
        except BlockingIOError:
            return
        except OSError as exc:
            data, error = b"", exc
        if not data:  # the helper ended: closing, or a failed sync
            assert self._loop is not None
            self._loop.remove_reader(helper.stdout.fileno())
            if not self._closing:
                self._fail(error or StoreFailed(f"The WAL sync helper ended ({helper.poll()})."))
            return
        last, self._answers = walsync.last_token(self._answers + data)
        if last:
            self._synced(int.from_bytes(last, "big"))

    def _synced(self, token: int) -> None:
        """Resolve the writes of every transaction up to ``token`` (their WAL frames are synced)."""
        done: list[_Job] = []
        with self._lock:
            self._durable = max(self._durable, token)
            while self._unsynced and self._unsynced[0][0] <= token:
                done.extend(self._unsynced.popleft()[1])
        for job in done:
            if not job.future.done():
                job.future.set_result(job.seq)

    # -- writing ---------------------------------------------------------------------------

    def append(self, stream: str, event: dict[str, Any]) -> tuple[int, Future[int]]:
        """Write an event; the future resolves (to its position) once it is durable."""
        job = self._enqueue("event", stream, event)
        return job.seq, job.future

    def snapshot(self, stream: str, seq: int, state: str) -> Future[int]:
        """Write a stream's state (serialised JSON, taken under its lock) as of event ``seq``."""
        return self._enqueue("snapshot", stream, (seq, state)).future

    def drop(self, stream: str) -> Future[int]:
        """Remove everything stored for a stream."""
        return self._enqueue("drop", stream, None).future

    def barrier(self) -> Future[int]:
        """A future that resolves once everything written before it is durable."""
        return self._enqueue("barrier", "", None).future

    def hold(self) -> None:
        """Keep this thread's writes back until :meth:`release` (at most ``max_batch`` of
        them): they then share one transaction and one sync."""
        with self._lock:
            self._holder = threading.get_ident()
            self._held += 1

    def release(self) -> None:
        with self._lock:
            self._held -= 1
            if not self._held:
                self._holder = None
                self._write([])

    def _enqueue(self, kind: str, stream: str, body: Any) -> _Job:
        with self._lock:
            if self.failed is not None:
                raise StoreFailed(f"The store failed earlier: {self.failed}")
            if self._closing:
                raise StoreFailed("The store is closing.")
            job = _Job(kind, stream, self._next_seq, body)
            self._next_seq += 1
            if self._held and self._holder == threading.get_ident():
                self._kept.append(job)
                if len(self._kept) >= self.max_batch:
                    self._write([])
            else:
                self._write([job])
        return job

    def _write(self, jobs: list[_Job]) -> None:
        """Write what a hold kept back and ``jobs`` in one transaction, then sync it (the lock is
        held). Resolves the futures, or leaves them to the helper's answer."""
        batch = self._kept + jobs if self._kept else jobs
        self._kept = []
        if not batch or self.failed is not None:
            return
        try:
            if any(job.kind != "barrier" for job in batch):
                self._commit(batch)
                self._written += 1
            if self.durability != "FULL":
                done = batch
            elif self._written == self._durable:
                done = batch  # nothing written since the last sync (barriers alone)
            elif threading.get_ident() == self._loop_thread and self._helper is not None:
                self._ask_sync(batch)
                return
            else:
                self._sync_file()
                self._durable = self._written
                done = [job for _, jobs_ in self._unsynced for job in jobs_] + batch
                self._unsynced.clear()
        except Exception as exc:  # the disk, not the caller: stop and report
            log.exception("a write failed; the store stops accepting writes")
            self._fail(exc, batch)
            return
        for job in done:
            job.future.set_result(job.seq)

    def _ask_sync(self, batch: list[_Job]) -> None:
        token = self._written
        if self._unsynced and self._unsynced[-1][0] == token:
            self._unsynced[-1][1].extend(batch)  # barriers after the last sync asked
            return
        self._unsynced.append((token, batch))
        assert self._helper is not None and self._helper.stdin is not None
        self._helper.stdin.write(token.to_bytes(walsync.TOKEN, "big"))

    def _sync_file(self) -> None:
        """Sync the WAL file from this thread: every transaction committed so far is durable."""
        if walsync.sync_file(str(self.wal_path)):
            self.syncs += 1

    def _fail(self, exc: BaseException, batch: list[_Job] | None = None) -> None:
        with self._lock:
            self.failed = exc
            waiting = (batch or []) + self._kept + [j for _, jobs in self._unsynced for j in jobs]
            self._kept = []
            self._unsynced.clear()
        for job in waiting:
            if not job.future.done():
                job.future.set_exception(StoreFailed(f"The write failed: {exc}"))

    def _commit(self, batch: list[_Job]) -> None:
        conn = self._conn
        assert conn is not None
        if len(batch) <= self._rows_per_insert and all(job.kind == "event" for job in batch):
            values: list[Any] = []
            size = 0
            for job in batch:
                text = dumps(job.body)
                size += len(text)
                values += (job.seq, job.stream, text)
            conn.execute(_INSERT + _MORE * (len(batch) - 1), values)  # one implicit transaction
        else:
            size = self._commit_mixed(conn, batch)
        self.commits += 1
        self.committed_jobs += len(batch)
        self._since_checkpoint += _PAGES_PER_WRITE + size // 4096
        if self._catch_up:
            # The checkpoint thread copied what was written before it began; copying the rest
            # here, between two writes, lets the next write start the WAL file over. (Never
            # all copied, the WAL would only grow: 70 MB after 20,000 single predicts.)
            self._catch_up = False
            conn.execute("PRAGMA wal_checkpoint(PASSIVE)")
        elif self._since_checkpoint >= CHECKPOINT_PAGES:
            self._since_checkpoint = 0
            self._checkpoint_due.set()

    def _checkpoint_loop(self) -> None:
        """Copy the WAL into the database file when enough was written (PASSIVE: it waits for
        no writer, and writers do not wait for it)."""
        conn = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
        try:
            conn.execute("PRAGMA synchronous=NORMAL")  # syncs the WAL and the database file
            while True:
                self._checkpoint_due.wait()
                self._checkpoint_due.clear()
                if self._closing:
                    return
                try:
                    conn.execute("PRAGMA wal_checkpoint(PASSIVE)")
                except sqlite3.Error:  # busy: the next one catches up
                    log.warning("a checkpoint failed", exc_info=True)
                else:
                    self._catch_up = True
        finally:
            conn.close()

    def _commit_mixed(self, conn: sqlite3.Connection, batch: list[_Job]) -> int:
        """Write a batch with snapshots or drops in one transaction; return its bytes of text."""
        size = 0
        conn.execute("BEGIN IMMEDIATE")
        try:
            rows: list[tuple[int, str, str]] = []  # events not inserted yet, in order
            for job in batch:
                if job.kind == "event":
                    rows.append((job.seq, job.stream, dumps(job.body)))
                    size += len(rows[-1][2])
                    continue
                if rows:
                    conn.executemany(_INSERT, rows)
                    rows.clear()
                if job.kind == "snapshot":
                    seq, state = job.body
                    size += len(state)
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
        return size

    # -- closing ---------------------------------------------------------------------------

    def close(self) -> None:
        """Write what a hold kept back, sync, stop the helper and close the file."""
        with self._lock:
            self._closing = True
            if self.failed is None:
                self._held, self._holder = 0, None
                self._write([])
                try:
                    if self._written > self._durable:
                        self._sync_file()
                except OSError as exc:
                    self._fail(exc)
                else:
                    self._synced(self._written)
            helper, self._helper = self._helper, None
        if self._checkpointer is not None:
            self._checkpoint_due.set()  # _closing is set: it ends
            self._checkpointer.join()
            self._checkpointer = None
        if helper is not None:
            assert helper.stdin is not None and helper.stdout is not None
            loop, fd = self._loop, helper.stdout.fileno()
            if loop is not None and not loop.is_closed():
                if threading.get_ident() == self._loop_thread:
                    loop.remove_reader(fd)
                else:  # the loop's reader, removed on the loop before the pipe closes
                    done = threading.Event()

                    def remove() -> None:
                        loop.remove_reader(fd)
                        done.set()

                    loop.call_soon_threadsafe(remove)
                    done.wait(5)
            helper.stdin.close()
            try:
                helper.wait(5)
            except subprocess.TimeoutExpired:
                helper.kill()
                helper.wait()
            helper.stdout.close()
        if self._conn is not None:
            self._conn.close()
            self._conn = None
