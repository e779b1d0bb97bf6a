"""The service over loopback: call rates, latencies, batch throughput and memory per stream.

Run: ``python -m benchmarks.service`` (or ``make bench``). It prints figures beside the goals and
says which are met; it asserts nothing about time. Every server is a subprocess (uvicorn, one
process) on a free port of 127.0.0.1; no other address is ever used. Every request loop is bounded
both in count and in time.

What it runs, in order:

1. a bare FastAPI endpoint (``benchmarks.bare_app``) that parses a predict body with the service's
   own request model and answers a constant: the floor of HTTP + FastAPI + pydantic; and the
   service (``mistake-ledger serve``, a temporary data directory, default durability FULL) with
   one stream whose panel has six learners on an open, sparse flag space; and the same service
   with durability NORMAL (a write answers once committed, without waiting for a sync). All three
   run side by side: single predict calls with 4, 16 and 64 in flight (the same bodies and
   client for each), in rounds that alternate them (``--rounds``, a fresh stream per service
   round), so that the machine's speed, which other work on it moves by tens of percent from
   minute to minute, weighs on both sides of each ratio alike;
2. then on the service: single feedback calls, then batches of 1000 through predict, feedback
   and examples;
3. a fresh service holding 10,000 such streams, each given a handful of items (four labelled
   examples, two predictions left waiting), whose resident memory is read from
   ``/proc/<pid>/status`` (VmRSS);
4. the same six learners alone in this process on encoded items (no HTTP, no validation, no
   store, no ledger): labelled one at a time (``learn_checked``), and in batches of 1000 the way
   a stream learns them (``Learner.skim`` over the items each surely gets right and keeps, one at
   a time where it stops): the floor under the service's cost per item;
5. one snapshot of a stream with this panel holding 20,000 waiting predictions and 20,000
   remembered ids, in this process: the cost per id held that ``snapshot_size_ratio`` spreads
   over the items logged between snapshots.

Goals (reported, never asserted): single predict at least 85% of the bare endpoint's call rate
(reported at each number of calls in flight);
at least 50,000 labelled items per second through the batch endpoints (feedback and examples)
with the default durability; 10,000 six-learner streams in less than 1 GiB resident.

The client is a few threads, each with one keep-alive connection from the standard library's
``http.client`` and request bodies encoded before the clock starts, so the client spends little
CPU per call next to the server (both share this machine's cores). Latency is per call as the
client sees it. Why several levels of calls in flight: a durable call answers only after its
commit's fsync, which the bare endpoint never waits for. With few calls in flight the service
waits on the disk rather than on its CPU, so the benchmark also times one such commit (SQLite,
WAL, ``synchronous=FULL``) in the data directory's file system and prints it beside the rates.
Beside each rate the server's CPU time per call or item is printed (user + system time of the
server process from ``/proc/<pid>/stat``): it moves less than rates do when other work shares
the machine.
"""

from __future__ import annotations

import argparse
import gc
import http.client
import json
import os
import platform
import signal
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from prometheus_client.parser import text_string_to_metric_families
from rich.console import Console
from rich.table import Table

import learners
from learners.features import Rows
from service.demo import free_port  # a free port on 127.0.0.1, the HOST here
from service.registry import state_text
from service.settings import Settings
from service.streams import Stream

HOST = "127.0.0.1"  # the only address this benchmark talks to
CONCURRENCY = 4  # calls in flight for single feedback, and the first level for single predict
LEVELS = (4, 16, 64)  # calls in flight for single predict (both servers)
BATCH = 1000
BATCH_CONCURRENCY = 2
STREAM = "bench"
SPACE_SIZE = 100_000  # declared size of the open flag space
VOCABULARY = 5_000  # names actually drawn
FLAGS_PER_ITEM = 18

PANEL: list[dict[str, Any]] = [
    {"name": "elim", "kind": "elimination"},
    {"name": "elim-neg", "kind": "elimination", "negations": True},
    {"name": "perc", "kind": "perceptron", "variant": "margin", "tau": 1.0, "eta": 0.5},
    {"name": "winnow", "kind": "winnow"},
    {"name": "wm", "kind": "weighted-majority"},
    {"name": "pa", "kind": "passive-aggressive", "variant": "pa1", "aggressiveness": 1.0},
]

GOAL_RATIO = 0.85
GOAL_LABELLED = 50_000.0
GOAL_MEMORY = 1 << 30


# -- data --------------------------------------------------------------------------------------


