"""Request and response models of the HTTP interface; the OpenAPI document comes from these.

Request bodies are parsed by ``service.bodies.strict_json_loads``, which turns the literals
``NaN``, ``Infinity`` and ``-Infinity`` (that Python's json module accepts) into markers, so
validation rejects them at the exact field with the value named. Validators here raise errors
that carry their rule in the error context; ``service.errors`` reads it into the one shape.
"""

from __future__ import annotations

import math
import re
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    WithJsonSchema,
    model_validator,
)
from pydantic_core import PydanticCustomError

from learners import registry as learner_registry

STREAM_PATTERN = r"^[a-z0-9][a-z0-9_.-]{0,63}$"
NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$"
ID_MAX = 128
FEATURE_NAME_MAX = 256


def is_text(value: str) -> bool:
    """True when ``value`` is Unicode text (no lone surrogates), i.e. encodes as UTF-8."""
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


_NO_VALUE = object()


def rule_error(
    rule: str, message: str, subfield: str = "", value: Any = _NO_VALUE
) -> PydanticCustomError:
    """A validation error whose context carries the rule, a path below the field, and the
    offending value when it is not the field's whole input."""
    context: dict[str, Any] = {"message": message, "rule": rule, "subfield": subfield}
    if value is not _NO_VALUE:
        context["value"] = value
    return PydanticCustomError("invalid_value", "{message}", context)


def shown(value: Any) -> str:
    """A received value for a message: non-finite numbers as JSON writes them, long ones cut."""
    if isinstance(value, float) and not math.isfinite(value):
        return "NaN" if math.isnan(value) else ("Infinity" if value > 0 else "-Infinity")
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _is_finite_number(value: Any) -> bool:
    """A JSON number (not a boolean) that is finite; an integer too large for a float is not."""
    if not _is_number(value):
        return False
    try:
        return math.isfinite(value)
    except OverflowError:  # e.g. an integer literal of 400 digits
        return False


def check_features(value: Any) -> Any:
    """An item: a mapping of non-empty names to finite numbers, or a list of unique flag names."""
    if isinstance(value, dict):
        for name, number in value.items():
            if not name or len(name) > FEATURE_NAME_MAX:
                raise rule_error(
                    f"feature names of 1 to {FEATURE_NAME_MAX} characters",
                    f"A feature name must have 1 to {FEATURE_NAME_MAX} characters; "
                    f"got {shown(name)}.",
                    value=name,
                )
            if not _is_finite_number(number):
                raise rule_error(
                    "finite number",
                    f"Feature {name!r} must have a finite number as its value; "
                    f"got {shown(number)}.",
                    subfield=f".{name}",
                    value=number,
                )
        return value
    if isinstance(value, list):
        seen: set[str] = set()
        for position, name in enumerate(value):
            if not isinstance(name, str) or not name or len(name) > FEATURE_NAME_MAX:
                raise rule_error(
                    f"flag names of 1 to {FEATURE_NAME_MAX} characters",
                    f"A list of features holds the names of the flags that are on; "
                    f"entry {position} is {shown(name)}.",
                    subfield=f"[{position}]",
                    value=name,
                )
            if name in seen:
                raise rule_error(
                    "each flag at most once",
                    f"Flag {name!r} is listed twice in one item.",
                    subfield=f"[{position}]",
                    value=name,
                )
            seen.add(name)
        return value
    raise rule_error(
        "mapping of name to number, or list of flag names",
        "The features of an item must be a mapping from name to number or a list of flag "
        f"names; got {shown(value)}.",
    )


def check_label(value: Any) -> int:
    """A label: 0, 1, true or false, returned as 0 or 1."""
    if isinstance(value, bool):
        return int(value)
    if _is_number(value) and value in (0, 1):
        return int(value)
    raise rule_error(
        "one of 0, 1, true, false", f"A label must be 0, 1, true or false; got {shown(value)}."
    )


# A control character: C0, DEL or C1. Ids are printable: none of these (the document's pattern).
CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f]")
ID_PATTERN = r"^[^\x00-\x1f\x7f-\x9f]*$"


def check_id(value: Any) -> str:
    """An item id: a string of 1 to 128 printable characters (no control characters)."""
    if (
        not isinstance(value, str)
        or not 1 <= len(value) <= ID_MAX
        or CONTROL.search(value) is not None
        or not is_text(value)
    ):
        raise rule_error(
            f"string of 1 to {ID_MAX} printable characters",
            f"An item id must be a string of 1 to {ID_MAX} printable characters (no control "
            f"characters); got {shown(value)}.",
        )
    return value


