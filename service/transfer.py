"""Moving a stream between shards: export its whole state as one JSON document, import it elsewhere.

Routes (``router`` builds them; the app includes it)::

    GET  /v1/streams/{stream}/export   the stream as one document (admin token)
    POST /v1/streams/import            create a stream from such a document (admin token)

The document::

    {"format": "mistake-ledger stream", "version": 1, "stream": "lockers-north",
     "exported": 1700000000.0, "seq": 1234, "state": {...}}

``state`` is the very snapshot the store writes for durability (``Stream.to_state``): the
configuration, the feature space, every learner's state, each seat's ledger (epochs, alerts,
history, G, totals), the predictions waiting for labels and the ids remembered for idempotency,
each with its item's print (state version 2: a 64-bit integer; a state of version 1, with text
prints, is read too: ``service.streams``, "item prints").
An imported copy answers every later request as the source would have. ``exported`` is the
source's clock at the export; ``seq`` is the position of the stream's last write in the source's
log, so two exports from one shard with the same ``seq`` hold the same writes (the check that
nothing reached the old copy while it moved, deploy/README.md). Both are for the record.

Export takes the stream's lock, writes the state out, and answers once every write the state
holds is committed, so it never carries a write the source could still lose. Import checks the
whole document first (``service.transfer_checks``: the first thing wrong is named by its path,
e.g. ``state.pending[3][4]``, with the rule and the value) and changes nothing when it fails;
then it logs one ``import`` event that carries the state, snapshots the stream, and answers once
the event is committed. It is never unpickled: the document is JSON, checked field by field.

Behind the sharding proxy a create or an import names its stream in the body, which the proxy
cannot read; it routes by the ``Mistake-Ledger-Stream`` header instead, so when that header is
present it must equal the body's stream (``transfer_checks.check_stream_header``), or the
stream would be created on a shard where its later requests never arrive.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, Header, Request, Response
from fastapi.responses import JSONResponse
from pydantic import BaseModel, ConfigDict, Field, WithJsonSchema
from starlette.concurrency import run_in_threadpool

from service import schemas
from service.registry import Registry
from service.security import Guard, Principal
from service.transfer_checks import FORMAT, HEADER, VERSION, read_document
from service.writes import committed

log = logging.getLogger("mistake_ledger.transfer")

IMPORT_PATH = "/v1/streams/import"

StreamHeader = Annotated[
    str | None,
    Header(
        alias=HEADER,
        description="The stream id of the body, for the sharding proxy (which routes by it); "
        "when sent it must equal the body's stream.",
    ),
    WithJsonSchema({"type": "string", "pattern": schemas.STREAM_PATTERN}),
]


class StreamExport(BaseModel):
    """A stream as it moves between shards (the response of export, the body of import)."""

    model_config = ConfigDict(extra="forbid")

    format: Literal["mistake-ledger stream"]
    version: Literal[1]
    stream: schemas.StreamId
    exported: float | None = Field(None, description="the source's clock at the export")
    seq: int | None = Field(
        None, ge=0, description="position of the stream's last write in the source's log"
    )
    state: dict[str, Any] = Field(
        description="the stream's snapshot: configuration, feature space, learners, ledger, "
        "waiting predictions and remembered ids"
    )


# -- export ------------------------------------------------------------------------------------


def export_document(registry: Registry, name: str) -> tuple[bytes, Future[int]]:
    """The stream as one document, and the future to wait for before answering with it."""
    text, seq, t, future = registry.export(name)
    head = {"format": FORMAT, "version": VERSION, "stream": name, "exported": t, "seq": seq}
    body = json.dumps(head, separators=(",", ":"), allow_nan=False)
    return (body[:-1] + ',"state":' + text + "}").encode(), future


# -- the routes --------------------------------------------------------------------------------


def router(
    registry: Registry,
    guard: Guard,
    who: Callable[..., Any],
    *,
    dependencies: Sequence[Any] = (),
) -> APIRouter:
    """The export and import routes over ``registry``; ``who`` is the app's token dependency."""
    api = APIRouter(
        prefix="/v1", responses=schemas.ERROR_RESPONSES, dependencies=list(dependencies)
    )
    principal_of = Depends(who)

    @api.get("/streams/{stream}/export", response_model=StreamExport)
    async def export_stream(stream: str, principal: Principal = principal_of) -> Response:
        """The stream's whole state as one document, to import on another shard."""
        guard.admin(principal, "export streams")
        body, future = await run_in_threadpool(export_document, registry, stream)
        await committed(future)
        log.info("exported stream %s (%d bytes)", stream, len(body))
        return Response(body, media_type="application/json")

    @api.post(
        "/streams/import",
        status_code=201,
        response_model=schemas.StreamDescription,
        openapi_extra={
            "requestBody": {
                "required": True,
                "content": {
                    "application/json": {"schema": {"$ref": "#/components/schemas/StreamExport"}}
                },
            }
        },
    )
    async def import_stream(
        request: Request, principal: Principal = principal_of, shard_stream: StreamHeader = None
    ) -> JSONResponse:
        """Create a stream from an exported document (409 if it exists here)."""
        guard.admin(principal, "import streams")
        raw = await request.body()
        stream = await run_in_threadpool(read_document, registry, raw, shard_stream)
        description, future = await run_in_threadpool(registry.adopt, stream)
        await committed(future)
        log.info("imported stream %s (%d bytes)", stream.name, len(raw))
        return JSONResponse(description, status_code=201)

    return api