class Items:
    """Sparse items of an invented flag space, drawn reproducibly, with their labels.

    Each item holds two signal flags, each on with probability one half, and up to 18 flags
    drawn from 5,000 names with a few common and many rare ones. The label is the conjunction of
    the two signal flags, so about a quarter of the items are positive.
    """

    def __init__(self, seed: int) -> None:
        self.rng = np.random.default_rng(seed)
        weights = 1.0 / np.arange(1, VOCABULARY + 1)
        self.p = weights / weights.sum()
        self.names = [f"f{i}" for i in range(VOCABULARY)]

    def draw(self, count: int) -> tuple[list[list[str]], list[int]]:
        picks = self.rng.choice(VOCABULARY, size=(count, FLAGS_PER_ITEM + 6), p=self.p)
        signals = self.rng.random((count, 2)) < 0.5
        items, labels = [], []
        for row, (a, b) in zip(picks.tolist(), signals.tolist(), strict=True):
            flags = list(dict.fromkeys(self.names[i] for i in row))[:FLAGS_PER_ITEM]
            if a:
                flags.append("sig_a")
            if b:
                flags.append("sig_b")
            items.append(flags)
            labels.append(int(a and b))
        return items, labels


def encode(body: Any) -> bytes:
    return json.dumps(body, separators=(",", ":")).encode()


# -- servers -----------------------------------------------------------------------------------


def service_env(args: argparse.Namespace, **extra: str) -> dict[str, str]:
    """The environment of a service server: ``server_env`` with the settings asked for."""
    if args.gc_young_threshold is not None:
        extra["MISTAKE_LEDGER_GC_YOUNG_THRESHOLD"] = str(args.gc_young_threshold)
    return server_env(**extra)


