"""Durability under kill -9: the real server, concurrent clients, SIGKILL in the middle of traffic.

The test starts ``mistake-ledger serve`` as a child process (the Python process itself, no shell
in between), creates one stream per client ("lane-<k>", written only by client k) and one stream
all clients share ("common"), and runs CLIENTS threads of httpx clients on loopback that send
predictions, labels and examples, single and batched, labels out of order, with deliberate
repeats and contradicting labels. A call whose 2xx answer came back is *acknowledged*, and its
answer is kept; a call whose answer never came (the kill) has an *unknown* outcome. In the middle
of the traffic the server process gets SIGKILL; it is started again on the same data directory,
and then:

- Lanes: fresh learners (``learners.make``, the same parameters) re-run every acknowledged call
  in the order its one client sent it, which is the order the server applied it. Every answer the
  server gave (votes, per-learner wrong/updated, statuses) must equal the re-run's, and so must
  every ledger count after the restart (labels seen, served mistakes, mistakes, updates, the most
  outstanding predictions at an update, ceiling value and state, pending, known features).
- Common: the order of different clients' calls is the server's own, so its counts are checked
  against sums of what the acknowledged answers reported (votes, per-learner outcomes); a replay
  in another order than the one answered would in general not reproduce those sums.
- Unknown calls: before anything is retried, the restarted ledger must be the acknowledged state
  plus exactly the unknown calls that a retry then reports as done already ("duplicate"); every
  call is all or nothing; the retry's answer must equal the re-run's.
- Every acknowledged prediction id is known (sent again: a duplicate with the same votes); every
  acknowledged label was applied once (sent again: "duplicate" with the same outcome; another
  label: a conflict, 409 when sent alone); /metrics agrees with the ledger.

Three rounds of traffic, kill, restart and the checks above; the second kill comes
while another process holds SQLite's write lock (a stalled disk), so the calls applied in memory
meanwhile cannot commit: none of them may have been answered, and none may survive. Then every
waiting prediction gets its label and a clean stop and start keep the ledger. Both durability
settings run: ``full`` with the log never snapshotted (the restart replays every event),
``normal`` with a snapshot every few events (the restart reads a snapshot and replays the events
after it). Throughput is printed (run with ``-s``); nothing here is a timed assertion.
"""

from __future__ import annotations

import copy
import json
import math
import os
import random
import select
import shutil
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from contextlib import closing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families

import learners
from service.demo import free_port
from service.store import FILE_NAME

CLIENTS = 4
COMMON = "common"
LANES = [f"lane-{k}" for k in range(CLIENTS)]
SPACE = 16  # an open feature space; the items use 12 of its names
FLAGS = [f"f{i}" for i in range(12)]
NEAR = 0.8  # the stream's default share of the ceiling that counts as near
PANEL = [
    {"name": "elim", "kind": "elimination", "negations": True},
    {"name": "perc", "kind": "perceptron", "margin": 0.25},
    {"name": "win", "kind": "winnow"},
    {"name": "wm", "kind": "weighted-majority"},
]
NAMES = [spec["name"] for spec in PANEL]
ROUNDS = ("plain", "stalled", "plain")  # one kill each; "stalled": while commits cannot happen
STALL_SECONDS = 0.3  # how long commits are held up before that kill
KILL_AFTER = (200, 400)  # acknowledged calls in a round before the kill (drawn in this range)
ROUND_SECONDS = 4.0  # ... or this long, whichever comes first
CHUNK = 400  # items per batch when everything acknowledged is sent again


def learner_params(spec: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in spec.items() if k not in ("name", "kind")}


def features_key(features: Any) -> str:
    return json.dumps(features, sort_keys=True)


# -- the server process -----------------------------------------------------------------------


def serve_command() -> str:
    script = Path(sys.executable).with_name("mistake-ledger")
    command = str(script) if script.exists() else shutil.which("mistake-ledger")
    assert command, "the mistake-ledger console script is not installed in this environment"
    return command


