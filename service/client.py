"""A small Python client of the mistake-ledger HTTP API, for pipelines and the replay tool.

::

    from service.client import LedgerClient

    with LedgerClient("http://127.0.0.1:8000", token=None, timeout=10.0, retries=3) as client:
        client.create_stream({"stream": "lockers-hold", "features": [...], "learners": [...]})
        answer = client.predict("lockers-hold", ["weight_mismatch"], id="drop-1")
        answers = client.predict_many("lockers-hold", [{"id": "drop-2", "features": {...}}])
        client.feedback("lockers-hold", "drop-1", 1)
        client.feedback_many("lockers-hold", [{"id": "drop-2", "label": 0}])
        client.ledger("lockers-hold"), client.compare("lockers-hold")
        client.delete_stream("lockers-hold")

Retries. A request is tried again, after a growing pause (``backoff * 2**attempt``, at most
``max_backoff``, or the server's ``Retry-After`` when it sends one), when the connection fails,
when it times out, or when the service answers 5xx or 429; never on any other 4xx, which is a
verdict on the request itself. A request that the service may already have carried out is only
repeated when repeating it is harmless: reads, deletes, feedback (the service acknowledges a
repeated label as a duplicate), and predictions and labelled examples whose items all carry an id
(a repeated id returns the stored answer, or counts as a duplicate). Other requests (creating a
stream, items without ids) are repeated only when the service cannot have acted: the connection
was never made, or the answer was 429 or 503.

Errors (all carry a message a person can read unchanged)::

    ClientError
     +-- ServiceError          the service answered 4xx or 5xx: status, code, field, rule, value
     |    +-- RequestRejected  4xx: the request is wrong; sending it again will not help
     |    +-- ServiceFailed    5xx (or 429) on the last attempt
     +-- ServiceUnreachable    no answer on the last attempt (connection refused, timeout)

Batches longer than ``max_batch`` items are sent as several requests, in order; the answers are
returned as one list in the order of the items.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any
from urllib.parse import quote

import httpx

Features = Mapping[str, float] | Sequence[str]

RETRY_STATUSES = frozenset({429, 500, 502, 503, 504})
# Answers that say the service did not carry the request out, so any request may be sent again.
NOT_DONE_STATUSES = frozenset({429, 503})


class ClientError(Exception):
    """Base of the errors this client raises."""


class ServiceError(ClientError):
    """The service answered with an error; the fields come from its JSON error body."""

    def __init__(
        self,
        status: int,
        message: str,
        *,
        code: str | None = None,
        field: str | None = None,
        rule: str | None = None,
        value: Any = None,
        body: Any = None,
        method: str = "",
        url: str = "",
    ) -> None:
        super().__init__(message)
        self.status = status
        self.message = message
        self.code = code
        self.field = field
        self.rule = rule
        self.value = value
        self.body = body
        self.method = method
        self.url = url

    def __str__(self) -> str:
        where = f"{self.method} {self.url}: " if self.method else ""
        return f"{where}{self.status} {self.message}"

    @classmethod
    def from_response(cls, response: httpx.Response) -> ServiceError:
        """Build the error (a :class:`RequestRejected` or :class:`ServiceFailed`) from an answer."""
        body: Any
        try:
            body = response.json()
        except ValueError:
            body = response.text
        error = body.get("error") if isinstance(body, dict) else None
        if isinstance(error, dict):
            message = str(error.get("message") or error.get("code") or response.reason_phrase)
            fields = {
                "code": error.get("code"),
                "field": error.get("field"),
                "rule": error.get("rule"),
                "value": error.get("value"),
            }
        else:
            text = body if isinstance(body, str) else json.dumps(body)
            message = f"{response.reason_phrase}: {text[:200]}" if text else response.reason_phrase
            fields = {"code": None, "field": None, "rule": None, "value": None}
        kind = RequestRejected if 400 <= response.status_code < 500 else ServiceFailed
        if response.status_code == 429:
            kind = ServiceFailed
        return kind(
            response.status_code,
            message,
            body=body,
            method=response.request.method,
            url=str(response.request.url),
            **fields,
        )


class RequestRejected(ServiceError):
    """A 4xx answer (other than 429): the request itself is wrong and is never retried."""


class ServiceFailed(ServiceError):
    """A 5xx or 429 answer that persisted through every retry."""


class ServiceUnreachable(ClientError):
    """No answer: the connection failed or timed out on every attempt."""


class LedgerClient:
    """A client of one mistake-ledger service.

    ``token`` is sent as a bearer token (an admin token, or a stream-scoped one for predict and
    feedback). ``timeout`` is in seconds per attempt; ``retries`` is how many times a failed
    request is tried again (0: never). ``transport`` replaces the network, for tests.
    """

    def __init__(
        self,
        base_url: str,
        token: str | None = None,
        *,
        timeout: float = 10.0,
        retries: int = 3,
        backoff: float = 0.2,
        max_backoff: float = 5.0,
        max_batch: int = 500,
        transport: httpx.BaseTransport | None = None,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        if retries < 0:
            raise ValueError(f"retries must be a non-negative integer; got {retries!r}.")
        if max_batch < 1:
            raise ValueError(f"max_batch must be a positive integer; got {max_batch!r}.")
        headers = {"Accept": "application/json"}
        if token:
            headers["Authorization"] = f"Bearer {token}"
        self.base_url = base_url.rstrip("/")
        self.retries = retries
        self.backoff = backoff
        self.max_backoff = max_backoff
        self.max_batch = max_batch
        self._sleep = sleep
        self._http = httpx.Client(
            base_url=self.base_url, headers=headers, timeout=timeout, transport=transport
        )

    # -- lifecycle ------------------------------------------------------------------------------

    def close(self) -> None:
        """Close the connection pool."""
        self._http.close()

    def __enter__(self) -> LedgerClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- streams --------------------------------------------------------------------------------

    def create_stream(self, spec: Mapping[str, Any]) -> dict[str, Any]:
        """Create a stream from its description (name, features, learners, policy); 201 answer.

        Sends the ``Mistake-Ledger-Stream`` header, so a sharding proxy routes it by stream id.
        """
        headers = {"Mistake-Ledger-Stream": str(spec.get("stream", ""))}
        return self._request(
            "POST", "/v1/streams", json=dict(spec), idempotent=False, headers=headers
        )

    def streams(self) -> list[dict[str, Any]]:
        """Every stream's description."""
        return list(self._request("GET", "/v1/streams")["streams"])

    def stream(self, stream: str) -> dict[str, Any]:
        """One stream's description."""
        return self._request("GET", _path(stream))

    def delete_stream(self, stream: str) -> dict[str, Any]:
        """Delete a stream and its ledger."""
        return self._request("DELETE", _path(stream))

    def export_stream(self, stream: str) -> dict[str, Any]:
        """The stream's whole state as one document (admin token), to import on another shard."""
        return self._request("GET", _path(stream, "export"))

    def import_stream(self, document: Mapping[str, Any]) -> dict[str, Any]:
        """Create a stream from an exported document (admin token); the stream's description.

        Sends the ``Mistake-Ledger-Stream`` header, so a sharding proxy routes it to the
        stream's shard. Like a create, it is sent again only when the service cannot have acted.
        """
        headers = {"Mistake-Ledger-Stream": str(document.get("stream", ""))}
        return self._request(
            "POST", "/v1/streams/import", json=dict(document), idempotent=False, headers=headers
        )

    def has_stream(self, stream: str) -> bool:
        """Whether the stream exists."""
        try:
            self.stream(stream)
        except RequestRejected as error:
            if error.status == 404:
                return False
            raise
        return True

    # -- predictions and labels -----------------------------------------------------------------

    def predict(self, stream: str, features: Features, id: str | None = None) -> dict[str, Any]:
        """Predict one item: {"id", "label", "served_by", "votes", "duplicate"}."""
        body: dict[str, Any] = {"features": _plain(features)}
        if id is not None:
            body["id"] = id
        return self._request("POST", _path(stream, "predict"), json=body, idempotent=id is not None)

    def predict_many(self, stream: str, items: Iterable[Mapping[str, Any]]) -> list[dict[str, Any]]:
        """Predict a batch of {"id"?, "features"} items; one answer per item, in order."""
        out: list[dict[str, Any]] = []
        for chunk in _chunks([_item(i, ("id", "features")) for i in items], self.max_batch):
            idempotent = all("id" in item for item in chunk)
            answer = self._request(
                "POST", _path(stream, "predict"), json={"items": chunk}, idempotent=idempotent
            )
            out.extend(answer["items"])
        return out

    def feedback(self, stream: str, id: str, label: int | bool) -> dict[str, Any]:
        """Send the true label of one prediction: {"id", "status", "learners"}."""
        return self._request("POST", _path(stream, "feedback"), json={"id": id, "label": label})

    def feedback_many(
        self, stream: str, items: Iterable[Mapping[str, Any]]
    ) -> list[dict[str, Any]]:
        """Send a batch of {"id", "label"}; one outcome per item (applied, duplicate, ...)."""
        out: list[dict[str, Any]] = []
        for chunk in _chunks([_item(i, ("id", "label")) for i in items], self.max_batch):
            answer = self._request("POST", _path(stream, "feedback"), json={"items": chunk})
            out.extend(answer["items"])
        return out

    def examples(self, stream: str, items: Iterable[Mapping[str, Any]]) -> list[dict[str, Any]]:
        """Teach labelled {"id"?, "features", "label"} items that were never predicted."""
        out: list[dict[str, Any]] = []
        wanted = [_item(i, ("id", "features", "label")) for i in items]
        for chunk in _chunks(wanted, self.max_batch):
            idempotent = all("id" in item for item in chunk)
            answer = self._request(
                "POST", _path(stream, "examples"), json={"items": chunk}, idempotent=idempotent
            )
            out.extend(answer.get("items", []))
        return out

    # -- reading --------------------------------------------------------------------------------

    def ledger(self, stream: str) -> dict[str, Any]:
        """The stream's ledger: per learner counts, ceilings, states, alerts and history."""
        return self._request("GET", _path(stream, "ledger"))

    def compare(self, stream: str) -> dict[str, Any]:
        """Every learner against the serving one (disagreements and an exact McNemar p-value)."""
        return self._request("GET", _path(stream, "compare"))

    def healthy(self) -> bool:
        """True when the service answers its liveness check (one attempt, no retries)."""
        return self._probe("/healthz")

    def ready(self) -> bool:
        """True when the service is ready: store open, replay done (one attempt, no retries)."""
        return self._probe("/readyz")

    def _probe(self, path: str) -> bool:
        try:
            return self._http.get(path).status_code == 200
        except httpx.HTTPError:
            return False

    # -- the one place that talks to the network ----------------------------------------------

    def _request(
        self,
        method: str,
        path: str,
        *,
        json: Any = None,
        idempotent: bool = True,
        headers: Mapping[str, str] | None = None,
    ) -> dict[str, Any]:
        """Send one request with the retry rules in the module docstring; return its JSON."""
        attempt = 0
        while True:
            try:
                response = self._http.request(method, path, json=json, headers=headers)
            except (httpx.ConnectError, httpx.ConnectTimeout) as error:
                # The request never reached the service: safe to send again whatever it is.
                if attempt >= self.retries:
                    raise ServiceUnreachable(
                        _unreachable(method, self.base_url + path, error)
                    ) from error
            except httpx.TransportError as error:
                if attempt >= self.retries or not idempotent:
                    raise ServiceUnreachable(
                        _unreachable(method, self.base_url + path, error)
                    ) from error
            else:
                status = response.status_code
                if status < 400:
                    return _json(response)
                retryable = status in RETRY_STATUSES and (idempotent or status in NOT_DONE_STATUSES)
                if not retryable or attempt >= self.retries:
                    raise ServiceError.from_response(response)
                self._sleep(self._pause(attempt, response.headers.get("Retry-After")))
                attempt += 1
                continue
            self._sleep(self._pause(attempt, None))
            attempt += 1

    def _pause(self, attempt: int, retry_after: str | None) -> float:
        if retry_after is not None:
            try:
                return max(0.0, min(float(retry_after), self.max_backoff))
            except ValueError:
                pass
        return min(self.backoff * (2**attempt), self.max_backoff)


def _path(stream: str, action: str | None = None) -> str:
    base = f"/v1/streams/{quote(stream, safe='')}"
    return base if action is None else f"{base}/{action}"


def _plain(features: Features) -> Any:
    return list(features) if not isinstance(features, Mapping) else dict(features)


def _item(item: Mapping[str, Any], keys: tuple[str, ...]) -> dict[str, Any]:
    out = {key: item[key] for key in keys if key in item}
    if "features" in out:
        out["features"] = _plain(out["features"])
    return out


def _chunks(items: list[dict[str, Any]], size: int) -> Iterable[list[dict[str, Any]]]:
    for start in range(0, len(items), size):
        yield items[start : start + size]


def _json(response: httpx.Response) -> dict[str, Any]:
    if not response.content:
        return {}
    data = response.json()
    return data if isinstance(data, dict) else {"items": data}


def _unreachable(method: str, url: str, error: Exception) -> str:
    return f"{method} {url}: no answer from the service ({type(error).__name__}: {error})."


__all__ = [
    "ClientError",
    "LedgerClient",
    "RequestRejected",
    "ServiceError",
    "ServiceFailed",
    "ServiceUnreachable",
]
