"""The HTTP application: ``create_app(settings, *, clock=None, registry=None) -> LedgerApp``.

Routes (JSON under ``/v1``; errors in the one shape of ``service.errors``)::

    POST   /v1/streams                      create a stream with its panel of learners
    GET    /v1/streams                      list streams
    GET    /v1/streams/{stream}             describe one
    DELETE /v1/streams/{stream}             delete one and everything stored for it
    POST   /v1/streams/{stream}/predict     one item or a batch: every learner votes
    POST   /v1/streams/{stream}/feedback    one label or a batch for earlier predictions
    POST   /v1/streams/{stream}/examples    labelled items that were never predicted
    GET    /v1/streams/{stream}/ledger      every learner's counts against its ceiling
    GET    /v1/streams/{stream}/compare     each learner against the serving one (McNemar)
    GET    /v1/streams/{stream}/export      the whole stream as one document (service.transfer)
    POST   /v1/streams/import               create a stream from such a document
    GET    /metrics                         Prometheus text format
    GET    /healthz, /readyz                liveness; store open and replay finished

A write answers only after its event is committed (``service.store``). Each app has its own
store (in ``settings.data_dir``), its own metrics registry and clock: nothing is shared between
apps in one process. The store opens and replays in the lifespan's startup, and the shutdown
snapshots every stream and closes it.

The ordinary requests of predict, feedback and examples are answered by
``service.writes.FastWrites`` in front of the framework (``LedgerApp``), with the same work and the
same answers; the routes below serve everything else (every refusal of a body, token or state) and
make the OpenAPI document."""

from __future__ import annotations

import asyncio
import json
import time
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from functools import partial
from typing import Any

from fastapi import APIRouter, Depends, FastAPI, Request, Response
from fastapi.responses import JSONResponse
from fastapi.routing import APIRoute
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    GCCollector,
    PlatformCollector,
    ProcessCollector,
    generate_latest,
)
from starlette.concurrency import run_in_threadpool
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service import bodies, errors, schemas, transfer, transfer_checks
from service.alerts import AlertSender
from service.errors import Unavailable, error_body
from service.metrics import LedgerCollector
from service.registry import Registry
from service.security import Guard, Principal
from service.settings import Settings
from service.store import Store
from service.writes import FastWrites, Writes, committed

VERSION = "0.1.0"


class StrictJSONRequest(Request):
    """A request whose JSON body keeps NaN/Infinity as markers that validation rejects."""

    async def json(self) -> Any:
        if not hasattr(self, "_json"):
            body = await self.body()
            try:
                text = body.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise json.JSONDecodeError("the body is not UTF-8", "", exc.start) from exc
            self._json = bodies.strict_json_loads(text)
        return self._json


class StrictJSONRoute(APIRoute):
    def get_route_handler(self) -> Callable[[Request], Any]:
        handler = super().get_route_handler()

        async def strict(request: Request) -> Response:
            return await handler(StrictJSONRequest(request.scope, request.receive))

        return strict


class BodyLimit:
    """Reads a request body up to ``limit`` bytes (``paths`` may set another limit for a path);
    beyond it, answers 413 at once."""

    def __init__(self, app: ASGIApp, limit: int, paths: dict[str, int] | None = None) -> None:
        self.app = app
        self.limit = limit
        self.paths = paths or {}

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in ("POST", "PUT", "PATCH"):
            await self.app(scope, receive, send)
            return
        limit = self.paths.get(scope["path"], self.limit)
        for key, value in scope.get("headers", []):
            if key == b"content-length" and value.isdigit() and int(value) > limit:
                await self._reject(scope, receive, send, int(value), limit)
                return
        chunks: list[bytes] = []
        total = 0
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            chunk = message.get("body", b"")
            total += len(chunk)
            if total > limit:
                await self._reject(scope, receive, send, total, limit)
                return
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
        body = b"".join(chunks)
        delivered = False

        async def replay() -> Message:
            nonlocal delivered
            if not delivered:
                delivered = True
                return {"type": "http.request", "body": body, "more_body": False}
            return await receive()

        await self.app(scope, replay, send)

    async def _reject(
        self, scope: Scope, receive: Receive, send: Send, size: int, limit: int
    ) -> None:
        body = error_body(
            413,
            "too_large",
            f"A request body may have at most {limit} bytes; this one has at least {size}.",
            "body",
            f"at most {limit} bytes",
            size,
        )
        await JSONResponse(body, status_code=413)(scope, receive, send)