class Server:
    """``mistake-ledger serve`` as a child process on a free loopback port."""

    def __init__(self, data_dir: Path, durability: str, snapshot_every: int, logs: Path) -> None:
        self.data_dir = data_dir
        self.durability = durability
        self.logs = logs
        self.env = {k: v for k, v in os.environ.items() if not k.startswith("MISTAKE_LEDGER_")}
        self.env["MISTAKE_LEDGER_SNAPSHOT_EVERY_EVENTS"] = str(snapshot_every)
        self.process: subprocess.Popen[bytes] | None = None
        self.base = ""
        self.log = logs / "none"
        self.starts = 0

    def start(self) -> None:
        port = free_port()
        self.base = f"http://127.0.0.1:{port}"
        self.log = self.logs / f"serve-{self.durability}-{self.starts}.log"
        self.starts += 1
        args = [
            serve_command(),
            "serve",
            "--host",
            "127.0.0.1",
            "--port",
            str(port),
            "--data-dir",
            str(self.data_dir),
            "--durability",
            self.durability,
            "--log-level",
            "warning",
        ]
        with self.log.open("wb") as out:
            self.process = subprocess.Popen(
                args, env=self.env, stdout=out, stderr=subprocess.STDOUT
            )
        deadline = time.monotonic() + 30
        while True:
            if self.process.poll() is not None:
                pytest.fail(f"the service exited with {self.process.returncode}:\n{self.output()}")
            try:
                if httpx.get(f"{self.base}/readyz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                pytest.fail(f"the service was not ready within 30 s:\n{self.output()}")
            time.sleep(0.05)
        # The child is the server itself (the console script's Python), not a shell around it.
        cmdline = Path(f"/proc/{self.process.pid}/cmdline")
        if cmdline.exists():
            assert b"serve" in cmdline.read_bytes()

    def kill(self) -> None:
        assert self.process is not None
        os.kill(self.process.pid, signal.SIGKILL)
        assert self.process.wait(timeout=10) == -signal.SIGKILL

    def stop(self) -> None:
        """SIGTERM: the clean shutdown, which snapshots every stream and so empties the log."""
        assert self.process is not None
        self.process.terminate()
        code = self.process.wait(timeout=30)
        # uvicorn shuts down on SIGTERM, then raises the signal again: the code is 0 or -15.
        assert code in (0, -signal.SIGTERM), f"the service stopped with {code}:\n{self.output()}"
        with closing(sqlite3.connect(self.data_dir / FILE_NAME)) as db:
            assert db.execute("SELECT count(*) FROM events").fetchone()[0] == 0

    def cleanup(self) -> None:
        if self.process is not None and self.process.poll() is None:
            self.process.kill()
            self.process.wait(timeout=10)

    def output(self) -> str:
        return self.log.read_text(errors="replace")[-4000:] if self.log.exists() else ""


# -- calls and what each client knows ---------------------------------------------------------


@dataclass
class Call:
    """One request. ``items`` pairs each item id with what the client expects of it:
    "new" (it changes the state), "again" (a repeat of an acknowledged one) or "conflict"."""

    stream: str
    path: str  # predict, feedback or examples
    body: dict[str, Any]
    items: list[tuple[str, str]]
    answer: Any = None

    def size(self) -> int:
        return len(self.items)

    def changes(self) -> bool:
        return any(expect == "new" for _, expect in self.items)


def answer_items(call: Call, answer: Any) -> list[dict[str, Any]]:
    return list(answer["items"]) if "items" in call.body else [answer]


def seen(call: Call, answer: Any) -> list[str]:
    """What the server says it did with each item, in the client's words."""
    out = []
    for item in answer_items(call, answer):
        if call.path == "predict":
            out.append("again" if item["duplicate"] else "new")
        else:
            words = {"applied": "new", "duplicate": "again", "conflict": "conflict"}
            out.append(words.get(item["status"], item["status"]))
    return out


def plain(answer: Any) -> Any:
    """An answer without the human sentences (the local re-run does not write them)."""
    if isinstance(answer, dict):
        return {k: plain(v) for k, v in answer.items() if k != "message"}
    if isinstance(answer, list):
        return [plain(v) for v in answer]
    return answer


class Lane:
    """What one client knows of one stream: its acknowledged predictions, labels and examples."""

    def __init__(self, stream: str, client: int) -> None:
        self.stream = stream
        self.client = client
        self.serial = 0
        self.truth: dict[str, int] = {}  # predicted id -> the label it will get
        self.features: dict[str, Any] = {}  # acknowledged predictions
        self.waiting: list[str] = []  # acknowledged predictions without a label sent
        self.labelled: dict[str, int] = {}  # acknowledged labels
        self.examples: dict[str, tuple[Any, int]] = {}  # acknowledged examples

    def _id(self, tag: str) -> str:
        self.serial += 1
        return f"{self.stream}.c{self.client}.{tag}{self.serial}"

    @staticmethod
    def _item(rng: random.Random) -> tuple[Any, int]:
        on = [f for f in FLAGS if rng.random() < 0.3]
        label = int("f1" in on or ("f4" in on and "f7" in on)) ^ int(rng.random() < 0.05)
        if rng.random() < 0.5:
            return on, label
        return {f: rng.choice([1, 0.5]) for f in on}, label

    def plan(self, rng: random.Random) -> Call:
        roll = rng.random()
        if roll < 0.28 or len(self.waiting) < 4:
            return self._predict(rng, 1, batch=rng.random() < 0.2)
        if roll < 0.40:
            return self._predict(rng, rng.randint(2, 5), batch=True)
        if roll < 0.58:
            return self._feedback(rng, 1, batch=False)
        if roll < 0.74:
            return self._feedback(rng, rng.randint(1, 4), batch=True)
        if roll < 0.86:
            return self._examples(rng, rng.randint(1, 4), batch=rng.random() < 0.6)
        if roll < 0.93 and self.features:
            item_id = rng.choice(list(self.features))
            body = {"id": item_id, "features": self.features[item_id]}
            return Call(self.stream, "predict", body, [(item_id, "again")])
        if self.labelled:
            item_id = rng.choice(list(self.labelled))
            body = {"id": item_id, "label": self.labelled[item_id]}
            return Call(self.stream, "feedback", body, [(item_id, "again")])
        return self._predict(rng, 1, batch=False)

    def _predict(self, rng: random.Random, count: int, batch: bool) -> Call:
        items, plan = [], []
        for _ in range(count):
            item_id = self._id("p")
            features, label = self._item(rng)
            self.truth[item_id] = label
            items.append({"id": item_id, "features": features})
            plan.append((item_id, "new"))
        body = {"items": items} if batch else items[0]
        return Call(self.stream, "predict", body, plan)

    def _feedback(self, rng: random.Random, count: int, batch: bool) -> Call:
        chosen = rng.sample(self.waiting, min(count, len(self.waiting)))  # out of order
        for item_id in chosen:
            self.waiting.remove(item_id)
        items = [{"id": i, "label": self.truth[i]} for i in chosen]
        plan = [(i, "new") for i in chosen]
        if batch and self.labelled:
            done = rng.sample(list(self.labelled), min(2, len(self.labelled)))
            if rng.random() < 0.5:  # a repeated label
                items.append({"id": done[0], "label": self.labelled[done[0]]})
                plan.append((done[0], "again"))
            if rng.random() < 0.3:  # a contradicting label
                items.append({"id": done[-1], "label": 1 - self.labelled[done[-1]]})
                plan.append((done[-1], "conflict"))
        order = list(range(len(items)))
        rng.shuffle(order)
        items = [items[i] for i in order]
        plan = [plan[i] for i in order]
        body = {"items": items} if batch else items[0]
        return Call(self.stream, "feedback", body, plan)

    def _examples(self, rng: random.Random, count: int, batch: bool) -> Call:
        items, plan = [], []
        for _ in range(count if batch else 1):
            item_id = self._id("x")
            features, label = self._item(rng)
            items.append({"id": item_id, "features": features, "label": label})
            plan.append((item_id, "new"))
        if batch and self.examples and rng.random() < 0.3:  # a repeated example
            item_id = rng.choice(list(self.examples))
            features, label = self.examples[item_id]
            items.append({"id": item_id, "features": features, "label": label})
            plan.append((item_id, "again"))
        body = {"items": items} if batch else items[0]
        return Call(self.stream, "examples", body, plan)

    def settle(self, call: Call) -> None:
        """The call is done (acknowledged, or retried after the restart): remember its items."""
        bodies = call.body.get("items", [call.body])
        for (item_id, expect), item in zip(call.items, bodies, strict=True):
            if expect != "new":
                continue
            if call.path == "predict":
                self.features[item_id] = item["features"]
                self.waiting.append(item_id)
            elif call.path == "feedback":
                self.labelled[item_id] = int(item["label"])
            else:
                self.examples[item_id] = (item["features"], int(item["label"]))


@dataclass
class Traffic:
    """One client's calls in one round, in the order sent."""

    client: int
    acked: list[Call] = field(default_factory=list)
    unknown: list[Call] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)