def server_env(**extra: str) -> dict[str, str]:
    """This process's environment without any MISTAKE_LEDGER_* setting, plus ``extra``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("MISTAKE_LEDGER_")}
    env.update(extra)
    return env


@dataclass
class Server:
    process: subprocess.Popen[bytes]
    port: int
    log: Path

    @property
    def pid(self) -> int:
        return self.process.pid


@contextmanager
def server(args: list[str], env: dict[str, str], log: Path, port: int) -> Iterator[Server]:
    """Start a server subprocess, wait until it answers /healthz, stop it on exit."""
    with open(log, "wb") as out:
        process = subprocess.Popen(args, env=env, stdout=out, stderr=subprocess.STDOUT)
    running = Server(process, port, log)
    try:
        deadline = time.monotonic() + 30.0
        while True:
            if process.poll() is not None:
                raise RuntimeError(f"the server exited early; see {log}:\n{log.read_text()}")
            try:
                status, _ = call(port, "GET", "/healthz")
                if status == 200:
                    break
            except OSError:
                pass
            if time.monotonic() > deadline:
                raise RuntimeError(f"the server did not start within 30 s; see {log}")
            time.sleep(0.1)
        yield running
    finally:
        if process.poll() is None:
            process.send_signal(signal.SIGINT)
            try:
                process.wait(timeout=60)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()


def call(port: int, method: str, path: str, body: bytes | None = None) -> tuple[int, bytes]:
    """One request on a fresh connection (setup and checks, not the timed loops)."""
    conn = http.client.HTTPConnection(HOST, port, timeout=60)
    try:
        headers = {"content-type": "application/json"} if body is not None else {}
        conn.request(method, path, body=body, headers=headers)
        response = conn.getresponse()
        return response.status, response.read()
    finally:
        conn.close()


def cpu_seconds(pid: int) -> float:
    """User + system CPU time a process has used so far, from /proc/<pid>/stat."""
    text = Path(f"/proc/{pid}/stat").read_text()
    fields = text[text.rindex(")") + 2 :].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def rss_bytes(pid: int) -> tuple[int, int]:
    """(VmRSS, VmHWM) of a process in bytes, from /proc/<pid>/status."""
    values = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, rest = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            values[key] = int(rest.split()[0]) * 1024
    return values["VmRSS"], values["VmHWM"]


# -- the client loop ---------------------------------------------------------------------------


@dataclass
class Loop:
    """What a bounded loop of calls did."""

    calls: int = 0
    seconds: float = 0.0
    latencies: list[float] = field(default_factory=list)
    failures: list[str] = field(default_factory=list)
    done: list[int] = field(default_factory=list)  # indices of the bodies answered as expected
    server_cpu: float = 0.0  # CPU seconds the server process used during the loop

    @property
    def cpu_per_call(self) -> float:
        return self.server_cpu / self.calls if self.calls else float("nan")

    @property
    def rate(self) -> float:
        return self.calls / self.seconds if self.seconds > 0 else 0.0

    def percentile(self, q: float) -> float:
        return float(np.percentile(self.latencies, q)) if self.latencies else float("nan")


def run_loop(
    port: int,
    path: str,
    bodies: list[bytes],
    *,
    threads: int,
    seconds: float,
    expect: int = 200,
    pid: int | None = None,
) -> Loop:
    """Send ``bodies`` (at most all of them, for at most ``seconds``) from ``threads`` threads,
    each with one keep-alive connection; thread k sends bodies k, k + threads, ..."""
    result = Loop()
    lock = threading.Lock()
    start_gate = threading.Barrier(threads + 1)
    deadline = [0.0]
    headers = {"content-type": "application/json"}

    def worker(k: int) -> None:
        conn = http.client.HTTPConnection(HOST, port, timeout=120)
        latencies: list[float] = []
        done: list[int] = []
        failures: list[str] = []
        try:
            conn.connect()
            start_gate.wait()
            for index in range(k, len(bodies), threads):
                if time.perf_counter() > deadline[0]:
                    break
                t0 = time.perf_counter()
                conn.request("POST", path, body=bodies[index], headers=headers)
                response = conn.getresponse()
                data = response.read()
                latencies.append(time.perf_counter() - t0)
                if response.status == expect:
                    done.append(index)
                elif len(failures) < 3:
                    failures.append(f"{response.status}: {data[:300]!r}")
        finally:
            conn.close()
            with lock:
                result.latencies.extend(latencies)
                result.done.extend(done)
                result.failures.extend(failures)

    workers = [threading.Thread(target=worker, args=(k,)) for k in range(threads)]
    for w in workers:
        w.start()
    cpu0 = cpu_seconds(pid) if pid is not None else 0.0
    deadline[0] = time.perf_counter() + seconds
    t0 = time.perf_counter()
    start_gate.wait()
    for w in workers:
        w.join()
    result.seconds = time.perf_counter() - t0
    if pid is not None:
        result.server_cpu = cpu_seconds(pid) - cpu0
    result.calls = len(result.latencies)
    result.done.sort()
    return result


def checked(loop: Loop, what: str) -> Loop:
    if loop.failures:
        raise RuntimeError(f"{what}: unexpected answers, e.g. {loop.failures[0]}")
    return loop


# -- the measurements --------------------------------------------------------------------------


@dataclass
class Figures:
    # calls in flight -> one loop per round, alternating: bare endpoint, service, bare, ...
    bare: dict[int, list[Loop]] = field(default_factory=dict)
    predict: dict[int, list[Loop]] = field(default_factory=dict)
    normal: dict[int, list[Loop]] = field(default_factory=dict)  # the same, durability NORMAL
    feedback: Loop | None = None
    # One durable SQLite commit: (median, mean) seconds.
    commit_seconds: tuple[float, float] = (float("nan"), float("nan"))
    busy_commit_seconds: float = float("nan")  # median, from a thread beside busy Python
    batch: dict[str, tuple[int, Loop]] = field(default_factory=dict)  # items sent, the loop
    memory: dict[str, float] = field(default_factory=dict)
    panel: dict[str, float] = field(default_factory=dict)  # seconds per item, in process
    snapshot: tuple[int, float, int] | None = None  # ids held, seconds, bytes
    collections: dict[str, float] = field(default_factory=dict)  # gc generation -> count


def predict_bodies(items: list[list[str]], prefix: str) -> list[bytes]:
    return [encode({"id": f"{prefix}{i}", "features": f}) for i, f in enumerate(items)]


def bare_command(port: int) -> list[str]:
    cmd = [sys.executable, "-m", "uvicorn", "benchmarks.bare_app:app", "--host", HOST]
    return cmd + ["--port", str(port), "--log-level", "warning", "--no-access-log"]


def merged(loops: list[Loop]) -> Loop:
    """Several loops of the same calls as one: their calls, time, latencies and server CPU."""
    out = Loop()
    for loop in loops:
        out.calls += loop.calls
        out.seconds += loop.seconds
        out.latencies.extend(loop.latencies)
        out.server_cpu += loop.server_cpu
    return out


def gc_collections(port: int) -> dict[str, float]:
    """The server's garbage collections so far per generation (python_gc_collections_total)."""
    status, data = call(port, "GET", "/metrics")
    if status != 200:
        raise RuntimeError(f"/metrics: {status} {data[:300]!r}")
    out: dict[str, float] = {}
    for family in text_string_to_metric_families(data.decode()):
        if family.name == "python_gc_collections":
            for sample in family.samples:
                if sample.name == "python_gc_collections_total":
                    out[sample.labels["generation"]] = sample.value
    return out


def probe_database(path: Path) -> sqlite3.Connection:
    """A new SQLite file in WAL mode with ``synchronous=FULL`` (what the store's durability
    ``full`` amounts to) and one table, ``probe(seq, body)``."""
    conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=FULL")
    conn.execute("CREATE TABLE probe (seq INTEGER PRIMARY KEY, body TEXT NOT NULL)")
    return conn


