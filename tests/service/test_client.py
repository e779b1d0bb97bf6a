"""The client's retry rules, errors and batching, against httpx's in-memory MockTransport.

Retrying only transient failures (connection errors, 5xx, 429) with exponential backoff and never
a 4xx is common practice for HTTP clients; the cases below pin each branch of it.
"""

from __future__ import annotations

import json
from collections.abc import Callable

import httpx
import pytest

from service.client import (
    LedgerClient,
    RequestRejected,
    ServiceFailed,
    ServiceUnreachable,
)

Handler = Callable[[httpx.Request], httpx.Response]


class Recorder:
    """A MockTransport handler that plays scripted outcomes and records every request."""

    def __init__(self, outcomes: list[httpx.Response | Exception]) -> None:
        self.outcomes = outcomes
        self.requests: list[httpx.Request] = []

    def __call__(self, request: httpx.Request) -> httpx.Response:
        self.requests.append(request)
        outcome = self.outcomes[min(len(self.requests), len(self.outcomes)) - 1]
        if isinstance(outcome, Exception):
            raise outcome
        return outcome


def make(handler: Handler, **options: object) -> tuple[LedgerClient, list[float]]:
    pauses: list[float] = []
    client = LedgerClient(
        "http://127.0.0.1:9",
        transport=httpx.MockTransport(handler),
        sleep=pauses.append,
        **options,  # type: ignore[arg-type]
    )
    return client, pauses


def ok(body: object) -> httpx.Response:
    return httpx.Response(200, json=body)


def error(
    status: int, field: str = "label", rule: str = "one of 0, 1", value: object = 7
) -> httpx.Response:
    return httpx.Response(
        status,
        json={
            "error": {
                "status": status,
                "code": "invalid_value" if status < 500 else "internal",
                "field": field,
                "rule": rule,
                "value": value,
                "message": f"The {field} must be {rule}; got {value}.",
            }
        },
    )


LEDGER = {"stream": "s", "learners": []}


def test_5xx_is_retried_with_growing_pauses_then_succeeds() -> None:
    recorder = Recorder([error(503), error(502), ok(LEDGER)])
    client, pauses = make(recorder, retries=3, backoff=0.2)
    assert client.ledger("s") == LEDGER
    assert len(recorder.requests) == 3
    assert pauses == [0.2, 0.4]


def test_connection_errors_are_retried() -> None:
    refused = httpx.ConnectError("connection refused")
    recorder = Recorder([refused, refused, ok({"id": "a", "label": 1})])
    client, pauses = make(recorder, retries=2, backoff=0.1)
    assert client.predict("s", ["f"], id="a")["label"] == 1
    assert len(recorder.requests) == 3
    assert pauses == [0.1, 0.2]


@pytest.mark.parametrize("status", [400, 401, 403, 404, 409, 410, 413, 422])
def test_4xx_is_never_retried_and_carries_the_service_error(status: int) -> None:
    recorder = Recorder([error(status, field="items[3].label", rule="0 or 1", value="yes")])
    client, pauses = make(recorder, retries=5)
    with pytest.raises(RequestRejected) as caught:
        client.feedback("s", "a", 1)
    assert len(recorder.requests) == 1
    assert pauses == []
    raised = caught.value
    assert raised.status == status
    assert (raised.field, raised.rule, raised.value) == ("items[3].label", "0 or 1", "yes")
    assert "items[3].label" in str(raised)


def test_persistent_5xx_gives_up_after_the_retries() -> None:
    recorder = Recorder([error(500, field="store", rule="available", value=None)])
    client, pauses = make(recorder, retries=2, backoff=1.0, max_backoff=1.5)
    with pytest.raises(ServiceFailed) as caught:
        client.ledger("s")
    assert len(recorder.requests) == 3
    assert pauses == [1.0, 1.5]  # capped at max_backoff
    assert caught.value.status == 500 and caught.value.field == "store"


def test_persistent_connection_failure_raises_unreachable() -> None:
    recorder = Recorder([httpx.ConnectError("refused")])
    client, _ = make(recorder, retries=1)
    with pytest.raises(ServiceUnreachable, match="no answer"):
        client.streams()
    assert len(recorder.requests) == 2


