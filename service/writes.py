"""The write routes' work, and the fast path that answers their ordinary requests.

:class:`Writes` does what ``POST /v1/streams/{stream}/predict``, ``/feedback`` and ``/examples``
do once the body is read: check the token's scope, apply the items to the stream
(``service.registry``) and wait until their event is committed. The routes in ``service.app``
call it with the body their request model validated.

:class:`FastWrites` (the ASGI front of the app, ``service.app.LedgerApp``) answers the ordinary
requests of those three routes before the framework sees them: a POST to one of their paths with an
``application/json`` body within the size limit that ``bodies.quick_*`` reads as plainly valid, a
token the guard knows (or none needed) and the store ready. It does the same work with the same
items (:class:`Writes`) and sends the same JSON; a domain or learner error raised by that work gets
the one error shape, as the route's handlers give it. Every other request (another path or method,
another content type, a body the quick readers leave to the model, a missing or unknown token, a
store not ready) goes on to the framework with its body as read, before anything has changed, so
each refusal is the route's own: the same status, field, rule and value, found in the same order of
checks.

Why it exists: per call, routing through the included router, solving the route's dependencies
and building a model per item cost more CPU than the learners themselves, and the framework's
own layers around every request (error and telemetry middleware) a tenth of a single call's
time in the event loop (benchmarks/service.py prints the figures).

An unexpected exception on the fast path gets what the framework gives one (the ``internal``
error of ``service.errors``, 500, logged).
"""

from __future__ import annotations

import asyncio
import json
import logging
import re
import threading
import time
from collections.abc import Awaitable, Callable
from concurrent.futures import Future
from typing import Any

import orjson
from fastapi.responses import Response
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from learners import LearnerError
from service import bodies
from service.errors import (
    ServiceError,
    Unavailable,
    error_response,
    from_learner,
    internal_error_body,
)
from service.registry import Registry
from service.security import Guard, Principal, bearer_token
from service.store import StoreFailed

log = logging.getLogger("mistake_ledger.service")

Write = Callable[[Principal, str, bool, list[Any]], Awaitable[Any]]

# The three routes' paths, as the router matches them ("{stream}" is one path segment).
_PATH = re.compile(r"/v1/streams/([^/]+)/(predict|feedback|examples)")
_JSON = b"application/json"


# The rendering of starlette's JSONResponse: compact, UTF-8, no NaN.
_ENCODE = json.JSONEncoder(ensure_ascii=False, allow_nan=False, separators=(",", ":")).encode


def render(answer: Any) -> bytes:
    """``answer`` as the JSON bytes JSONResponse renders (compact, UTF-8), written by orjson;
    by the json module for what orjson does not write (integers past 64 bits). An answer holds
    no NaN or infinity (orjson would write null)."""
    try:
        return orjson.dumps(answer)
    except TypeError:
        return _ENCODE(answer).encode()


async def committed(future: Future[int]) -> None:
    """Wait until an event is committed; a failed store becomes 503."""
    try:
        await asyncio.wrap_future(future)
    except StoreFailed as exc:
        raise Unavailable(str(exc), field="store", rule="a working store") from exc