def run_client(
    base: str,
    client: int,
    lanes: dict[str, Lane],
    rng: random.Random,
    stop: threading.Event,
    out: Traffic,
) -> None:
    deadline = time.monotonic() + 3 * ROUND_SECONDS
    with httpx.Client(base_url=base, timeout=10.0) as http:
        while not stop.is_set() and time.monotonic() < deadline:
            stream = LANES[client] if rng.random() < 0.6 else COMMON
            call = lanes[stream].plan(rng)
            try:
                response = http.post(f"/v1/streams/{stream}/{call.path}", json=call.body)
            except httpx.TransportError:
                out.unknown.append(call)  # sent, and no answer: it may or may not be applied
                return
            if not response.is_success:
                out.problems.append(f"{call}: {response.status_code} {response.text}")
                return
            call.answer = response.json()
            expected = [expect for _, expect in call.items]
            if seen(call, call.answer) != expected:
                out.problems.append(f"{call}: expected {expected}, got {call.answer}")
            lanes[stream].settle(call)
            out.acked.append(call)


# -- the local re-run and the sums --------------------------------------------------------------


class Replica:
    """A lane re-run locally: fresh learners (``learners.make``) fed the acknowledged calls.

    It answers every call as the contract says (service-api.md): a prediction waits for its
    label; a label is applied once, repeated ("duplicate", the first outcome) or contradicted
    ("conflict", nothing changes); "wrong" of a label is the learner's vote at predict time
    against the label, of an example its hypothesis at label time.
    """

    def __init__(self) -> None:
        self.space = learners.FeatureSpace(SPACE)
        self.learners = [
            learners.make(spec["kind"], features=self.space, **learner_params(spec))
            for spec in PANEL
        ]
        self.pending: dict[str, tuple[Any, list[int]]] = {}  # id -> (encoded item, votes)
        self.predicted: dict[str, tuple[str, list[int]]] = {}  # id -> (features key, votes)
        self.labelled: dict[str, tuple[int, dict[str, Any]]] = {}
        self.examples: dict[str, tuple[str, int, dict[str, Any]]] = {}
        self.served = [0] * len(PANEL)
        self.max_outstanding = [0] * len(PANEL)

    def call(self, path: str, body: dict[str, Any]) -> Any:
        items = body.get("items", [body])
        if path == "predict":
            answers = self._predict(items)
        elif path == "feedback":
            answers = self._feedback(items)
        else:
            answers = self._examples(items)
        return {"items": answers} if "items" in body else answers[0]

    def _predict(self, items: list[dict[str, Any]]) -> list[dict[str, Any]]:
        fresh = [item for item in items if item["id"] not in self.predicted]
        encoded = [self.space.encode(item["features"]) for item in fresh]
        for item, enc in zip(fresh, encoded, strict=True):
            votes = [learner.predict(enc) for learner in self.learners]
            self.pending[item["id"]] = (enc, votes)
            self.predicted[item["id"]] = (features_key(item["features"]), votes)
        new = {item["id"] for item in fresh}
        out = []
        for item in items:
            key, votes = self.predicted[item["id"]]
            assert key == features_key(item["features"]), "the test reused an id"
            out.append(
                {
                    "id": item["id"],
                    "label": votes[0],
                    "served_by": NAMES[0],
                    "votes": dict(zip(NAMES, votes, strict=True)),
                    "duplicate": item["id"] not in new,
                }
            )
        return out

    def _learn(self, enc: Any, y: int, votes: list[int] | None) -> dict[str, Any]:
        outcome = {}
        for i, learner in enumerate(self.learners):
            before = learner.mistakes
            updated = bool(learner.learn(enc, y))
            if votes is None:
                wrong = learner.mistakes > before
            else:
                wrong = votes[i] != y
                self.served[i] += wrong
            if updated:
                self.max_outstanding[i] = max(self.max_outstanding[i], len(self.pending))
            outcome[NAMES[i]] = {"wrong": wrong, "updated": updated}
        return outcome

    def _feedback(self, items: list[dict[str, Any]]) -> list[dict[str, Any]]:
        out: list[dict[str, Any]] = []
        for item in items:
            item_id, y = item["id"], int(item["label"])
            if item_id in self.pending:
                enc, votes = self.pending.pop(item_id)
                outcome = self._learn(enc, y, votes)
                self.labelled[item_id] = (y, outcome)
                out.append({"id": item_id, "status": "applied", "learners": outcome})
            elif item_id in self.labelled:
                label, outcome = self.labelled[item_id]
                if label == y:
                    out.append({"id": item_id, "status": "duplicate", "learners": outcome})
                else:
                    out.append({"id": item_id, "status": "conflict"})
            else:
                out.append({"id": item_id, "status": "unknown"})
        return out

    def _examples(self, items: list[dict[str, Any]]) -> list[dict[str, Any]]:
        fresh = [item for item in items if item["id"] not in self.examples]
        encoded = [self.space.encode(item["features"]) for item in fresh]
        for item, enc in zip(fresh, encoded, strict=True):
            y = int(item["label"])
            outcome = self._learn(enc, y, None)
            self.examples[item["id"]] = (features_key(item["features"]), y, outcome)
        new = {item["id"] for item in fresh}
        out = []
        for item in items:
            key, label, outcome = self.examples[item["id"]]
            assert (key, label) == (features_key(item["features"]), int(item["label"]))
            status = "applied" if item["id"] in new else "duplicate"
            out.append({"id": item["id"], "status": status, "learners": outcome})
        return out

    def counts(self) -> tuple[int, int]:
        """(predictions, labels) for the metrics."""
        return len(self.predicted), len(self.labelled)

    def view(self) -> dict[str, Any]:
        rows = {}
        for i, learner in enumerate(self.learners):
            value = learner.ceiling().value
            rows[NAMES[i]] = {
                "examples": learner.examples,
                "mistakes": learner.mistakes,
                "updates": learner.updates,
                "served_mistakes": self.served[i],
                "max_outstanding": self.max_outstanding[i],
                "ceiling": value if value is not None and math.isfinite(value) else None,
                "state": learner.standing(NEAR),
            }
        return {
            "pending": len(self.pending),
            "expired": 0,
            "known_features": len(self.space),
            "learners": rows,
        }


