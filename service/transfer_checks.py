"""Checking an imported stream document completely before anything changes (``service.transfer``).

:func:`read_document` reads the body of ``POST /v1/streams/import``: the document's shape field by
field (the models below mirror what ``Stream.to_state`` writes), the configuration by the very
rules of a stream creation here, the feature space, each seat's learner state against its
parameters, and the waiting predictions and remembered ids against the panel. The first thing
wrong is named by its path (e.g. ``state.pending[3][4]``) with the rule and the value. Nothing in
the registry or the store changes here.

:func:`check_stream_header` holds the sharding proxy's ``Mistake-Ledger-Stream`` header equal to
the stream a create or an import body names.
"""

from __future__ import annotations

import json
import re
from typing import Annotated, Any, Literal

from fastapi.exceptions import RequestValidationError
from pydantic import BaseModel, ConfigDict, Field, ValidationError

import learners
from learners import Encoded, FeatureSpace, LearnerError
from service import bodies, schemas
from service.errors import InvalidInput, from_learner, from_validation
from service.registry import Registry
from service.streams import DELAY_BUCKETS, Stream

FORMAT = "mistake-ledger stream"
VERSION = 1
HEADER = "Mistake-Ledger-Stream"


def check_stream_header(given: str | None, stream: str, what: str = "body") -> None:
    """Refuse a ``Mistake-Ledger-Stream`` header that names another stream than the body."""
    if given is not None and given != stream:
        raise InvalidInput(
            f"The {HEADER} header names stream {given!r} but the {what} is for {stream!r}; "
            "the sharding proxy routes by the header, so the two must be equal.",
            field=HEADER,
            rule=f"equal to the {what}'s 'stream'",
            value=given,
        )


# -- the shape of a document, checked field by field --------------------------------------------

Nat = Annotated[int, Field(strict=True, ge=0)]
Bit = Annotated[int, Field(strict=True, ge=0, le=1)]
Num = schemas.FiniteFloat
# An item's print: 64 bits (a text digest in states of version 1).
Print = (
    Annotated[int, Field(strict=True, ge=0, le=(1 << 64) - 1)]
    | Annotated[str, Field(pattern=r"^[0-9a-f]{24}$")]
)
State = Literal["within", "near", "exceeded", "contradicted"]


class _Plain(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)


class _Spec(_Plain):
    name: Any
    kind: Any
    params: dict[str, Any]


class _Config(_Plain):
    stream: Any
    features: Any
    learners: list[_Spec]
    serve: Any
    label_wait_seconds: Any
    on_exceed: Any
    near: Any
    webhook: Any


class _Space(_Plain):
    version: Literal[1]
    size: Nat
    closed: bool
    names: list[str]


class _Ceiling(_Plain):
    value: Num | None
    formula: str
    assumption: str
    source: str
    counts: Literal["updates", "mistakes"]
    implied: dict[str, Num | None]


class _Epoch(_Plain):
    epoch: Nat
    started: Num
    ended: Num
    examples: Nat
    served_mistakes: Nat
    mistakes: Nat
    updates: Nat
    ceiling: _Ceiling
    served_ceiling: Num | None
    max_outstanding: Nat
    state: State


class _Alert(_Plain):
    learner: str
    epoch: Nat
    state: Literal["exceeded", "contradicted"]
    at: Num
    count: Nat
    ceiling: Num | None
    evidence: list[schemas.ItemId]
    policy: Literal["keep", "restart"]


class _AlertCounts(_Plain):
    exceeded: Nat
    contradicted: Nat


class _Seat(_Plain):
    name: str
    kind: str
    params: dict[str, Any]
    learner: dict[str, Any]
    epoch: Nat
    started: Num
    served_mistakes: Nat
    outstanding: Nat
    max_outstanding: Nat
    recent_wrong: list[schemas.ItemId]
    alerted: Literal["exceeded", "contradicted"] | None
    history: list[tuple[Num, Nat, Nat, Nat, Num | None]]
    past: list[_Epoch]
    alerts: list[_Alert]
    alert_counts: _AlertCounts
    totals: tuple[Nat, Nat, Nat, Nat, Nat, Nat]


class _Counts(_Plain):
    predictions: Nat
    labels: Nat
    examples: Nat
    expired: Nat


class _Delay(_Plain):
    buckets: list[Nat]
    sum: Annotated[Num, Field(ge=0)]


# [id, t, keys, vals, votes, epochs, fingerprint] and [id, kind, at, fingerprint, label, votes,
# wrong bits, updated bits], as Stream.to_state writes them.
_Waiting = tuple[schemas.ItemId, Num, list[Nat], list[Num] | None, list[Bit], list[Nat], Print]
_Known = tuple[
    schemas.ItemId,
    Literal["labelled", "expired", "example"],
    Num,
    Print,
    Bit | None,
    list[Bit] | None,
    Nat,
    Nat,
]