def commit_seconds(directory: Path, commits: int = 200) -> tuple[float, float]:
    """The median and mean time of one small durable SQLite commit in ``directory`` (WAL,
    ``synchronous=FULL``): what a durable write waits for at least, besides its own work."""
    conn = probe_database(directory / "commit-probe.sqlite3")
    try:
        times = []
        for seq in range(commits):
            t0 = time.perf_counter()
            conn.execute("BEGIN IMMEDIATE")
            conn.execute("INSERT INTO probe VALUES (?, ?)", (seq, "x" * 400))
            conn.execute("COMMIT")
            times.append(time.perf_counter() - t0)
    finally:
        conn.close()
    return float(np.median(times)), float(np.mean(times))


def busy_commit_seconds(directory: Path, seconds: float = 2.0) -> float:
    """The median time of one such commit (25 rows in one INSERT, as the store writes a group)
    made by a second thread while this thread runs Python, as a busy event loop does: that
    thread waits for the interpreter lock after its calls into SQLite. (The store therefore
    writes on the loop's own thread and syncs through a helper process.)"""
    conn = probe_database(directory / "busy-probe.sqlite3")
    insert = "INSERT INTO probe VALUES (?, ?)" + ", (?, ?)" * 24
    times: list[float] = []
    stop = threading.Event()

    def commits() -> None:
        seq = 0
        while not stop.is_set():
            values: list[Any] = []
            for _ in range(25):
                seq += 1
                values += (seq, "x" * 400)
            t0 = time.perf_counter()
            conn.execute(insert, values)
            times.append(time.perf_counter() - t0)

    thread = threading.Thread(target=commits)
    thread.start()
    deadline, total = time.perf_counter() + seconds, 0
    while time.perf_counter() < deadline:
        total += sum(range(1000))  # plain Python work, holding the lock between checks
    stop.set()
    thread.join()
    conn.close()
    return float(np.median(times)) if times else float("nan")


def serve_command(port: int, data_dir: Path) -> list[str]:
    cmd = [sys.executable, "-m", "service.cli", "serve", "--host", HOST, "--port", str(port)]
    return cmd + ["--data-dir", str(data_dir), "--log-level", "warning"]


def create_stream(port: int, name: str) -> None:
    body = encode({"stream": name, "features": SPACE_SIZE, "learners": PANEL})
    status, data = call(port, "POST", "/v1/streams", body)
    if status != 201:
        raise RuntimeError(f"creating stream {name!r}: {status} {data[:300]!r}")


def batches(rows: list[dict[str, Any]]) -> list[bytes]:
    return [encode({"items": rows[s : s + BATCH]}) for s in range(0, len(rows), BATCH)]