class Tally:
    """The common stream's counts, summed from what the answers reported."""

    def __init__(self) -> None:
        self.votes: dict[str, dict[str, int]] = {}  # predicted id -> votes
        self.labels: dict[str, tuple[int, dict[str, Any]]] = {}  # id -> (label, outcome)
        self.examples: dict[str, dict[str, Any]] = {}  # example id -> outcome

    def add(self, call: Call, answer: Any) -> list[str]:
        """Count the call's new items (from this answer); return what disagrees."""
        problems = []
        bodies = call.body.get("items", [call.body])
        got = answer_items(call, answer)
        for (item_id, expect), body, item in zip(call.items, bodies, got, strict=True):
            if call.path == "predict":
                if expect == "new":
                    self.votes[item_id] = item["votes"]
                elif item["votes"] != self.votes[item_id]:
                    problems.append(f"{item_id}: votes {item['votes']} != {self.votes[item_id]}")
                continue
            if expect == "conflict":
                continue
            if call.path == "feedback":
                y = int(body["label"])
                if expect == "new":
                    self.labels[item_id] = (y, item["learners"])
                    for name in NAMES:  # a label's "wrong" is the vote against it
                        if item["learners"][name]["wrong"] != (self.votes[item_id][name] != y):
                            problems.append(f"{item_id}: {name} wrong {item['learners']}")
                elif item["learners"] != self.labels[item_id][1]:
                    problems.append(f"{item_id}: repeated label answered {item['learners']}")
            elif expect == "new":
                self.examples[item_id] = item["learners"]
            elif item["learners"] != self.examples[item_id]:
                problems.append(f"{item_id}: repeated example answered {item['learners']}")
        return problems

    def counts(self) -> tuple[int, int]:
        return len(self.votes), len(self.labels)

    def view(self) -> dict[str, Any]:
        outcomes = [o for _, o in self.labels.values()]
        rows = {
            name: {
                "examples": len(self.labels) + len(self.examples),
                "served_mistakes": sum(o[name]["wrong"] for o in outcomes),
                "updates": sum(o[name]["updated"] for o in [*outcomes, *self.examples.values()]),
            }
            for name in NAMES
        }
        return {"pending": len(self.votes) - len(self.labels), "expired": 0, "learners": rows}