class _State(_Plain):
    version: Literal[1, 2]  # 1: text prints
    config: _Config
    created: Num
    last_t: Num
    space: _Space
    seats: list[_Seat]
    pending: list[_Waiting]
    resolved: list[_Known]
    counts: _Counts
    delay: _Delay


class _Document(_Plain):
    format: Literal["mistake-ledger stream"]
    version: Literal[1]
    stream: schemas.StreamId
    exported: Num | None = None
    seq: Nat | None = None
    state: _State


def _bad(field: str, rule: str, value: Any, message: str | None = None) -> InvalidInput:
    shown = json.dumps(value) if isinstance(value, str | int | float | None) else repr(value)
    text = message or f"The field {field!r} of the stream document must be {rule}; got {shown}."
    return InvalidInput(text, field=field, rule=rule, value=value)


_PARAM = re.compile(r"^learners\[(\d+)\]\.(?!(?:name|kind)(?:$|[.\[]))")


def _config_field(field: str) -> str:
    """A field of a stream creation as a field of the document: learners' parameters are in
    ``params`` there (``learners[0].rules`` -> ``state.config.learners[0].params.rules``)."""
    return "state.config." + _PARAM.sub(r"learners[\1].params.", field)


def read_document(registry: Registry, raw: bytes, header: str | None) -> Stream:
    """Check an exported document completely and build its stream; raise naming the first
    field that is wrong. Nothing in the registry or the store changes here."""
    try:
        doc = bodies.strict_json_loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InvalidInput(
            f"The body is not a JSON document: {exc}.", field="body", rule="valid JSON"
        ) from exc
    if not isinstance(doc, dict):
        raise _bad("body", "a JSON object (an exported stream)", doc)
    if doc.get("format") != FORMAT:
        raise _bad("format", f"equal to {FORMAT!r}", doc.get("format"))
    version = doc.get("version")
    if type(version) not in (int, float) or version != VERSION:
        raise _bad(
            "version",
            f"{VERSION} (the version this service reads)",
            version,
            f"This service reads stream documents of version {VERSION}; got {version!r}.",
        )
    try:
        checked = _Document.model_validate(doc)
    except ValidationError as exc:
        raise from_validation(RequestValidationError(exc.errors(include_url=False))) from None
    check_stream_header(header, checked.stream, "document")
    config = _checked_config(registry, checked)
    space = _checked_space(checked.state, config)
    panel = _checked_seats(checked.state, config, space)
    _check_ids(checked.state, panel, len(space))
    state = dict(doc["state"])
    state["config"] = config
    try:
        return Stream.from_state(
            state,
            history_points=registry.settings.history_points,
            max_remembered=registry.settings.max_remembered_ids,
        )
    except (LearnerError, KeyError, TypeError, ValueError, IndexError) as exc:  # not expected
        raise _bad("state", "a stream state as export writes it", str(exc)) from exc


def _checked_config(registry: Registry, doc: _Document) -> dict[str, Any]:
    """The configuration, checked by the very rules of a stream creation on this service."""
    raw = doc.state.config
    body: dict[str, Any] = {k: v for k, v in raw if k != "learners"}
    body["learners"] = []
    for index, spec in enumerate(raw.learners):
        for key in ("name", "kind"):
            if key in spec.params:
                raise _bad(
                    f"state.config.learners[{index}].params.{key}",
                    "a parameter other than name and kind",
                    key,
                )
        body["learners"].append({"name": spec.name, "kind": spec.kind, **spec.params})
    try:
        create = schemas.StreamCreate.model_validate(body)
        config = registry._config(create)
    except ValidationError as exc:
        error = from_validation(RequestValidationError(exc.errors(include_url=False)))
        error.field = _config_field(error.field)
        raise error from None
    except InvalidInput as exc:
        exc.field = _config_field(exc.field)
        raise
    if config["stream"] != doc.stream:
        raise _bad("state.config.stream", "equal to the document's 'stream'", config["stream"])
    return config


def _checked_space(state: _State, config: dict[str, Any]) -> FeatureSpace:
    space, features = state.space, config["features"]
    if isinstance(features, list):
        if not space.closed or space.size != len(features) or space.names != features:
            raise _bad("state.space", "the closed space of state.config.features", space.names)
    elif space.closed or space.size != features:
        raise _bad("state.space.size", f"{features} (state.config.features)", space.size)
    names = space.names
    if len(names) > space.size:
        raise _bad("state.space.names", f"at most {space.size} names", len(names))
    seen: set[str] = set()
    for index, name in enumerate(names):
        if not name or len(name) > schemas.FEATURE_NAME_MAX or name in seen:
            raise _bad(
                f"state.space.names[{index}]",
                f"a unique name of 1 to {schemas.FEATURE_NAME_MAX} characters",
                name,
            )
        seen.add(name)
    built = FeatureSpace(features)
    built.adopt(names)
    return built