def check_pattern(pattern: str, what: str) -> Any:
    compiled = re.compile(pattern)

    def check(value: Any) -> str:
        # fullmatch: "$" alone would also let a trailing newline through ("abc\n").
        if not isinstance(value, str) or not compiled.fullmatch(value):
            raise rule_error(
                f"matches {pattern}", f"A {what} must match {pattern}; got {shown(value)}."
            )
        return value

    return check


def check_space(value: Any) -> Any:
    """A feature space: a positive integer size (open) or a list of unique names (closed)."""
    if isinstance(value, int) and not isinstance(value, bool):
        if value >= 1:
            return value
    elif isinstance(value, list) and value:
        seen: set[str] = set()
        for position, name in enumerate(value):
            if not isinstance(name, str) or not name or len(name) > FEATURE_NAME_MAX:
                raise rule_error(
                    f"feature names of 1 to {FEATURE_NAME_MAX} characters",
                    f"Entry {position} of 'features' must be a feature name; got {shown(name)}.",
                    subfield=f"[{position}]",
                    value=name,
                )
            if name in seen:
                raise rule_error(
                    "unique names",
                    f"Feature names must be unique; {name!r} appears twice in 'features'.",
                    subfield=f"[{position}]",
                    value=name,
                )
            seen.add(name)
        return value
    raise rule_error(
        "positive integer size or non-empty list of names",
        "The feature space must be a positive integer size (open) or a non-empty list of "
        f"names (closed); got {shown(value)}.",
    )


def check_finite(value: Any) -> Any:
    """A JSON number (not a string or a boolean) that is finite."""
    if not _is_finite_number(value):
        raise rule_error("finite number", f"A finite number is required; got {shown(value)}.")
    return value


# The JSON Schema of a feature or flag name (1 to FEATURE_NAME_MAX characters).
_FEATURE_NAME = {"type": "string", "minLength": 1, "maxLength": FEATURE_NAME_MAX}

Features = Annotated[
    dict[str, float] | list[str],
    BeforeValidator(check_features),
    WithJsonSchema(
        {
            "anyOf": [
                {
                    "type": "object",
                    "propertyNames": _FEATURE_NAME,
                    "additionalProperties": {"type": "number"},
                },
                {"type": "array", "items": _FEATURE_NAME, "uniqueItems": True},
            ]
        }
    ),
]
Label = Annotated[
    int,
    BeforeValidator(check_label),
    WithJsonSchema({"anyOf": [{"type": "integer", "enum": [0, 1]}, {"type": "boolean"}]}),
]
ItemId = Annotated[
    str,
    BeforeValidator(check_id),
    WithJsonSchema({"type": "string", "minLength": 1, "maxLength": ID_MAX, "pattern": ID_PATTERN}),
]
StreamId = Annotated[
    str,
    BeforeValidator(check_pattern(STREAM_PATTERN, "stream id")),
    WithJsonSchema({"type": "string", "pattern": STREAM_PATTERN}),
]
LearnerName = Annotated[
    str,
    BeforeValidator(check_pattern(NAME_PATTERN, "learner name")),
    WithJsonSchema({"type": "string", "pattern": NAME_PATTERN}),
]
FiniteFloat = Annotated[float, BeforeValidator(check_finite)]
SpaceSpec = Annotated[
    int | list[str],
    BeforeValidator(check_space),
    WithJsonSchema(
        {
            "anyOf": [
                {"type": "integer", "minimum": 1},
                {"type": "array", "items": _FEATURE_NAME, "minItems": 1, "uniqueItems": True},
            ]
        }
    ),
]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)


# -- requests -------------------------------------------------------------------------------


def _kinds_text() -> str:
    parts = []
    for kind in sorted(learner_registry.KINDS):
        params = ", ".join(learner_registry.describe(kind)["params"]) or "none"
        parts.append(f"{kind} ({params})")
    return "; ".join(parts)


class LearnerSpec(BaseModel):
    """One learner of a panel: a name unique in the stream, a kind, and its parameters inline."""

    model_config = ConfigDict(
        extra="allow",
        allow_inf_nan=False,
        json_schema_extra={
            "description": "One learner of a panel: a name unique in the stream, a kind, and "
            "the kind's parameters inline (each checked by the learner, which names the rule "
            "it breaks). Parameters by kind: " + _kinds_text() + "."
        },
    )

    name: LearnerName
    # Checked by the learner registry (its error names the known kinds); documented as the list.
    kind: Annotated[
        str,
        Field(min_length=1, max_length=64),
        WithJsonSchema({"type": "string", "enum": sorted(learner_registry.KINDS)}),
    ]

    def params(self) -> dict[str, Any]:
        return dict(self.model_extra or {})