# -- reading the server -----------------------------------------------------------------------


def lane_view(http: httpx.Client, stream: str) -> dict[str, Any]:
    ledger = http.get(f"/v1/streams/{stream}/ledger").json()
    described = http.get(f"/v1/streams/{stream}").json()
    keys = ("examples", "mistakes", "updates", "served_mistakes", "max_outstanding", "state")
    rows = {
        row["name"]: {**{k: row[k] for k in keys}, "ceiling": row["ceiling"]["value"]}
        for row in ledger["learners"]
    }
    return {
        "pending": ledger["pending"],
        "expired": ledger["expired"],
        "known_features": described["known_features"],
        "learners": rows,
    }


def common_view(http: httpx.Client) -> dict[str, Any]:
    ledger = http.get(f"/v1/streams/{COMMON}/ledger").json()
    keys = ("examples", "served_mistakes", "updates")
    rows = {row["name"]: {k: row[k] for k in keys} for row in ledger["learners"]}
    return {"pending": ledger["pending"], "expired": ledger["expired"], "learners": rows}


def views(http: httpx.Client) -> dict[str, dict[str, Any]]:
    out = {stream: lane_view(http, stream) for stream in LANES}
    out[COMMON] = common_view(http)
    return out


def scrape(http: httpx.Client) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    response = http.get("/metrics")
    assert response.status_code == 200
    samples = {}
    for family in text_string_to_metric_families(response.text):
        for sample in family.samples:
            samples[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return samples


class Tracker:
    """Posts after the restart and counts the repeated and contradicting labels it was told of
    (the metrics count those since the process started)."""

    def __init__(self, http: httpx.Client) -> None:
        self.http = http
        self.duplicates = dict.fromkeys([*LANES, COMMON], 0)
        self.conflicts = dict.fromkeys([*LANES, COMMON], 0)

    def post(self, stream: str, path: str, body: dict[str, Any]) -> httpx.Response:
        response = self.http.post(f"/v1/streams/{stream}/{path}", json=body)
        if path == "feedback":
            if response.status_code == 409:
                self.conflicts[stream] += 1
            elif response.is_success:
                answer = response.json()
                for item in answer["items"] if "items" in body else [answer]:
                    self.duplicates[stream] += item["status"] == "duplicate"
                    self.conflicts[stream] += item["status"] == "conflict"
        return response

    def check_metrics(
        self, ledgers: dict[str, dict[str, Any]], counts: dict[str, tuple[int, int]]
    ) -> None:
        """/metrics against the ledgers, the expected counts and the labels this process saw."""
        samples = scrape(self.http)
        for stream, view in ledgers.items():
            predictions, labels = counts[stream]
            s = (("stream", stream),)
            expect = {
                "mistake_ledger_predictions_total": predictions,
                "mistake_ledger_feedback_total": labels,
                "mistake_ledger_label_delay_seconds_count": labels,
                "mistake_ledger_pending_predictions": view["pending"],
                "mistake_ledger_predictions_expired_total": 0,
                "mistake_ledger_feedback_duplicates_total": self.duplicates[stream],
                "mistake_ledger_feedback_conflicts_total": self.conflicts[stream],
            }
            for name, value in expect.items():
                assert samples[(name, s)] == value, (stream, name, samples[(name, s)], value)
            for learner, row in view["learners"].items():
                labels_ = tuple(sorted((*s, ("learner", learner))))
                served = samples[("mistake_ledger_served_mistakes_total", labels_)]
                updates = samples[("mistake_ledger_updates_total", labels_)]
                assert (served, updates) == (row["served_mistakes"], row["updates"]), (
                    stream,
                    learner,
                )


# -- the test ---------------------------------------------------------------------------------


def create_streams(base: str) -> None:
    with httpx.Client(base_url=base, timeout=10.0) as http:
        for stream in [*LANES, COMMON]:
            body = {"stream": stream, "features": SPACE, "learners": PANEL}
            response = http.post("/v1/streams", json=body)
            assert response.status_code == 201, response.text


# A second process that takes SQLite's write lock and keeps it: the server's commits wait, as on
# a stalled disk. It is killed (never closed), so it leaves the files as a crash would.
HOLD_WRITE_LOCK = """
import sqlite3, sys, time
db = sqlite3.connect(sys.argv[1], timeout=10, isolation_level=None)
db.execute("BEGIN IMMEDIATE")
print("held", flush=True)
time.sleep(60)
"""


def hold_write_lock(path: Path) -> subprocess.Popen[bytes]:
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD_WRITE_LOCK, str(path)], stdout=subprocess.PIPE
    )
    assert holder.stdout is not None
    ready, _, _ = select.select([holder.stdout], [], [], 10)
    assert ready and holder.stdout.readline() == b"held\n", "the lock holder did not start"
    return holder