def _checked_seats(
    state: _State, config: dict[str, Any], space: FeatureSpace
) -> list[learners.Learner]:
    specs = config["learners"]
    if len(state.seats) != len(specs):
        raise _bad(
            "state.seats", f"one seat per learner of the panel ({len(specs)})", len(state.seats)
        )
    panel = []
    for index, (seat, spec) in enumerate(zip(state.seats, specs, strict=True)):
        where = f"state.seats[{index}]"
        for key in ("name", "kind", "params"):
            if getattr(seat, key) != spec[key]:
                rule = f"equal to state.config.learners[{index}].{key}"
                raise _bad(f"{where}.{key}", rule, getattr(seat, key))
        if seat.learner.get("kind") != spec["kind"]:
            raise _bad(
                f"{where}.learner.kind", f"equal to {spec['kind']!r}", seat.learner.get("kind")
            )
        try:
            learner = learners.from_state(seat.learner, space)
        except LearnerError as exc:
            raise from_learner(exc, f"{where}.learner", f"Seat {spec['name']!r}") from exc
        except (KeyError, TypeError, ValueError, IndexError, AttributeError, OverflowError) as exc:
            raise _bad(
                f"{where}.learner", "a learner state as export writes it", repr(exc)
            ) from exc
        fresh = learners.make(spec["kind"], features=space, **spec["params"])
        if learner.params() != fresh.params():
            rule = "the parameters of the seat's learner"
            raise _bad(f"{where}.learner.params", rule, seat.learner.get("params"))
        panel.append(learner)
    return panel


def _check_ids(state: _State, panel: list[learners.Learner], known: int) -> None:
    """Waiting predictions and remembered ids fit the panel, the space and the seats' epochs."""
    width = len(panel)
    epochs = [seat.epoch for seat in state.seats]
    waiting = [0] * width
    seen: set[str] = set()
    last = state.created
    for j, (item_id, t, keys, vals, votes, of_epoch, _) in enumerate(state.pending):
        where = f"state.pending[{j}]"
        if item_id in seen:
            raise _bad(f"{where}[0]", "an id used once", item_id)
        seen.add(item_id)
        if not last <= t <= state.last_t:
            rule = "in order of prediction time, within state.created .. state.last_t"
            raise _bad(f"{where}[1]", rule, t)
        last = t
        for k, key in enumerate(keys):
            if key >= known:
                raise _bad(f"{where}[2][{k}]", f"a known feature index (below {known})", key)
        if len(set(keys)) != len(keys):
            raise _bad(f"{where}[2]", "distinct feature indices", keys)
        if vals is not None and len(vals) != len(keys):
            raise _bad(f"{where}[3]", f"null or {len(keys)} values (one per index)", len(vals))
        enc = Encoded(list(keys), None if vals is None else list(vals))
        for learner in panel:
            try:
                learner.check(enc)
            except LearnerError as exc:
                raise _bad(f"{where}[3]", exc.rule, exc.value) from exc
        if len(votes) != width:
            raise _bad(f"{where}[4]", f"{width} votes (one per learner)", votes)
        if len(of_epoch) != width:
            raise _bad(f"{where}[5]", f"{width} epochs (one per learner)", of_epoch)
        for i, epoch in enumerate(of_epoch):
            if epoch > epochs[i]:
                raise _bad(f"{where}[5][{i}]", f"at most the seat's epoch {epochs[i]}", epoch)
            waiting[i] += epoch == epochs[i]
    for i, seat in enumerate(state.seats):
        if seat.outstanding != waiting[i]:
            rule = f"the waiting predictions of its epoch ({waiting[i]})"
            raise _bad(f"state.seats[{i}].outstanding", rule, seat.outstanding)
    for j, (item_id, kind, at, _, label, votes_or_none, wrong, updated) in enumerate(
        state.resolved
    ):
        where = f"state.resolved[{j}]"
        if item_id in seen:
            raise _bad(f"{where}[0]", "an id used once", item_id)
        seen.add(item_id)
        if at > state.last_t:
            raise _bad(f"{where}[2]", "at most state.last_t", at)
        if (label is None) != (kind == "expired"):
            raise _bad(f"{where}[4]", "null for an expired id, else 0 or 1", label)
        if (votes_or_none is None) != (kind == "example"):
            raise _bad(f"{where}[5]", "null for a labelled example, else the votes", votes_or_none)
        if votes_or_none is not None and len(votes_or_none) != width:
            raise _bad(f"{where}[5]", f"{width} votes (one per learner)", votes_or_none)
        for position, bits in ((6, wrong), (7, updated)):
            if bits >= 1 << width:
                raise _bad(f"{where}[{position}]", f"a bit per learner (below {1 << width})", bits)
    if len(state.delay.buckets) != len(DELAY_BUCKETS) + 1:
        rule = f"{len(DELAY_BUCKETS) + 1} counts"
        raise _bad("state.delay.buckets", rule, len(state.delay.buckets))
    if state.last_t < state.created:
        raise _bad("state.last_t", "at least state.created", state.last_t)