class Writes:
    """Predict, feedback and examples on a stream, answered once committed.

    Writes that the event loop runs back to back share one transaction and one sync
    (:meth:`_share_commit`, ``Store.hold``); the store tells the loop when they are durable
    (:meth:`_committed`). ``hold_for``: the longest a commit waits for more writes while they
    keep coming (``clock``: seconds, for that bound).
    """

    def __init__(
        self,
        streams: Registry,
        guard: Guard,
        *,
        hold_for: float = 0.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.streams = streams
        self.guard = guard
        self.hold_for = hold_for
        self._clock = clock
        self._holding = False
        self._started = 0  # writes begun on the loop
        self._seen = 0  # ... as counted when the hold last looked
        self._since = 0.0  # when the hold began
        self._lock = threading.Lock()
        self._finished: list[asyncio.Future[None]] = []  # committed, not yet told on the loop
        self._rung = False

    async def _committed(self, future: Future[int]) -> None:
        """Wait until an event is durable (as ``committed``, with fewer wake-ups). Mostly the
        store resolves the future on the loop's thread (``Store.attach``): the waiter is then
        told at once. From another thread (a write of the sweeper's that synced the file), one
        wake-up of the loop tells all the requests that thread resolved, not one per request."""
        if not future.done():
            loop = asyncio.get_running_loop()
            waiter = loop.create_future()
            here = threading.get_ident()

            def done(_: Future[int]) -> None:
                if threading.get_ident() == here:
                    if not waiter.done():
                        waiter.set_result(None)
                else:
                    self._ring(loop, waiter)

            future.add_done_callback(done)
            await waiter
        exc = future.exception()
        if isinstance(exc, StoreFailed):
            raise Unavailable(str(exc), field="store", rule="a working store") from exc
        if exc is not None:
            raise exc

    def _ring(self, loop: asyncio.AbstractEventLoop, waiter: asyncio.Future[None]) -> None:
        # In another thread, once per request it resolved.
        with self._lock:
            self._finished.append(waiter)
            if self._rung:
                return
            self._rung = True
        if not loop.is_closed():
            loop.call_soon_threadsafe(self._wake)

    def _wake(self) -> None:
        with self._lock:
            finished, self._finished = self._finished, []
            self._rung = False
        for waiter in finished:
            if not waiter.done():
                waiter.set_result(None)

    def _share_commit(self) -> None:
        """Hold the store's next commit until the event loop has run the tasks that are ready
        now: requests that arrived together then share one commit (one fsync). While more
        writes keep starting, turn after turn, the hold goes on, for at most ``hold_for``
        seconds: under load one commit and its sync then serve many requests, which costs the
        loop less per request (benchmarks/service.py: with 16 single predicts in flight, about
        a fifth less CPU per call). Idle, the hold ends as soon as this request's step is done,
        and a turn without a new write ends it too."""
        self._started += 1
        if not self._holding:
            self._holding = True
            self._seen = self._started
            self._since = self._clock()
            self.streams.store.hold()
            asyncio.get_running_loop().call_soon(self._release)

    def _release(self) -> None:
        if self._started != self._seen and self._clock() - self._since < self.hold_for:
            self._seen = self._started  # more came in this turn: look again after the next
            asyncio.get_running_loop().call_soon(self._release)
            return
        self._holding = False
        self.streams.store.release()

    async def predict(
        self, principal: Principal, stream: str, batch: bool, items: list[Any]
    ) -> Any:
        return await self._write(self.streams.predict, principal, stream, batch, items)

    async def feedback(
        self, principal: Principal, stream: str, batch: bool, items: list[Any]
    ) -> Any:
        return await self._write(self.streams.feedback, principal, stream, batch, items)

    async def examples(
        self, principal: Principal, stream: str, batch: bool, items: list[Any]
    ) -> Any:
        return await self._write(self.streams.examples, principal, stream, batch, items)

    async def _write(
        self,
        apply: Callable[..., tuple[list[Any], Future[int]]],
        principal: Principal,
        stream: str,
        batch: bool,
        items: list[Any],
    ) -> Any:
        """Check the scope, apply the items (a Registry method), wait for their commit."""
        self.guard.stream(principal, stream)
        self._share_commit()
        results, future = apply(stream, items, batch=batch)
        await self._committed(future)
        return {"items": results} if batch else results[0]


class FastWrites:
    """ASGI front: the ordinary requests of the three write routes, answered directly; every
    other request goes on to ``app`` (the framework) as received."""

    def __init__(
        self,
        app: ASGIApp,
        *,
        writes: Writes,
        guard: Guard,
        ready: Callable[[], bool],
        limit: int,
    ) -> None:
        self.app = app
        self.guard = guard
        self.ready = ready
        self.limit = limit  # the most bytes of a body answered here (the body limit's)
        self.routes: dict[str, tuple[Callable[[Any], Any], Write]] = {
            "predict": (bodies.quick_predict, writes.predict),
            "feedback": (bodies.quick_feedback, writes.feedback),
            "examples": (bodies.quick_examples, writes.examples),
        }

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        match = None
        if scope["type"] == "http" and scope["method"] == "POST" and not scope.get("root_path"):
            match = _PATH.fullmatch(scope["path"])
        if match is None:
            await self.app(scope, receive, send)
            return
        received: list[Message] = []  # as received, to hand on if not answered here
        size = 0
        while size <= self.limit:
            message = await receive()
            received.append(message)
            if message["type"] != "http.request":
                break
            size += len(message.get("body", b""))
            if not message.get("more_body", False):
                if size <= self.limit:
                    body = b"".join(m.get("body", b"") for m in received)
                    if await self._answered(scope, send, match[1], match[2], body):
                        return
                break

        async def replay() -> Message:
            return received.pop(0) if received else await receive()

        await self.app(scope, replay, send)

    async def _answered(
        self, scope: Scope, send: Send, stream: str, route: str, body: bytes
    ) -> bool:
        """:meth:`_answer`, with an unexpected exception answered as the framework does."""
        try:
            return await self._answer(scope, send, stream, route, body)
        except Exception:
            log.exception("unexpected error on POST %s", scope["path"])
            await _send_json(send, 500, render(internal_error_body()))
            return True

    async def _answer(self, scope: Scope, send: Send, stream: str, route: str, body: bytes) -> bool:
        """Answer the request and return True, or return False having changed nothing."""
        if not body or not self.ready():
            return False
        content_type = authorization = None  # the first of each, as the framework reads them
        for key, value in scope["headers"]:
            if key == b"content-type":
                content_type = value if content_type is None else content_type
            elif key == b"authorization":
                authorization = value if authorization is None else authorization
        if content_type != _JSON:
            return False
        data = bodies.quick_json_loads(body)
        if data is None:  # not JSON text: the route says what is wrong
            return False
        try:
            token = None if authorization is None else bearer_token(authorization.decode("latin-1"))
            principal = self.guard.identify(token)
        except ServiceError:  # no token it knows: the route says
            return False
        read, write = self.routes[route]
        found = read(data)
        if found is None:
            return False
        batch, items = found
        response: Response
        try:
            answer = await write(principal, stream, batch, items)
        except ServiceError as exc:
            response = error_response(exc)
        except LearnerError as exc:
            response = error_response(from_learner(exc))
        else:
            await _send_json(send, 200, render(answer))
            return True
        await response(scope, _no_receive, send)
        return True


async def _send_json(send: Send, status: int, body: bytes) -> None:
    """Send a JSON answer with the headers a JSONResponse sends."""
    headers = [(b"content-length", str(len(body)).encode()), (b"content-type", _JSON)]
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


async def _no_receive() -> Message:  # a response never reads the request
    raise RuntimeError("the request body was read already")