def measure_service(
    work: Path,
    bodies: list[bytes],
    labels: list[int],
    source: Items,
    args: argparse.Namespace,
    figures: Figures,
    console: Console,
) -> None:
    port, bare_port, normal_port = free_port(), free_port(), free_port()
    env = service_env(args, MISTAKE_LEDGER_SWEEP_INTERVAL_SECONDS="3600")
    normal_env = dict(env, MISTAKE_LEDGER_DURABILITY="normal")
    with (
        server(bare_command(bare_port), server_env(), work / "bare.log", bare_port) as bare,
        server(serve_command(port, work / "data"), env, work / "service.log", port) as srv,
        server(
            serve_command(normal_port, work / "normal"),
            normal_env,
            work / "normal.log",
            normal_port,
        ) as normal,
    ):
        create_stream(port, STREAM)
        base = f"/v1/streams/{STREAM}"

        def timed(kind: str, sent: list[bytes], threads: int, stream: str = STREAM) -> Loop:
            path = f"/v1/streams/{stream}/{kind}"
            loop = run_loop(port, path, sent, threads=threads, seconds=args.seconds, pid=srv.pid)
            return checked(loop, kind)

        # Single predicts, level by level, in rounds that alternate the bare endpoint, the
        # service and the service with durability NORMAL, so that a change in this machine's
        # speed during the run (other work on it) touches both sides of each ratio alike. Each
        # service round has a stream of its own (the same bodies, so fresh ids there); the first
        # is the stream the rest uses.
        warm, rest = bodies[: args.warmup], bodies[args.warmup :]
        first: Loop | None = None
        collected = gc_collections(port)
        for level in LEVELS:
            for turn in range(args.rounds):
                path = f"/v1/streams/{STREAM}/predict"
                checked(run_loop(bare_port, path, warm, threads=level, seconds=10), "warm-up")
                loop = run_loop(
                    bare_port, path, rest, threads=level, seconds=args.seconds, pid=bare.pid
                )
                figures.bare.setdefault(level, []).append(checked(loop, "bare endpoint"))
                name = STREAM if first is None else f"{STREAM}-{level}-{turn}"
                if first is not None:
                    create_stream(port, name)
                path = f"/v1/streams/{name}/predict"
                checked(run_loop(port, path, warm, threads=level, seconds=10), "warm-up")
                loop = timed("predict", rest, level, name)
                figures.predict.setdefault(level, []).append(loop)
                first = loop if first is None else first
                name = f"{STREAM}-{level}-{turn}"
                create_stream(normal_port, name)
                path = f"/v1/streams/{name}/predict"
                checked(run_loop(normal_port, path, warm, threads=level, seconds=10), "warm-up")
                unsynced = run_loop(
                    normal_port, path, rest, threads=level, seconds=args.seconds, pid=normal.pid
                )
                figures.normal.setdefault(level, []).append(checked(unsynced, "predict (normal)"))
                rate = figures.bare[level][-1].rate
                console.print(
                    f"  single predict, {level} in flight, round {turn + 1}: "
                    f"{loop.calls} calls, {loop.rate / rate:.0%} of the bare endpoint's rate; "
                    f"durability NORMAL: {unsynced.rate / rate:.0%}"
                )
        assert first is not None
        loop = first

        # Single feedback: the labels of the predictions just answered.
        predicted = [args.warmup + i for i in loop.done]
        feedback = [encode({"id": f"s{i}", "label": labels[i]}) for i in predicted]
        figures.feedback = loop = timed("feedback", feedback, CONCURRENCY)
        console.print(f"  single feedback: {loop.calls} calls")

        # Batches of 1000: predict fresh items, label those answered, then labelled examples.
        items, ys = source.draw(args.batches * BATCH)
        loop = timed(
            "predict",
            batches([{"id": f"b{j}", "features": f} for j, f in enumerate(items)]),
            BATCH_CONCURRENCY,
        )
        figures.batch["predict"] = (len(loop.done) * BATCH, loop)
        answered = [j for k in loop.done for j in range(k * BATCH, (k + 1) * BATCH)]
        loop = timed(
            "feedback",
            batches([{"id": f"b{j}", "label": ys[j]} for j in answered]),
            BATCH_CONCURRENCY,
        )
        figures.batch["feedback"] = (len(loop.done) * BATCH, loop)
        items, ys = source.draw(args.batches * BATCH)
        loop = timed(
            "examples",
            batches([{"id": f"e{j}", "features": f, "label": ys[j]} for j, f in enumerate(items)]),
            BATCH_CONCURRENCY,
        )
        figures.batch["examples"] = (len(loop.done) * BATCH, loop)
        figures.collections = {
            gen: count - collected.get(gen, 0.0) for gen, count in gc_collections(port).items()
        }
        status, data = call(port, "GET", base + "/ledger")
        if status != 200:
            raise RuntimeError(f"ledger: {status} {data[:300]!r}")
        rows = json.loads(data)["learners"]
        states = ", ".join(
            f"{row['name']} {row['state']} ({row['updates']} updates)" for row in rows
        )
        console.print(f"  batches done; ledger: {states}")


@contextmanager
def server_gc(args: argparse.Namespace) -> Iterator[None]:
    """This process's young-generation GC threshold set as the server sets it, meanwhile."""
    before = gc.get_threshold()
    young = args.gc_young_threshold
    if young is None:
        young = Settings().gc_young_threshold
    gc.set_threshold(young, *before[1:])
    try:
        yield
    finally:
        gc.set_threshold(*before)


def measure_panel(source: Items, figures: Figures) -> None:
    """The six learners alone in this process (no HTTP, no store): the floor under the service's
    per-item cost. They are called as a stream calls them (items checked once, then
    ``predict_checked`` / ``learn_checked``, then ``ceiling_value()`` per label), without the
    hint that lets a stream skip a vote that still stands."""
    space = learners.FeatureSpace(SPACE_SIZE)
    panel = [
        learners.make(
            spec["kind"],
            features=space,
            **{k: v for k, v in spec.items() if k not in ("name", "kind")},
        )
        for spec in PANEL
    ]
    items, ys = source.draw(7000)
    encoded = [space.encode(item) for item in items]
    for enc, y in zip(encoded[:2000], ys[:2000], strict=True):
        for learner in panel:
            learner.learn(enc, y)
    rest = list(zip(encoded[2000:], ys[2000:], strict=True))
    t0 = time.process_time()
    for enc, _ in rest:
        for learner in panel:
            learner.predict_checked(enc)
    figures.panel["predict"] = (time.process_time() - t0) / len(rest)
    half = len(rest) // 2
    t0 = time.process_time()
    for enc, y in rest[:half]:
        for learner in panel:
            learner.learn_checked(enc, y)
            learner.ceiling_value()
    figures.panel["label"] = (time.process_time() - t0) / half
    t0 = time.process_time()
    for start in range(half, len(rest), BATCH):
        chunk = rest[start : start + BATCH]
        encs = [enc for enc, _ in chunk]
        rows = Rows(encs)
        ys = np.array([y for _, y in chunk], dtype=np.int8)
        for learner in panel:
            k = 0
            while k < len(chunk):
                k = learner.skim(rows, ys, k, len(chunk))
                learner.ceiling_value()
                if k < len(chunk):
                    learner.learn_checked(encs[k], int(ys[k]))
                    learner.ceiling_value()
                    k += 1
    figures.panel["skim"] = (time.process_time() - t0) / (len(rest) - half)