class StreamCreate(_Strict):
    """A new stream. Beyond this schema: learner names are unique, ``serve`` names one of them,
    ``webhook`` starts with an allowed prefix of the settings, and the limits on streams and
    learners per stream hold."""

    stream: StreamId
    features: SpaceSpec
    learners: Annotated[list[LearnerSpec], Field(min_length=1)]
    serve: LearnerName | None = None
    label_wait_seconds: Annotated[FiniteFloat, Field(gt=0, le=10 * 365 * 86400)] = 604800.0
    on_exceed: Literal["keep", "restart"] = "keep"
    near: Annotated[FiniteFloat, Field(gt=0, le=1)] = 0.8
    webhook: Annotated[str, Field(min_length=1, max_length=2000)] | None = None


def _single_or_batch(model: Any, needed: tuple[str, ...], optional: tuple[str, ...]) -> Any:
    """A body holds one item (its fields at the top) or a non-empty batch in ``items``."""
    given = [name for name in (*needed, *optional) if getattr(model, name) is not None]
    if model.items is not None:
        if given:
            raise rule_error(
                "either one item or a batch in 'items', not both",
                f"A request holds either one item or a batch in 'items'; it has 'items' and "
                f"{given[0]!r}.",
                subfield="items",
                value=given[0],
            )
        if not model.items:
            raise rule_error(
                "at least one item", "The batch in 'items' is empty.", subfield="items", value=[]
            )
        return model
    for name in needed:
        if getattr(model, name) is None:
            raise rule_error(
                "required (or a batch in 'items')",
                f"The field {name!r} is required for one item (or send a batch in 'items').",
                subfield=name,
                value=None,
            )
    return model


def _without_null(prop: dict[str, Any]) -> dict[str, Any]:
    """A property's JSON Schema without its ``null`` alternative (for a required field)."""
    variants = [v for v in prop.get("anyOf", []) if v != {"type": "null"}]
    if not variants or len(variants) == len(prop.get("anyOf", [])):
        return prop
    rest = {k: v for k, v in prop.items() if k != "anyOf"}
    return {**rest, **variants[0]} if len(variants) == 1 else {**rest, "anyOf": variants}


def _single_or_batch_schema(needed: tuple[str, ...], optional: tuple[str, ...]) -> Any:
    """The JSON Schema of a single-or-batch body: exactly the two shapes validation accepts.

    One item: its ``needed`` fields (not null) and ``optional`` ones, ``items`` absent or null.
    A batch: a non-empty ``items``, the single fields absent or null.
    """

    def rewrite(schema: dict[str, Any]) -> None:
        props = schema.pop("properties")
        for key in ("required", "type", "additionalProperties"):
            schema.pop(key, None)
        single = {name: _without_null(props[name]) for name in needed}
        single.update({name: props[name] for name in optional})
        single["items"] = {"type": "null"}
        batch: dict[str, Any] = {name: {"type": "null"} for name in (*needed, *optional)}
        batch["items"] = {**_without_null(props["items"]), "minItems": 1}
        schema["anyOf"] = [
            {
                "type": "object",
                "title": "One item",
                "properties": single,
                "required": list(needed),
                "additionalProperties": False,
            },
            {
                "type": "object",
                "title": "A batch",
                "properties": batch,
                "required": ["items"],
                "additionalProperties": False,
            },
        ]

    return rewrite


class PredictItem(_Strict):
    id: ItemId | None = None
    features: Features


class PredictRequest(_Strict):
    """One item (``id``?, ``features``) or a batch in ``items``."""

    model_config = ConfigDict(json_schema_extra=_single_or_batch_schema(("features",), ("id",)))

    id: ItemId | None = None
    features: Features | None = None
    items: list[PredictItem] | None = None

    @model_validator(mode="after")
    def _shape(self) -> PredictRequest:
        return _single_or_batch(self, ("features",), ("id",))


class FeedbackItem(_Strict):
    id: ItemId
    label: Label


class FeedbackRequest(_Strict):
    """One label (``id``, ``label``) or a batch in ``items``."""

    model_config = ConfigDict(json_schema_extra=_single_or_batch_schema(("id", "label"), ()))

    id: ItemId | None = None
    label: Label | None = None
    items: list[FeedbackItem] | None = None

    @model_validator(mode="after")
    def _shape(self) -> FeedbackRequest:
        return _single_or_batch(self, ("id", "label"), ())


class ExampleItem(_Strict):
    id: ItemId | None = None
    features: Features
    label: Label


