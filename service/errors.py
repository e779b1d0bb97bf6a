"""The service's domain errors, the one JSON error shape, and the handlers that map them to HTTP.

Every error a client can see has this shape::

    {"error": {"status": 422, "code": "invalid_value", "field": "items[3].features.x",
               "rule": "finite number", "value": "NaN", "message": "..."}}

The tree (HTTP status in brackets)::

    ServiceError
     +-- InvalidInput [422]       a field breaks a rule (also learners.LearnerError, pydantic)
     +-- TooLarge [413]           the body is over the byte limit
     +-- Unauthorized [401]       no token, or not a token this service knows
     +-- Forbidden [403]          a known token used outside its scope
     +-- NotFound [404]           unknown stream, learner or prediction id
     +-- Gone [410]               a prediction id whose label came too late (expired)
     +-- Conflict [409]           the stream exists, a label contradicts an earlier one, an id is
     |                            reused with other features, or a limit on streams is reached
     +-- Unavailable [503]        the store failed or has not finished replaying
"""

from __future__ import annotations

import json
import logging
import math
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from learners import LearnerError

log = logging.getLogger("mistake_ledger")


class ServiceError(Exception):
    """Base of the service's domain errors; carries the fields of the JSON error shape."""

    status = 500
    code = "internal"

    def __init__(self, message: str, *, field: str = "", rule: str = "", value: Any = None) -> None:
        super().__init__(message)
        self.message = message
        self.field = field
        self.rule = rule
        self.value = value


class InvalidInput(ServiceError):
    status = 422
    code = "invalid_value"


class TooLarge(ServiceError):
    status = 413
    code = "too_large"


class Unauthorized(ServiceError):
    status = 401
    code = "unauthorized"


class Forbidden(ServiceError):
    status = 403
    code = "forbidden"


class NotFound(ServiceError):
    status = 404
    code = "not_found"


class Gone(ServiceError):
    status = 410
    code = "expired"


class Conflict(ServiceError):
    status = 409
    code = "conflict"


class Unavailable(ServiceError):
    status = 503
    code = "unavailable"


def plain_value(value: Any) -> Any:
    """A received value as JSON-safe data for the error shape (non-finite numbers as text)."""
    if value is None or isinstance(value, bool | int | str):
        return value if not isinstance(value, str) or len(value) <= 200 else value[:197] + "..."
    if isinstance(value, float):
        return (
            value
            if math.isfinite(value)
            else repr(value).replace("inf", "Infinity").replace("nan", "NaN")
        )
    if isinstance(value, list | dict):
        try:
            text = json.dumps(value, allow_nan=False)
        except (TypeError, ValueError):
            text = ""
        if text and len(text) <= 200:
            return value
    text = repr(value)
    return text if len(text) <= 200 else text[:197] + "..."


def error_body(
    status: int, code: str, message: str, field: str = "", rule: str = "", value: Any = None
) -> dict[str, Any]:
    """The one error shape."""
    return {
        "error": {
            "status": status,
            "code": code,
            "field": field,
            "rule": rule,
            "value": plain_value(value),
            "message": message,
        }
    }


def error_response(exc: ServiceError) -> JSONResponse:
    headers = {"WWW-Authenticate": "Bearer"} if isinstance(exc, Unauthorized) else None
    return JSONResponse(
        error_body(exc.status, exc.code, exc.message, exc.field, exc.rule, exc.value),
        status_code=exc.status,
        headers=headers,
    )


def field_path(loc: tuple[Any, ...] | list[Any]) -> str:
    """('body', 'items', 3, 'features', 'x') -> 'items[3].features.x'."""
    out = ""
    for part in loc:
        if part == "body" and not out:
            continue
        if isinstance(part, int):
            out += f"[{part}]"
        elif isinstance(part, str) and ("[" in part or part.startswith("function-")):
            continue  # a union member's or a validator's name, not a field
        else:
            out += ("." if out else "") + str(part)
    return out


def from_validation(exc: RequestValidationError) -> ServiceError:
    """The first problem of a request validation as an InvalidInput."""
    errors = list(exc.errors())
    if not errors:
        return InvalidInput("The request is not valid.", field="body", rule="valid request")
    first = errors[0]
    ctx = first.get("ctx") or {}
    field = field_path(first.get("loc", ())) + str(ctx.get("subfield", ""))
    kind = first.get("type", "")
    value = ctx["value"] if "value" in ctx else first.get("input")
    if kind == "json_invalid":
        rule = "valid JSON"
        message = f"The body is not valid JSON: {ctx.get('error', 'decode error')}."
        return InvalidInput(message, field="body", rule=rule, value=None)
    if kind == "missing":
        rule = "required"
        message = f"The field {field!r} is required."
        return InvalidInput(message, field=field, rule=rule, value=None)
    if kind == "extra_forbidden":
        message = f"The field {field!r} is not one this request takes."
        return InvalidInput(message, field=field, rule="known field", value=value)
    if ctx.get("rule"):
        rule = str(ctx["rule"])
        message = str(first.get("msg"))
    else:
        rule = _rule_of(kind, ctx, str(first.get("msg", "valid value")))
        shown = plain_value(value)
        message = f"The field {field or 'body'!r} must be {rule}; got {shown!r}."
    return InvalidInput(message, field=field or "body", rule=rule, value=value)


_BOUNDS = {"greater_than": ">", "greater_than_equal": ">=", "less_than": "<",
           "less_than_equal": "<="}  # fmt: skip
_TYPES = {
    "list_type": "a list",
    "dict_type": "a JSON object",
    "model_type": "a JSON object",
    "model_attributes_type": "a JSON object",
    "string_type": "a string",
    "float_type": "a number",
    "float_parsing": "a number",
    "int_type": "an integer",
    "bool_type": "true or false",
    "finite_number": "a finite number",
}


def _rule_of(kind: str, ctx: dict[str, Any], msg: str) -> str:
    """A short rule from a pydantic error type, e.g. 'a number > 0'."""
    if kind in _BOUNDS:
        bound = next(iter(v for k, v in ctx.items() if k in ("gt", "ge", "lt", "le")), "")
        return f"a number {_BOUNDS[kind]} {bound}"
    if kind in _TYPES:
        return _TYPES[kind]
    if kind == "literal_error":
        return f"one of {ctx.get('expected', '')}"
    if kind in ("too_short", "too_long"):
        return msg[0].lower() + msg[1:] if msg else kind
    return msg


def install(app: FastAPI) -> None:
    """Register the handlers that turn every error into the one shape."""

    @app.exception_handler(ServiceError)
    async def _service(request: Request, exc: ServiceError) -> JSONResponse:
        return error_response(exc)

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> JSONResponse:
        return error_response(from_validation(exc))

    @app.exception_handler(LearnerError)
    async def _learner(request: Request, exc: LearnerError) -> JSONResponse:
        return error_response(
            InvalidInput(str(exc), field=exc.field, rule=exc.rule, value=exc.value)
        )

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        code = {404: "not_found", 405: "method_not_allowed"}.get(exc.status_code, "http_error")
        message = str(exc.detail)
        if exc.status_code == 404:
            message = f"No route {request.url.path!r}."
        return JSONResponse(
            error_body(exc.status_code, code, message, "path", "known route", request.url.path),
            status_code=exc.status_code,
            headers=getattr(exc, "headers", None),
        )

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> JSONResponse:
        log.exception("unexpected error on %s %s", request.method, request.url.path)
        return JSONResponse(
            error_body(500, "internal", "The service failed on this request; see its log."),
            status_code=500,
        )
