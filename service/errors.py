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
import re
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


def _text(value: str) -> str:
    """``value`` as Unicode text that encodes as UTF-8 (lone surrogates as backslash escapes)."""
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        return value.encode("utf-8", "backslashreplace").decode("utf-8")
    return value


def plain_value(value: Any) -> Any:
    """A received value as JSON-safe data for the error shape (non-finite numbers as text)."""
    if isinstance(value, str):
        value = _text(value)
        return value if len(value) <= 200 else value[:197] + "..."
    if value is None or isinstance(value, bool | int):
        return value
    if isinstance(value, float):
        return (
            value
            if math.isfinite(value)
            else repr(value).replace("inf", "Infinity").replace("nan", "NaN")
        )
    if isinstance(value, list | dict):
        try:
            # ensure_ascii=False: a lone surrogate anywhere fails here and falls back to repr
            text = json.dumps(value, allow_nan=False, ensure_ascii=False)
            text.encode("utf-8")
        except (TypeError, ValueError):
            text = ""
        if text and len(text) <= 200:
            return value
    text = _text(repr(value))
    return text if len(text) <= 200 else text[:197] + "..."


def error_body(
    status: int, code: str, message: str, field: str = "", rule: str = "", value: Any = None
) -> dict[str, Any]:
    """The one error shape (every string in it encodes as UTF-8, whatever the client sent)."""
    return {
        "error": {
            "status": status,
            "code": code,
            "field": _text(field),
            "rule": _text(rule),
            "value": plain_value(value),
            "message": _text(message),
        }
    }


def error_response(exc: ServiceError) -> JSONResponse:
    headers = {"WWW-Authenticate": "Bearer"} if isinstance(exc, Unauthorized) else None
    return JSONResponse(
        error_body(exc.status, exc.code, exc.message, exc.field, exc.rule, exc.value),
        status_code=exc.status,
        headers=headers,
    )


def from_learner(exc: LearnerError, where: str = "", who: str = "") -> InvalidInput:
    """A learner's refusal of a value (it names field, rule and value) as an InvalidInput; with
    ``where`` its field is below that path, with ``who`` the message starts with that name."""
    field = f"{where}.{exc.field}" if where else exc.field
    message = f"{who}: {exc}" if who else str(exc)
    return InvalidInput(message, field=field, rule=exc.rule, value=exc.value)


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


_PLAIN_KEY = re.compile(r"[A-Za-z_][A-Za-z0-9_-]*")


def key_path(prefix: str, key: str) -> str:
    """A client's key below ``prefix``: '.name' when plain, else '["as JSON"]' (e.g. '[""]')."""
    if _PLAIN_KEY.fullmatch(key):
        return f"{prefix}.{key}" if prefix else key
    return f"{prefix}[{json.dumps(key, ensure_ascii=False)}]"


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
        if not field:  # no body at all
            message = "This request needs a JSON body; none was sent."
            return InvalidInput(message, field="body", rule="required", value=None)
        return InvalidInput(f"The field {field!r} is required.", field=field, rule="required")
    if kind == "extra_forbidden":
        # The last part of the location is the client's key, whatever characters it holds.
        loc = list(first.get("loc", ()))
        field = key_path(field_path(loc[:-1]), str(loc[-1])) if loc else "body"
        message = f"The field {field!r} is not one this request takes."
        return InvalidInput(message, field=field, rule="known field", value=value)
    if ctx.get("rule"):
        rule = str(ctx["rule"])
        message = str(first.get("msg"))
    else:
        rule = _rule_of(kind, ctx, str(first.get("msg", "valid value")))
        message = f"The field {field or 'body'!r} must be {rule}; got {_as_json(value)}."
    return InvalidInput(message, field=field or "body", rule=rule, value=value)


def _as_json(value: Any) -> str:
    """A received value as the client wrote it (JSON), for messages: null, not None."""
    shown = plain_value(value)
    try:
        return json.dumps(shown, ensure_ascii=False)
    except (TypeError, ValueError):
        return repr(shown)


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


def internal_error_body() -> dict[str, Any]:
    """The body of the 500 answered for an unexpected exception (logged by the caller)."""
    return error_body(500, "internal", "The service failed on this request; see its log.")


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
        return error_response(from_learner(exc))

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        status = exc.status_code
        path = request.url.path
        if status == 404:
            body = error_body(404, "not_found", f"No route {path!r}.", "path", "known route", path)
        elif status == 405:
            body = error_body(
                405,
                "method_not_allowed",
                f"The route {path!r} does not take {request.method}.",
                "method",
                "a method the route takes",
                request.method,
            )
        else:  # e.g. FastAPI's 400 for a body it could not read
            body = error_body(status, "http_error", str(exc.detail), "body", "readable request")
        return JSONResponse(body, status_code=status, headers=getattr(exc, "headers", None))

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> JSONResponse:
        log.exception("unexpected error on %s %s", request.method, request.url.path)
        return JSONResponse(
            internal_error_body(),
            status_code=500,
        )