def test_429_waits_for_retry_after() -> None:
    busy = httpx.Response(429, headers={"Retry-After": "0.75"}, json={"error": {"code": "busy"}})
    recorder = Recorder([busy, ok({"items": []})])
    client, pauses = make(recorder, retries=2, backoff=0.1)
    assert client.feedback_many("s", [{"id": "a", "label": 0}]) == []
    assert pauses == [0.75]


def test_a_request_that_may_have_acted_is_not_repeated_unless_harmless() -> None:
    # Creating a stream is not idempotent: a 500 may come after it was created, so no retry...
    recorder = Recorder([error(500), ok({"stream": "s"})])
    client, _ = make(recorder, retries=3)
    with pytest.raises(ServiceFailed):
        client.create_stream({"stream": "s", "features": 3, "learners": []})
    assert len(recorder.requests) == 1
    # ...but a 503 says it was not carried out, so it is retried.
    recorder = Recorder([error(503), httpx.Response(201, json={"stream": "s"})])
    client, _ = make(recorder, retries=3)
    assert client.create_stream({"stream": "s", "features": 3, "learners": []}) == {"stream": "s"}
    assert len(recorder.requests) == 2


def test_read_timeouts_repeat_only_idempotent_requests() -> None:
    slow = httpx.ReadTimeout("timed out")
    answer = {"id": "a", "status": "duplicate", "learners": {}}
    recorder = Recorder([slow, ok(answer)])
    client, _ = make(recorder, retries=2)
    assert client.feedback("s", "a", 1) == answer  # feedback is idempotent by id
    assert len(recorder.requests) == 2
    recorder = Recorder([slow, ok({"id": "x", "label": 0})])
    client, _ = make(recorder, retries=2)
    with pytest.raises(ServiceUnreachable):
        client.predict("s", ["f"])  # no id: a second prediction could be counted
    assert len(recorder.requests) == 1
    recorder = Recorder([slow, ok({"items": [{"id": "e", "status": "applied"}]})])
    client, _ = make(recorder, retries=2)
    assert client.examples("s", [{"id": "e", "features": ["f"], "label": 1}])[0]["id"] == "e"
    assert len(recorder.requests) == 2  # examples with ids are acknowledged as duplicates
    recorder = Recorder([slow])
    client, _ = make(recorder, retries=2)
    with pytest.raises(ServiceUnreachable):
        client.examples("s", [{"features": ["f"], "label": 1}])
    assert len(recorder.requests) == 1


def test_batches_are_split_and_answers_kept_in_order() -> None:
    def handler(request: httpx.Request) -> httpx.Response:
        items = json.loads(request.content)["items"]
        return ok({"items": [{"id": i["id"], "label": len(i["features"]) % 2} for i in items]})

    seen: list[int] = []

    def counting(request: httpx.Request) -> httpx.Response:
        seen.append(len(json.loads(request.content)["items"]))
        return handler(request)

    client, _ = make(counting, max_batch=2)
    items = [{"id": f"p{i}", "features": ["f"] * i} for i in range(5)]
    answers = client.predict_many("s", items)
    assert [a["id"] for a in answers] == [f"p{i}" for i in range(5)]
    assert [a["label"] for a in answers] == [0, 1, 0, 1, 0]
    assert seen == [2, 2, 1]


def test_token_and_paths() -> None:
    recorder = Recorder([ok(LEDGER)])
    client, _ = make(recorder, token="a-long-enough-token-1234")
    client.ledger("lockers.north_1")
    request = recorder.requests[0]
    assert request.headers["Authorization"] == "Bearer a-long-enough-token-1234"
    assert request.url.path == "/v1/streams/lockers.north_1/ledger"


def test_error_without_the_json_shape_still_reads() -> None:
    recorder = Recorder([httpx.Response(404, text="Not Found")])
    client, _ = make(recorder, retries=0)
    with pytest.raises(RequestRejected) as caught:
        client.stream("missing")
    assert caught.value.status == 404 and caught.value.field is None
    assert "Not Found" in str(caught.value)


def test_has_stream_answers_false_on_404_only() -> None:
    client, _ = make(Recorder([error(404, field="stream", rule="existing", value="x")]))
    assert client.has_stream("x") is False
    client, _ = make(Recorder([error(403, field="token", rule="scoped", value=None)]))
    with pytest.raises(RequestRejected):
        client.has_stream("x")
