"""Alerts: recorded with evidence, counted, sent to an allow-listed webhook; epochs on restart."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, HTTPServer
from typing import Any

import pytest

from service.alerts import AlertSender, allowed
from service.settings import Settings
from tests.service.conftest import MakeApp
from tests.service.harness import Running, running


class Hook:
    """A webhook receiver on 127.0.0.1 that can fail its first answers."""

    def __init__(self, fail_first: int = 0) -> None:
        self.received: list[dict[str, Any]] = []
        self.attempts = 0
        self.fail_first = fail_first
        hook = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 (the name http.server calls)
                body = self.rfile.read(int(self.headers["Content-Length"]))
                hook.attempts += 1
                if hook.attempts <= hook.fail_first:
                    self.send_response(500)
                else:
                    hook.received.append({"path": self.path, "alert": json.loads(body)})
                    self.send_response(204)
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        self.server = HTTPServer(("127.0.0.1", 0), Handler)
        self.port = self.server.server_address[1]
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    def wait(self, count: int, timeout: float = 10.0) -> list[dict[str, Any]]:
        deadline = time.monotonic() + timeout
        while len(self.received) < count and time.monotonic() < deadline:
            time.sleep(0.02)
        return self.received

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture
def hook() -> Iterator[Hook]:
    receiver = Hook(fail_first=1)
    yield receiver
    receiver.close()


def hooked_app(make_app: MakeApp, hook: Hook) -> Any:
    return make_app(
        webhook_allow=[f"http://127.0.0.1:{hook.port}/hooks/"],
        webhook_retries=2,
        webhook_backoff_seconds=0.01,
        webhook_timeout_seconds=2,
    )


# DESIGN.md (Accounting): a contradiction raises an alert; THEORY.md (Conjunctions): a false
# positive proves the labels are not a monotone conjunction.
def test_a_contradiction_is_recorded_counted_and_sent(make_app: MakeApp, hook: Hook) -> None:
    with running(hooked_app(make_app, hook)) as service:
        body = {
            "stream": "dock",
            "features": ["a", "b"],
            "learners": [{"name": "elim", "kind": "elimination"}],
            "webhook": f"http://127.0.0.1:{hook.port}/hooks/dock",
        }
        assert service.post("/v1/streams", json=body).status_code == 201
        # Before any update, monotone elimination requires both flags, so it answers 1 on {a, b}.
        # A label 0 makes that a false positive: proof that the labels are not a conjunction.
        answer = service.post("/v1/streams/dock/predict", json={"id": "fp", "features": ["a", "b"]})
        assert answer.json()["label"] == 1
        service.post("/v1/streams/dock/feedback", json={"id": "fp", "label": 0})
        ledger = service.get("/v1/streams/dock/ledger").json()
        row = ledger["learners"][0]
        assert row["state"] == "contradicted"
        assert [a["state"] for a in row["alerts"]] == ["contradicted"]
        assert row["alerts"][0]["evidence"] == ["fp"]
        assert ledger["alerts"] == row["alerts"]
        metrics = service.get("/metrics").text
        # Prometheus exposition format (text-based format documentation): `_total` counters.
        assert (
            'mistake_ledger_alerts_total{learner="elim",state="contradicted",stream="dock"} 1.0'
            in metrics
        )
        received = hook.wait(1)
        assert len(received) == 1
        assert received[0]["path"] == "/hooks/dock"
        alert = received[0]["alert"]
        assert (alert["stream"], alert["learner"], alert["state"]) == (
            "dock",
            "elim",
            "contradicted",
        )
        assert alert["evidence"] == ["fp"]
        assert hook.attempts == 2  # the first answer was a 500: retried (common practice)
        # Staying contradicted raises no second alert.
        service.post("/v1/streams/dock/examples", json={"features": ["a", "b"], "label": 0})
        assert len(service.get("/v1/streams/dock/ledger").json()["alerts"]) == 1


# DESIGN.md (Security): webhook targets are an explicit allow list; 422 RFC 9110 §15.5.21.
def test_a_webhook_outside_the_allow_list_is_refused(make_app: MakeApp, hook: Hook) -> None:
    with running(hooked_app(make_app, hook)) as service:
        for url in (
            f"http://127.0.0.1:{hook.port}/other",
            f"http://127.0.0.1:{hook.port + 1}/hooks/x",
            f"https://127.0.0.1:{hook.port}/hooks/x",
            "http://10.0.0.1/hooks/x",
            f"http://user:pw@127.0.0.1:{hook.port}/hooks/x",
            "file:///etc/passwd",
        ):
            body = {"stream": "dock", "features": 2, "webhook": url,
                    "learners": [{"name": "e", "kind": "elimination"}]}  # fmt: skip
            response = service.post("/v1/streams", json=body)
            assert response.status_code == 422, url
            assert response.json()["error"]["field"] == "webhook"
        assert service.get("/v1/streams").json()["streams"] == []


# Prefix match on a path boundary ("/hooks/" allows "/hooks/a", "/exact" not "/exactly"):
# common practice.
def test_allow_list_matching() -> None:
    allow = ["http://127.0.0.1:9000/hooks/", "http://localhost:9001/exact"]
    assert allowed("http://127.0.0.1:9000/hooks/a", allow)
    assert not allowed("http://127.0.0.1:9000/hooksmith", allow)
    assert allowed("http://localhost:9001/exact", allow)
    assert allowed("http://localhost:9001/exact/sub", allow)
    assert not allowed("http://localhost:9001/exactly", allow)
    assert not allowed("http://127.0.0.1:9000/hooks/a", [])


def test_delivery_gives_up_after_its_retries() -> None:
    calls: list[str] = []
    pauses: list[float] = []

    def post(url: str, payload: dict[str, Any], timeout: float) -> int:
        calls.append(url)
        return 503

    settings = Settings.from_env(
        {}, webhook_allow=["http://127.0.0.1:1/"], webhook_retries=3, webhook_backoff_seconds=0.5
    )
    sender = AlertSender(settings, post=post, sleep=pauses.append)
    assert not sender._deliver("http://127.0.0.1:1/x", {"state": "exceeded"})
    assert len(calls) == 4
    # Exponential backoff between the attempts (common practice): 0.5 * 2^i for i = 0, 1, 2.
    assert pauses == [0.5, 1.0, 2.0]
    assert not sender._deliver("http://127.0.0.1:2/x", {"state": "exceeded"})
    assert len(calls) == 4  # a URL that left the allow list is never called


# Perceptron with a declared margin gamma = 1 over one flag plus the bias feature (value 1):
# every item has norm R = sqrt(2), so the ceiling (R / gamma)^2 = 2 updates (Novikoff 1962).
# The same item labelled 1, 0, 1, ... makes every label an update: the third one exceeds it.
EXCEEDING = [{"id": f"x{i}", "features": ["a"], "label": (i + 1) % 2} for i in range(5)]


def margin_stream(service: Running, policy: str) -> None:
    body = {
        "stream": "belt",
        "features": ["a"],
        "learners": [{"name": "perc", "kind": "perceptron", "margin": 1.0},
                     {"name": "elim", "kind": "elimination"}],
        "on_exceed": policy,
    }  # fmt: skip
    assert service.post("/v1/streams", json=body).status_code == 201


# DESIGN.md (Accounting): exceeded when updates > U; policy keep. Ceiling 2 worked above.
def test_exceeding_the_ceiling_alerts_and_keeps_learning(service: Running) -> None:
    margin_stream(service, "keep")
    for item in EXCEEDING:
        assert service.post("/v1/streams/belt/examples", json=item).status_code == 200
    row = service.get("/v1/streams/belt/ledger").json()["learners"][0]
    assert row["ceiling"]["value"] == pytest.approx(2.0)
    assert row["updates"] == 5 and row["state"] == "exceeded" and row["epoch"] == 0
    (alert,) = row["alerts"]
    assert (alert["state"], alert["count"], alert["policy"]) == ("exceeded", 3, "keep")
    assert alert["evidence"] == ["x0", "x1", "x2"]


def test_restart_policy_starts_a_new_epoch_and_keeps_the_old_ledger(service: Running) -> None:
    margin_stream(service, "restart")
    for item in EXCEEDING:
        service.post("/v1/streams/belt/examples", json=item)
    row = service.get("/v1/streams/belt/ledger").json()["learners"][0]
    # Epoch 0 ended at its third update (exceeded); epoch 1 learned x3 and x4 afresh.
    # DESIGN.md (Accounting): restart as a new epoch; near = 80% of U by default, 2 >= 0.8 * 2.
    assert row["epoch"] == 1
    assert row["updates"] == 2 and row["examples"] == 2 and row["state"] == "near"
    (old,) = row["epochs"]
    assert (old["epoch"], old["updates"], old["state"]) == (0, 3, "exceeded")
    assert [a["epoch"] for a in row["alerts"]] == [0]
    compare = service.get("/v1/streams/belt/compare").json()
    assert {r["name"]: r["updates"] for r in compare["learners"]}["perc"] == 5


def test_served_mistakes_of_an_old_epoch_are_not_counted_in_the_new(service: Running) -> None:
    margin_stream(service, "restart")
    url = "/v1/streams/belt"
    # DESIGN.md (Accounting): the old epoch's ledger is kept apart; the comparison spans all.
    # Two predictions made in epoch 0, both answered 0 by perc (w = 0, score 0).
    service.post(
        f"{url}/predict",
        json={"items": [{"id": "old1", "features": ["a"]}, {"id": "old2", "features": ["a"]}]},
    )
    for item in EXCEEDING[:3]:  # drive perc over its ceiling: epoch 1 starts
        service.post(f"{url}/examples", json=item)
    assert service.get(f"{url}/ledger").json()["learners"][0]["epoch"] == 1
    service.post(f"{url}/feedback", json={"id": "old1", "label": 1})
    row = service.get(f"{url}/ledger").json()["learners"][0]
    assert row["served_mistakes"] == 0  # its vote was epoch 0's
    compare = {r["name"]: r for r in service.get(f"{url}/compare").json()["learners"]}
    assert compare["perc"]["served_mistakes"] == 1  # still compared fairly over all epochs