def measure_snapshot(source: Items, figures: Figures) -> None:
    """Time one snapshot (state, then JSON text, as ``Registry._snapshot`` writes it) of a
    stream holding 20,000 waiting predictions and 20,000 remembered ids."""
    config = {
        "stream": STREAM,
        "features": SPACE_SIZE,
        "learners": [
            {
                "name": spec["name"],
                "kind": spec["kind"],
                "params": {k: v for k, v in spec.items() if k not in ("name", "kind")},
            }
            for spec in PANEL
        ],
        "serve": PANEL[0]["name"],
        "label_wait_seconds": 1e9,
        "on_exceed": "keep",
        "near": 0.8,
        "webhook": None,
    }
    stream = Stream(config, 0.0, history_points=500, max_remembered=10**6)
    items, labels = source.draw(40_000)
    for start in range(0, len(items), BATCH):
        rows = range(start, start + BATCH)
        stream.apply_predict(1.0 + start, [(f"p{j}", items[j]) for j in rows])
    stream.apply_feedback(1e5, [(f"p{j}", labels[j]) for j in range(20_000)])
    held = len(stream.pending) + len(stream.resolved)
    t0 = time.process_time()
    text = state_text(stream.to_state())
    figures.snapshot = (held, time.process_time() - t0, len(text))


def measure_memory(work: Path, source: Items, args: argparse.Namespace, figures: Figures) -> None:
    port = free_port()
    env = service_env(
        args,
        MISTAKE_LEDGER_MAX_STREAMS=str(args.streams),
        MISTAKE_LEDGER_SWEEP_INTERVAL_SECONDS="3600",
    )
    with server(serve_command(port, work / "memory"), env, work / "memory.log", port) as srv:
        before, _ = rss_bytes(srv.pid)
        names = [f"m{i:05d}" for i in range(args.streams)]
        t0 = time.perf_counter()
        creates = [encode({"stream": n, "features": SPACE_SIZE, "learners": PANEL}) for n in names]
        loop = checked(
            run_loop(port, "/v1/streams", creates, threads=8, seconds=120, expect=201),
            "create streams",
        )
        created = [names[i] for i in loop.done]
        figures.memory["create_rate"] = loop.rate
        # A handful of items per stream: 4 labelled examples, then 2 predictions left waiting.
        items, labels = source.draw(6 * len(created))
        fed = 0
        for kind, offset, size in (("examples", 0, 4), ("predict", 4, 2)):
            paths, bodies = [], []
            for k, name in enumerate(created):
                rows = range(6 * k + offset, 6 * k + offset + size)
                if kind == "examples":
                    batch = [
                        {"id": f"x{j}", "features": items[j], "label": labels[j]} for j in rows
                    ]
                else:
                    batch = [{"id": f"x{j}", "features": items[j]} for j in rows]
                paths.append(f"/v1/streams/{name}/{kind}")
                bodies.append(encode({"items": batch}))
            fed += send_each(port, paths, bodies, threads=8, seconds=120)
        figures.memory["seconds"] = time.perf_counter() - t0
        after, peak = rss_bytes(srv.pid)
        figures.memory.update(
            streams=float(len(created)),
            requests=float(fed),
            rss_before=float(before),
            rss=float(after),
            peak=float(peak),
        )


def send_each(
    port: int, paths: list[str], bodies: list[bytes], threads: int, seconds: float
) -> int:
    """POST bodies[i] to paths[i] from a few keep-alive connections; return how many got 200."""
    ok = [0]
    failures: list[str] = []
    lock = threading.Lock()
    deadline = time.perf_counter() + seconds
    headers = {"content-type": "application/json"}

    def worker(k: int) -> None:
        conn = http.client.HTTPConnection(HOST, port, timeout=120)
        good = 0
        try:
            for index in range(k, len(paths), threads):
                if time.perf_counter() > deadline:
                    break
                conn.request("POST", paths[index], body=bodies[index], headers=headers)
                response = conn.getresponse()
                data = response.read()
                if response.status == 200:
                    good += 1
                elif len(failures) < 3:
                    failures.append(f"{paths[index]} {response.status}: {data[:300]!r}")
        finally:
            conn.close()
            with lock:
                ok[0] += good

    workers = [threading.Thread(target=worker, args=(k,)) for k in range(threads)]
    for w in workers:
        w.start()
    for w in workers:
        w.join()
    if failures:
        raise RuntimeError(f"feeding streams: unexpected answers, e.g. {failures[0]}")
    return ok[0]