def traffic_round(
    server: Server, lanes: list[dict[str, Lane]], rng: random.Random, stall: bool
) -> tuple[list[Traffic], float]:
    """Clients send calls until the kill; returns what each saw and how long they ran freely.

    With ``stall``, the kill comes while another process holds the database's write lock: the
    calls applied meanwhile cannot commit, so none may be answered (beyond the one per client
    whose commit was done when the lock was taken), and a restart must not show them.
    """
    stop = threading.Event()
    outs = [Traffic(k) for k in range(CLIENTS)]
    threads = [
        threading.Thread(
            target=run_client,
            args=(server.base, k, lanes[k], random.Random(rng.random()), stop, outs[k]),
            name=f"client-{k}",
        )
        for k in range(CLIENTS)
    ]
    target = rng.randint(*KILL_AFTER)
    started = time.monotonic()
    for thread in threads:
        thread.start()
    while time.monotonic() - started < ROUND_SECONDS:
        if sum(len(o.acked) for o in outs) >= target or any(o.problems for o in outs):
            break
        time.sleep(0.005)
    elapsed = time.monotonic() - started  # the traffic's time, for the throughput figure
    holder = hold_write_lock(server.data_dir / FILE_NAME) if stall else None
    acked_at_stall = {o.client: len(o.acked) for o in outs}
    if holder is not None:
        time.sleep(STALL_SECONDS)
    server.kill()  # kill -9 in the middle of the traffic
    if holder is not None:
        holder.kill()
        holder.wait(timeout=10)
        assert holder.stdout is not None
        holder.stdout.close()
    stop.set()
    for thread in threads:
        thread.join(timeout=30)
        assert not thread.is_alive()
    if stall:
        # A call that changes the state is answered only after its commit; during the stall that
        # is at most the one call per client whose commit was done as the lock was taken. (A
        # repeat may be answered: it waits only for what was queued before it.)
        late = [c for o in outs for c in o.acked[acked_at_stall[o.client] :] if c.changes()]
        assert len(late) <= CLIENTS, f"{len(late)} writes were answered without a commit: {late}"
    return outs, elapsed