class ExampleRequest(_Strict):
    """One labelled item (``id``?, ``features``, ``label``) or a batch in ``items``."""

    model_config = ConfigDict(
        json_schema_extra=_single_or_batch_schema(("features", "label"), ("id",))
    )

    id: ItemId | None = None
    features: Features | None = None
    label: Label | None = None
    items: list[ExampleItem] | None = None

    @model_validator(mode="after")
    def _shape(self) -> ExampleRequest:
        return _single_or_batch(self, ("features", "label"), ("id",))


# -- responses (documentation of what the routes return) ---------------------------------


ERROR_CODES = (
    "invalid_value",
    "too_large",
    "unauthorized",
    "forbidden",
    "not_found",
    "expired",
    "conflict",
    "unavailable",
    "method_not_allowed",
    "http_error",
    "internal",
)


class ErrorDetail(BaseModel):
    """The one error shape: the HTTP status again, a code, the field, the rule it breaks, the
    value received (JSON-safe; null when absent) and a sentence naming all three."""

    model_config = ConfigDict(extra="forbid")

    status: Annotated[int, Field(ge=400, le=599)]
    code: Annotated[str, WithJsonSchema({"type": "string", "enum": list(ERROR_CODES)})]
    field: str
    rule: str
    value: Any = Field(description="the value received, or null")
    message: Annotated[str, Field(min_length=1)]


class ErrorBody(BaseModel):
    model_config = ConfigDict(extra="forbid")

    error: ErrorDetail


# The refusals the /v1 routes document in the OpenAPI schema, all in the one error shape.
ERROR_RESPONSES: dict[int | str, dict[str, Any]] = {
    code: {"model": ErrorBody} for code in (401, 403, 404, 409, 410, 413, 422, 503)
}


class StreamDeleted(BaseModel):
    stream: str
    deleted: Literal[True]


class Health(BaseModel):
    status: Literal["alive"]


class Readiness(BaseModel):
    status: Literal["ready"]
    streams: int


class LearnerDescription(BaseModel):
    model_config = ConfigDict(extra="allow")
    name: str
    kind: str


class StreamDescription(BaseModel):
    stream: str
    features: int | list[str]
    known_features: int
    learners: list[LearnerDescription]
    serve: str
    label_wait_seconds: float
    on_exceed: Literal["keep", "restart"]
    near: float
    webhook: str | None
    created: float
    pending: int


class StreamList(BaseModel):
    streams: list[StreamDescription]


class Answer(BaseModel):
    id: str
    label: Literal[0, 1]
    served_by: str
    votes: dict[str, Literal[0, 1]]
    duplicate: bool


class AnswerBatch(BaseModel):
    items: list[Answer]


class LearnerOutcome(BaseModel):
    wrong: bool = Field(
        description="feedback: the learner's vote at predict time differed from the label; "
        "examples: its hypothesis at label time was wrong"
    )
    updated: bool = Field(description="the learner updated on this label")


class FeedbackResult(BaseModel):
    id: str
    status: Literal["applied", "duplicate", "conflict", "unknown", "expired"]
    learners: dict[str, LearnerOutcome] | None = None
    message: str | None = None


class FeedbackBatch(BaseModel):
    items: list[FeedbackResult]


class CeilingView(BaseModel):
    value: float | None
    formula: str
    assumption: str
    source: str
    counts: Literal["updates", "mistakes"]
    implied: dict[str, float | None]


class AlertView(BaseModel):
    learner: str
    epoch: int
    state: Literal["exceeded", "contradicted"]
    at: float
    count: int
    ceiling: float | None
    evidence: list[str]
    policy: Literal["keep", "restart"]


class HistoryPoint(BaseModel):
    t: float
    labels: int
    served_mistakes: int
    updates: int
    ceiling: float | None


class LearnerLedger(BaseModel):
    model_config = ConfigDict(extra="allow")
    name: str
    kind: str
    epoch: int
    examples: int
    served_mistakes: int
    mistakes: int
    updates: int
    ceiling: CeilingView
    served_ceiling: float | None
    max_outstanding: int
    state: Literal["within", "near", "exceeded", "contradicted"]
    alerts: list[AlertView]
    epochs: list[dict[str, Any]]
    history: list[HistoryPoint]


class Ledger(BaseModel):
    stream: str
    serve: str
    pending: int
    expired: int
    max_outstanding: int
    alerts: list[AlertView]
    learners: list[LearnerLedger]


class CompareRow(BaseModel):
    name: str
    served_mistakes: int
    updates: int
    state: Literal["within", "near", "exceeded", "contradicted"]
    compared: int
    only_this_wrong: int
    only_served_wrong: int
    p_value: float


class Comparison(BaseModel):
    serve: str
    learners: list[CompareRow]