# -- the report --------------------------------------------------------------------------------


def verdict(met: bool) -> str:
    return "[green]met[/green]" if met else "[red]not met[/red]"


def report(figures: Figures, args: argparse.Namespace, console: Console) -> None:
    table = Table(title="mistake-ledger service over loopback (one server process each)")
    table.add_column("measure", no_wrap=True)
    table.add_column("figure", justify="right", no_wrap=True)
    table.add_column("p50 ms", justify="right", no_wrap=True)
    table.add_column("p99 ms", justify="right", no_wrap=True)
    table.add_column("server CPU µs", justify="right", no_wrap=True)
    table.add_column("goal", justify="right", no_wrap=True)
    table.add_column("", no_wrap=True)
    verdicts: list[tuple[str, bool]] = []

    def loop_row(label: str, loop: Loop | None) -> None:
        if loop is None:
            return
        table.add_row(
            label,
            f"{loop.rate:,.0f} calls/s",
            f"{loop.percentile(50) * 1e3:.2f}",
            f"{loop.percentile(99) * 1e3:.2f}",
            f"{loop.cpu_per_call * 1e6:,.0f} /call",
        )

    for level in LEVELS:
        bares, serveds = figures.bare.get(level, []), figures.predict.get(level, [])
        if not bares or not serveds:
            continue
        bare, served = merged(bares), merged(serveds)
        loop_row(f"bare endpoint: single predict, {level} in flight", bare)
        loop_row("service: the same", served)
        if bare.rate <= 0:
            continue
        ratio = served.rate / bare.rate
        met = ratio >= GOAL_RATIO
        verdicts.append(
            (f"single predict at >= 85% of the bare endpoint's call rate, {level} in flight", met)
        )
        rounds = ", ".join(f"{s.rate / b.rate:.0%}" for b, s in zip(bares, serveds, strict=False))
        table.add_row(
            f"  service / bare endpoint (rounds: {rounds})",
            f"{ratio:.0%}",
            "",
            "",
            f"{served.cpu_per_call / bare.cpu_per_call:.1f}x",
            f">= {GOAL_RATIO:.0%}",
            verdict(met),
        )
        unsynced = figures.normal.get(level, [])
        if unsynced:
            normal = merged(unsynced)
            loop_row("service, durability NORMAL: the same", normal)
            rounds = ", ".join(
                f"{s.rate / b.rate:.0%}" for b, s in zip(bares, unsynced, strict=False)
            )
            table.add_row(
                f"  NORMAL / bare endpoint (rounds: {rounds})",
                f"{normal.rate / bare.rate:.0%}",
                "",
                "",
                f"{normal.cpu_per_call / bare.cpu_per_call:.1f}x",
            )
    loop_row("service: single feedback", figures.feedback)
    for kind in ("predict", "feedback", "examples"):
        if kind not in figures.batch:
            continue
        count, loop = figures.batch[kind]
        rate = count / loop.seconds if loop.seconds > 0 else 0.0
        goal, mark = "", ""
        if kind in ("feedback", "examples"):
            met = rate >= GOAL_LABELLED
            verdicts.append((f"{kind} batches: >= 50,000 labelled items/s", met))
            goal, mark = f">= {GOAL_LABELLED:,.0f}/s", verdict(met)
        cpu = loop.server_cpu / count * 1e6 if count else float("nan")
        table.add_row(
            f"service: {kind}, batches of {BATCH}",
            f"{rate:,.0f} items/s",
            f"{loop.percentile(50) * 1e3:.0f}",
            f"{loop.percentile(99) * 1e3:.0f}",
            f"{cpu:,.1f} /item",
            goal,
            mark,
        )
    memory = figures.memory
    if memory:
        streams = int(memory["streams"])
        met = memory["rss"] < GOAL_MEMORY and streams >= args.streams
        verdicts.append((f"{args.streams:,} six-learner streams under 1 GiB resident", met))
        per_stream = (memory["rss"] - memory["rss_before"]) / max(streams, 1)
        table.add_row(
            f"service: resident, {streams:,} streams",
            f"{memory['rss'] / 2**20:,.0f} MiB",
            "",
            "",
            "",
            "< 1,024 MiB",
            verdict(met),
        )
        table.add_row("  per stream, above the empty server", f"{per_stream / 1024:,.1f} KiB")
        table.add_row("  item batches answered", f"{memory['requests']:,.0f} of {2 * streams:,}")
        table.add_row(
            "  empty server; peak",
            f"{memory['rss_before'] / 2**20:,.0f} MiB; {memory['peak'] / 2**20:,.0f} MiB",
        )
        table.add_row("  creating streams", f"{memory['create_rate']:,.0f} streams/s")
    if figures.panel:
        for key, label in (("label", "one at a time"), ("skim", "batches of 1000, skimming")):
            per_label = figures.panel[key]
            table.add_row(
                f"panel alone in process: labels, {label}",
                f"{1 / per_label:,.0f} labels/s",
                "",
                "",
                f"{per_label * 1e6:,.1f} /label",
            )
        table.add_row(
            "panel alone in process: predict",
            f"{1 / figures.panel['predict']:,.0f} items/s",
            "",
            "",
            f"{figures.panel['predict'] * 1e6:,.1f} /item",
        )
    if figures.snapshot is not None:
        held, seconds, size = figures.snapshot
        table.add_row(
            f"snapshot of a stream holding {held:,} ids",
            f"{seconds * 1e3:,.0f} ms",
            "",
            "",
            f"{seconds / held * 1e6:,.1f} /id",
        )
        table.add_row("  its JSON text", f"{size / 2**20:,.1f} MiB")
    console.print(table)
    console.print(
        "One durable commit (SQLite, WAL, synchronous=FULL) in this file system: median "
        f"{figures.commit_seconds[0] * 1e3:.2f} ms, mean {figures.commit_seconds[1] * 1e3:.2f} "
        "ms (200 commits). A durable call answers after "
        "its commit; with k calls in flight at most k share one, so with few in flight the "
        "service waits on the disk, not on its CPU (compare the server CPU per call). "
        "The same commit (25 rows) made by a second thread while this one runs Python: median "
        f"{figures.busy_commit_seconds * 1e3:.2f} ms (that thread waits for the interpreter "
        "lock after its calls into SQLite; why the service writes on its event loop's thread "
        "and leaves the sync to a helper process, service/store.py)."
    )
    if figures.collections:
        counts = ", ".join(
            f"generation {gen}: {count:,.0f}" for gen, count in sorted(figures.collections.items())
        )
        console.print(f"Garbage collections in the service during its loops: {counts}.")
    console.print(
        f"Client: one thread with a keep-alive connection per call in flight for single calls "
        f"({CONCURRENCY} for feedback), {BATCH_CONCURRENCY} for batches; each loop at most "
        f"{args.seconds:g} s. Server CPU: "
        "user + system time of the server process during the loop, per call or item. Panel "
        "alone: the same six learners in this process on encoded items (learn_checked, then "
        "ceiling_value(), per label; or skim over a batch, learn_checked where it stops), the "
        "floor under the service's cost per item; it and the snapshot run with the server's "
        "young-generation GC threshold. "
        f"Panel: {', '.join(p['name'] for p in PANEL)} on an open space of {SPACE_SIZE:,} flags "
        f"(about {FLAGS_PER_ITEM + 1} on per item). Durability FULL (the default): a write "
        "answers after its commit's fsync; NORMAL: once committed, before the sync (it survives "
        f"a crash of the process, not of the machine). {os.cpu_count()} cores, Python "
        f"{platform.python_version()}; other work on this machine moves the figures."
    )
    for what, met in verdicts:
        console.print(f"  {'met    ' if met else 'NOT met'}  {what}")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    parser.add_argument("--seconds", type=float, default=8.0, help="time bound of each loop")
    parser.add_argument("--calls", type=int, default=30_000, help="most single calls per loop")
    parser.add_argument("--warmup", type=int, default=300, help="calls before each timed loop")
    parser.add_argument("--batches", type=int, default=100, help="most batches per batch loop")
    parser.add_argument(
        "--rounds", type=int, default=2, help="alternating rounds (bare, service) per level"
    )
    parser.add_argument("--streams", type=int, default=10_000, help="streams for the memory run")
    parser.add_argument("--skip-memory", action="store_true", help="leave out the memory run")
    parser.add_argument(
        "--gc-young-threshold",
        type=int,
        default=None,
        help="the service's MISTAKE_LEDGER_GC_YOUNG_THRESHOLD (default: its own default)",
    )
    args = parser.parse_args(argv)
    console = Console(width=max(Console().width, 140))
    figures = Figures()
    source = Items(seed=7)
    items, labels = source.draw(args.warmup + args.calls)
    bodies = predict_bodies(items, "s")
    with tempfile.TemporaryDirectory(prefix="ml-bench-") as tmp:
        work = Path(tmp)
        figures.commit_seconds = commit_seconds(work)
        figures.busy_commit_seconds = busy_commit_seconds(work)
        console.print("bare endpoint and service ...")
        measure_service(work, bodies, labels, source, args, figures, console)
        if not args.skip_memory:
            console.print(f"memory: {args.streams:,} streams ...")
            measure_memory(work, source, args, figures)
    with server_gc(args):
        measure_panel(source, figures)
        measure_snapshot(source, figures)
    report(figures, args, console)


if __name__ == "__main__":
    main()