class LedgerApp(FastAPI):
    """The FastAPI app behind :class:`~service.writes.FastWrites`, which answers the write
    routes' ordinary requests before the framework's own layers (when ``fast_writes`` is set)."""

    fast_writes: FastWrites | None = None

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if self.fast_writes is None:
            await super().__call__(scope, receive, send)
        else:
            await self.fast_writes(scope, receive, send)


def create_app(
    settings: Settings | None = None,
    *,
    clock: Callable[[], float] | None = None,
    registry: CollectorRegistry | None = None,
) -> LedgerApp:
    """A new application with its own store, metrics registry and clock."""
    settings = settings if settings is not None else Settings.from_env()
    clock = clock if clock is not None else time.time
    metrics_registry = registry if registry is not None else CollectorRegistry()
    store = Store(
        settings.data_dir,
        durability=settings.durability,
        max_batch=settings.group_commit_max_events,
    )
    sender = AlertSender(settings)
    streams = Registry(settings, store, clock, allowed_webhook=sender.allowed)
    streams.on_alert = lambda url, stream, alert: sender.submit(url, {"stream": stream, **alert})
    guard = Guard(settings)
    metrics_registry.register(LedgerCollector(streams, stream_label=settings.metrics_stream_label))
    # The client library's standard process, platform and garbage-collector metrics.
    ProcessCollector(registry=metrics_registry)
    PlatformCollector(registry=metrics_registry)
    GCCollector(registry=metrics_registry)
    bearer = HTTPBearer(auto_error=False, description="admin, stream or metrics token")

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        await run_in_threadpool(streams.open)
        store.attach(asyncio.get_running_loop())  # syncs of the loop's writes (service.store)
        streams.start_sweeper()
        sender.start()
        try:
            yield
        finally:
            await run_in_threadpool(streams.close)
            await run_in_threadpool(sender.close)

    app = LedgerApp(
        title="mistake-ledger",
        version=VERSION,
        description="Online learners per stream with a live ledger of mistakes against "
        "their ceilings.",
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.registry = streams
    app.state.metrics_registry = metrics_registry
    app.state.sender = sender
    errors.install(app)
    writes = Writes(streams, guard, hold_for=settings.group_commit_max_wait_seconds)
    # Ordinary predict/feedback/examples requests are answered in front of the framework; all
    # else goes on to it and its routes (service/writes.py).
    app.fast_writes = FastWrites(
        partial(FastAPI.__call__, app),
        writes=writes,
        guard=guard,
        ready=lambda: streams.ready,
        limit=settings.max_body_bytes,
    )
    app.add_middleware(
        BodyLimit,
        limit=settings.max_body_bytes,
        paths={transfer.IMPORT_PATH: settings.max_import_bytes},  # a whole stream's state
    )

    BEARER = Depends(bearer)  # noqa: N806

    # Dependencies are coroutines: plain functions would each cost a hop to the thread pool.
    async def who(credentials: HTTPAuthorizationCredentials | None = BEARER) -> Principal:
        return guard.identify(None if credentials is None else credentials.credentials)

    WHO = Depends(who)  # noqa: N806

    async def ready() -> None:
        if not streams.ready:
            raise Unavailable(
                "The service is starting or stopping; its store is not open.",
                field="store",
                rule="open and replayed",
            )

    api = APIRouter(
        prefix="/v1",
        route_class=StrictJSONRoute,
        responses=schemas.ERROR_RESPONSES,
        dependencies=[Depends(ready)],
    )

    @api.post("/streams", status_code=201, response_model=schemas.StreamDescription)
    async def create_stream(
        body: schemas.StreamCreate,
        principal: Principal = WHO,
        shard_stream: transfer.StreamHeader = None,
    ) -> JSONResponse:
        guard.admin(principal, "create streams")
        transfer_checks.check_stream_header(shard_stream, body.stream)  # the proxy routes by it
        description, future = streams.create(body)
        await committed(future)
        return JSONResponse(description, status_code=201)

    @api.get("/streams", response_model=schemas.StreamList)
    async def list_streams(principal: Principal = WHO) -> JSONResponse:
        names = sorted(n for n in list(streams.streams) if principal.may_use(n))
        out = []
        for name in names:
            try:
                out.append(streams.describe(name))
            except errors.NotFound:
                continue  # deleted meanwhile
        return JSONResponse({"streams": out})

    @api.get("/streams/{stream}", response_model=schemas.StreamDescription)
    async def show_stream(stream: str, principal: Principal = WHO) -> JSONResponse:
        guard.stream(principal, stream)
        return JSONResponse(streams.describe(stream))

    @api.delete("/streams/{stream}", response_model=schemas.StreamDeleted)
    async def delete_stream(stream: str, principal: Principal = WHO) -> JSONResponse:
        guard.admin(principal, "delete streams")
        future = streams.delete(stream)
        await committed(future)
        return JSONResponse({"stream": stream, "deleted": True})

    @api.post(
        "/streams/{stream}/predict",
        responses={200: {"model": schemas.Answer | schemas.AnswerBatch}},
    )
    async def predict(
        stream: str, body: schemas.PredictRequest, principal: Principal = WHO
    ) -> JSONResponse:
        if body.items is None:
            items: list[Any] = [(body.id, body.features)]
        else:
            items = [(item.id, item.features) for item in body.items]
        return JSONResponse(await writes.predict(principal, stream, body.items is not None, items))

    @api.post(
        "/streams/{stream}/feedback",
        responses={200: {"model": schemas.FeedbackResult | schemas.FeedbackBatch}},
    )
    async def feedback(
        stream: str, body: schemas.FeedbackRequest, principal: Principal = WHO
    ) -> JSONResponse:
        if body.items is None:
            items: list[Any] = [(body.id, body.label)]
        else:
            items = [(item.id, item.label) for item in body.items]
        return JSONResponse(await writes.feedback(principal, stream, body.items is not None, items))

    @api.post(
        "/streams/{stream}/examples",
        responses={200: {"model": schemas.FeedbackResult | schemas.FeedbackBatch}},
    )
    async def examples(
        stream: str, body: schemas.ExampleRequest, principal: Principal = WHO
    ) -> JSONResponse:
        if body.items is None:
            items: list[Any] = [(body.id, body.features, body.label)]
        else:
            items = [(item.id, item.features, item.label) for item in body.items]
        return JSONResponse(await writes.examples(principal, stream, body.items is not None, items))

    @api.get("/streams/{stream}/ledger", response_model=schemas.Ledger)
    async def ledger(stream: str, principal: Principal = WHO) -> JSONResponse:
        guard.stream(principal, stream)
        return JSONResponse(streams.ledger(stream))

    @api.get("/streams/{stream}/compare", response_model=schemas.Comparison)
    async def compare(stream: str, principal: Principal = WHO) -> JSONResponse:
        guard.stream(principal, stream)
        return JSONResponse(streams.compare(stream))

    app.include_router(api)
    # Moving a stream between shards: export, import (service/transfer.py).
    app.include_router(transfer.router(streams, guard, who, dependencies=[Depends(ready)]))

    @app.get(
        "/metrics",
        response_class=Response,
        responses={
            200: {"content": {"text/plain": {"schema": {"type": "string"}}}},
            401: {"model": schemas.ErrorBody},
            403: {"model": schemas.ErrorBody},
        },
    )
    async def metrics(principal: Principal = WHO) -> Response:
        guard.metrics(principal)
        return Response(generate_latest(metrics_registry), media_type=CONTENT_TYPE_LATEST)

    @app.get("/healthz")
    async def healthz() -> dict[str, str]:
        return {"status": "alive"}

    @app.get(
        "/readyz", response_model=schemas.Readiness, responses={503: {"model": schemas.ErrorBody}}
    )
    async def readyz() -> JSONResponse:
        if not streams.ready or store.failed is not None:
            reason = "the store failed" if store.failed is not None else "not open yet"
            return JSONResponse(
                error_body(
                    503, "unavailable", f"Not ready: {reason}.", "store", "open and replayed", None
                ),
                status_code=503,
            )
        return JSONResponse({"status": "ready", "streams": len(streams.streams)})

    # ---- The page at "/" ---------------------------------------------------------------------
    # "/" and "/static/..." from service/static (service/page.py); the page reads the JSON API.
    from service import page

    app.include_router(page.router)
    # ---- end of the page's place ------------------------------------------------------------

    return app