def settle_after_restart(
    server: Server,
    lanes: list[dict[str, Lane]],
    replicas: dict[str, Replica],
    tally: Tally,
    outs: list[Traffic],
) -> tuple[int, int]:
    """Check the restarted server against the round's calls; returns (unknown, found applied)."""
    problems = [p for o in outs for p in o.problems]
    assert not problems, problems
    found_applied = 0
    with httpx.Client(base_url=server.base, timeout=30.0) as http:
        before = views(http)  # nothing retried yet
        samples = scrape(http)
        for stream, view in before.items():
            s = (("stream", stream),)
            assert samples[("mistake_ledger_pending_predictions", s)] == view["pending"]
            assert samples[("mistake_ledger_feedback_duplicates_total", s)] == 0
        tracker = Tracker(http)

        # Lanes: re-run the acknowledged calls in their client's order; every answer must match.
        for k, out in enumerate(outs):
            replica = replicas[LANES[k]]
            for call in out.acked:
                if call.stream == LANES[k]:
                    assert plain(call.answer) == replica.call(call.path, call.body), call
            unknown = [call for call in out.unknown if call.stream == LANES[k]]
            if not unknown:
                assert before[LANES[k]] == replica.view(), (LANES[k], before[LANES[k]])
            for call in unknown:
                done = copy.deepcopy(replica)
                done.call(call.path, call.body)
                if before[call.stream] == done.view():
                    ledger_says: bool | None = True
                else:
                    # Not the acknowledged state, with or without the unknown call: lost or extra.
                    assert before[call.stream] == replica.view(), (call, before[call.stream])
                    ledger_says = False
                if done.view() == replica.view():
                    ledger_says = None  # the call changes nothing either way
                response = tracker.post(call.stream, call.path, call.body)
                assert response.is_success, response.text
                answer = response.json()
                applied = was_applied(call, answer)
                assert ledger_says is None or applied == ledger_says, (call, answer)
                expected = (
                    copy.deepcopy(done).call(call.path, call.body)
                    if applied
                    else replica.call(call.path, call.body)
                )
                assert plain(answer) == expected, (call, answer, expected)
                replicas[call.stream] = done if applied else replica
                found_applied += bool(applied)
                lanes[k][call.stream].settle(call)

        # Common: the acknowledged sums, plus the unknown calls a retry finds done already.
        for out in outs:
            for call in out.acked:
                if call.stream == COMMON:
                    problems += tally.add(call, call.answer)
        retried = []
        for k, out in enumerate(outs):
            for call in out.unknown:
                if call.stream != COMMON:
                    continue
                response = tracker.post(call.stream, call.path, call.body)
                assert response.is_success, response.text
                answer = response.json()
                retried.append((call, answer, was_applied(call, answer)))
                lanes[k][COMMON].settle(call)
        for call, answer, applied in retried:
            if applied:
                problems += tally.add(call, answer)
                found_applied += 1
        assert before[COMMON] == tally.view(), (before[COMMON], tally.view())
        for call, answer, applied in retried:
            if not applied:
                problems += tally.add(call, answer)
        assert not problems, problems

        after = check_ledgers(http, replicas, tally)
        check_known(tracker, lanes, replicas, tally)
        assert views(http) == after  # sending everything again changed nothing
        tracker.check_metrics(after, counts(replicas, tally))
    unknown = sum(len(o.unknown) for o in outs)
    return unknown, found_applied


def was_applied(call: Call, answer: Any) -> bool | None:
    """From a retry's answer: were the call's new items applied before the kill? All or none."""
    pairs = zip(call.items, seen(call, answer), strict=True)
    told = [word for (_, expect), word in pairs if expect == "new"]
    assert set(told) <= {"new", "again"}, (call, answer)
    assert len(set(told)) <= 1, f"a call was applied in part: {call} -> {answer}"
    return None if not told else told[0] == "again"


def counts(replicas: dict[str, Replica], tally: Tally) -> dict[str, tuple[int, int]]:
    out = {stream: replica.counts() for stream, replica in replicas.items()}
    out[COMMON] = tally.counts()
    return out


def check_ledgers(
    http: httpx.Client, replicas: dict[str, Replica], tally: Tally
) -> dict[str, dict[str, Any]]:
    now = views(http)
    for stream, replica in replicas.items():
        assert now[stream] == replica.view(), (stream, now[stream], replica.view())
    assert now[COMMON] == tally.view(), (now[COMMON], tally.view())
    return now


def check_known(
    tracker: Tracker, lanes: list[dict[str, Lane]], replicas: dict[str, Replica], tally: Tally
) -> None:
    """Every acknowledged prediction is known, every acknowledged label was applied once."""
    for stream in [*LANES, COMMON]:
        known = [lane[stream] for lane in lanes if stream in lane]
        features = {i: f for lane in known for i, f in lane.features.items()}
        labelled = {i: y for lane in known for i, y in lane.labelled.items()}
        predicted = [{"id": i, "features": f} for i, f in features.items()]
        again = [{"id": i, "label": y} for i, y in labelled.items()]
        other = [{"id": i, "label": 1 - y} for i, y in labelled.items()]
        for items, path, word in [
            (predicted, "predict", "again"),
            (again, "feedback", "again"),
            (other, "feedback", "conflict"),
        ]:
            for start in range(0, len(items), CHUNK):
                body = {"items": items[start : start + CHUNK]}
                response = tracker.post(stream, path, body)
                assert response.status_code == 200, response.text
                answer = response.json()
                call = Call(stream, path, body, [(item["id"], word) for item in body["items"]])
                assert seen(call, answer) == [word] * len(body["items"])
                if stream == COMMON:
                    assert not tally.add(call, answer)
                else:
                    assert plain(answer) == replicas[stream].call(path, body)
        for item_id, y in list(labelled.items())[:3]:  # alone, another label is a 409
            response = tracker.post(stream, "feedback", {"id": item_id, "label": 1 - y})
            assert response.status_code == 409, response.text
            assert response.json()["error"]["field"] == "label"
            response = tracker.post(stream, "feedback", {"id": item_id, "label": y})
            assert response.json()["status"] == "duplicate"


def label_everything(
    server: Server, lanes: list[dict[str, Lane]], replicas: dict[str, Replica], tally: Tally
) -> None:
    """Every waiting prediction gets its label: none is unknown (404) after the kills."""
    with httpx.Client(base_url=server.base, timeout=30.0) as http:
        for k in range(CLIENTS):
            for stream, lane in lanes[k].items():
                if not lane.waiting:
                    continue
                body = {"items": [{"id": i, "label": lane.truth[i]} for i in lane.waiting]}
                call = Call(stream, "feedback", body, [(i, "new") for i in lane.waiting])
                response = http.post(f"/v1/streams/{stream}/feedback", json=body)
                assert response.status_code == 200, response.text
                answer = response.json()
                assert seen(call, answer) == ["new"] * len(lane.waiting), answer
                if stream == COMMON:
                    assert not tally.add(call, answer)
                else:
                    assert answer == replicas[stream].call("feedback", body)
                lane.waiting.clear()
                lane.settle(call)
        final = check_ledgers(http, replicas, tally)
        assert all(view["pending"] == 0 for view in final.values())


def full_ledgers(base: str) -> dict[str, Any]:
    with httpx.Client(base_url=base, timeout=30.0) as http:
        return {
            stream: (
                http.get(f"/v1/streams/{stream}/ledger").json(),
                http.get(f"/v1/streams/{stream}/compare").json(),
            )
            for stream in [*LANES, COMMON]
        }


@pytest.mark.slow
@pytest.mark.parametrize(
    ("durability", "snapshot_every"),
    [
        # full: every commit is synced to disk, and the log is never snapshotted here, so each
        # restart replays every event since the stream was created.
        ("full", 1_000_000),
        # normal: SQLite in WAL mode with synchronous=NORMAL syncs only at checkpoints; a commit
        # may be lost on power loss or an OS crash, but "transactions are durable across
        # application crashes regardless of the synchronous setting" (sqlite.org/pragma.html,
        # PRAGMA synchronous; common practice), so a kill -9 of the process loses nothing
        # acknowledged. A snapshot every 23 events per stream makes each restart read a
        # snapshot and replay the events after it.
        ("normal", 23),
    ],
)
def test_kill_9_loses_no_acknowledged_write_and_applies_none_twice(
    tmp_path: Path, durability: str, snapshot_every: int
) -> None:
    rng = random.Random(f"kill-9-{durability}")
    server = Server(tmp_path / "data", durability, snapshot_every, tmp_path)
    lanes = [{LANES[k]: Lane(LANES[k], k), COMMON: Lane(COMMON, k)} for k in range(CLIENTS)]
    replicas = {stream: Replica() for stream in LANES}
    tally = Tally()
    try:
        server.start()
        create_streams(server.base)
        for round_, kind in enumerate(ROUNDS, 1):
            outs, elapsed = traffic_round(server, lanes, rng, stall=kind == "stalled")
            server.start()  # the same data directory, after the kill
            unknown, applied = settle_after_restart(server, lanes, replicas, tally, outs)
            calls = sum(len(o.acked) for o in outs)
            items = sum(c.size() for o in outs for c in o.acked)
            print(
                f"\n[{durability}] round {round_} ({kind} kill): {calls} calls ({items} items) "
                f"acknowledged in {elapsed:.2f} s: {calls / elapsed:.0f} calls/s, "
                f"{items / elapsed:.0f} items/s; {unknown} unknown at the kill, {applied} of "
                "them found applied"
            )
        label_everything(server, lanes, replicas, tally)
        before = full_ledgers(server.base)
        server.stop()
        server.start()
        assert full_ledgers(server.base) == before
        server.stop()
    finally:
        server.cleanup()


def sync_helpers(data_dir: Path) -> list[int]:
    """The processes syncing this data directory's WAL file (``service/walsync.py``)."""
    wal = str(data_dir / FILE_NAME).encode() + b"-wal"
    found = []
    for proc in Path("/proc").iterdir():
        try:
            if proc.name.isdigit() and wal in (proc / "cmdline").read_bytes().split(b"\0"):
                found.append(int(proc.name))
        except OSError:  # ended meanwhile
            continue
    return found


def test_the_sync_helper_ends_with_its_server_killed_or_stopped(tmp_path: Path) -> None:
    """With durability full the server runs one helper process that syncs the WAL file; it
    reads its requests from the server, so it ends when the server ends, even by kill -9
    (no process left behind to hold the file)."""
    server = Server(tmp_path / "data", "full", 5000, tmp_path)
    try:
        for end in (server.kill, server.stop):
            server.start()
            assert len(sync_helpers(server.data_dir)) == 1
            end()
            deadline = time.monotonic() + 10
            while sync_helpers(server.data_dir) and time.monotonic() < deadline:
                time.sleep(0.05)
            assert sync_helpers(server.data_dir) == []
    finally:
        server.cleanup()
