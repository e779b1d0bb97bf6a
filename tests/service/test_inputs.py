"""Bad input: a 4xx in the one error shape naming field, rule and value, and no state change."""

from __future__ import annotations

import json
from typing import Any

import pytest

from tests.service.conftest import MakeApp
from tests.service.harness import Running, running

CLOSED = "/v1/streams/closed"
OPEN = "/v1/streams/open"


def setup(service: Running) -> None:
    for body in (
        {"stream": "closed", "features": ["a", "b", "c"],
         "learners": [{"name": "elim", "kind": "elimination"}]},
        {"stream": "open", "features": 3,
         "learners": [{"name": "elim", "kind": "elimination"},
                      {"name": "perc", "kind": "perceptron"}]},
    ):  # fmt: skip
        assert service.post("/v1/streams", json=body).status_code == 201
    service.post(f"{CLOSED}/predict", json={"id": "known", "features": ["a"]})
    service.post(f"{OPEN}/predict", json={"id": "known", "features": ["x"]})


def state(service: Running) -> dict[str, Any]:
    """Everything a client can read, plus the stored log position and the feature names."""
    out = {}
    for name in ("closed", "open"):
        out[name] = {
            "ledger": service.get(f"/v1/streams/{name}/ledger").json(),
            "stream": service.get(f"/v1/streams/{name}").json(),
            "names": list(service.registry.get(name).space.names),
            "seq": service.registry.get(name).last_seq,
        }
    return out


def raw(service: Running, url: str, text: str) -> Any:
    return service.post(url, content=text, headers={"content-type": "application/json"})


# DESIGN.md (Interfaces): one error shape naming the field, the rule and the value.
def check(response: Any, status: int, field: str, rule_part: str, value: Any = ...) -> None:
    assert response.status_code == status, response.text
    error = response.json()["error"]
    assert error["status"] == status
    assert error["field"] == field
    assert rule_part in error["rule"]
    assert error["message"]
    if value is not ...:
        assert error["value"] == value


# (url, body as JSON text, status, field, part of the rule, value)
# 422: RFC 9110 §15.5.21 (well-formed but not acceptable content; also FastAPI's choice for a
# failed validation); 404: RFC 9110 §15.5.5 (no such stream). Feature spaces: DESIGN.md
# (Features); labels are 0 or 1, JSON true/false read as 1/0: common practice.
CASES = [
    # wrong types
    (f"{CLOSED}/predict", '{"features": {"a": "1"}}', 422, "features.a", "finite number", "1"),
    (f"{CLOSED}/predict", '{"features": {"a": true}}', 422, "features.a", "finite number", True),
    (f"{CLOSED}/predict", '{"features": "a"}', 422, "features", "mapping", "a"),
    (f"{CLOSED}/predict", '{"features": ["a", 3]}', 422, "features[1]", "flag names", 3),
    (f"{CLOSED}/predict", '{"id": 7, "features": ["a"]}', 422, "id", "printable", 7),
    (f"{CLOSED}/predict", '{"items": {"features": ["a"]}}', 422, "items", "a list",
     {"features": ["a"]}),
    (f"{CLOSED}/predict", "[1, 2]", 422, "body", "a JSON object", [1, 2]),
    (f"{CLOSED}/predict", '{"features": ["a"], "extra": 1}', 422, "extra", "known field", 1),
    (f"{CLOSED}/predict", '{"features": ', 422, "body", "valid JSON", None),
    # non-finite numbers, which Python's json module would accept
    # RFC 8259 (JSON): NaN and Infinity are not JSON numbers; the Python json docs (Infinite and
    # NaN number values) say the module accepts them anyway.
    (f"{CLOSED}/predict", '{"features": {"a": NaN}}', 422, "features.a", "finite number", "NaN"),
    (f"{CLOSED}/predict", '{"features": {"b": Infinity}}', 422, "features.b", "finite", "Infinity"),
    (f"{CLOSED}/predict", '{"items": [{"features": ["a"]}, {"features": {"c": -Infinity}}]}',
     422, "items[1].features.c", "finite number", "-Infinity"),
    (f"{CLOSED}/feedback", '{"id": "known", "label": NaN}', 422, "label", "one of 0, 1", "NaN"),
    # empty batches and missing parts
    (f"{CLOSED}/predict", '{"items": []}', 422, "items", "at least one item", []),
    (f"{CLOSED}/predict", "{}", 422, "features", "required", None),
    (f"{CLOSED}/predict", '{"features": [], "items": [{"features": []}]}', 422, "items",
     "not both", "features"),
    (f"{CLOSED}/feedback", '{"items": []}', 422, "items", "at least one item", []),
    (f"{CLOSED}/feedback", '{"id": "known"}', 422, "label", "required", None),
    (f"{CLOSED}/examples", '{"features": ["a"]}', 422, "label", "required", None),
    (f"{CLOSED}/predict", '{"features": ["a", "a"]}', 422, "features[1]", "at most once", "a"),
    # unknown features in a closed space; a full open space
    (f"{CLOSED}/predict", '{"features": ["a", "zz"]}', 422, "features.zz", "declared", "zz"),
    (f"{CLOSED}/examples", '{"features": {"q": 2}, "label": 1}', 422, "features.q", "declared",
     "q"),
    (f"{OPEN}/predict", '{"features": ["x", "y", "z", "w"]}', 422, "features.y",
     "at most 3 distinct", "y"),
    # labels not in 0, 1, true, false
    (f"{CLOSED}/feedback", '{"id": "known", "label": 2}', 422, "label", "one of 0, 1", 2),
    (f"{CLOSED}/feedback", '{"id": "known", "label": "yes"}', 422, "label", "one of", "yes"),
    (f"{CLOSED}/feedback", '{"id": "known", "label": null}', 422, "label", "required", None),
    (f"{CLOSED}/feedback",
     '{"items": [{"id": "known", "label": 1}, {"id": "known", "label": 0.5}]}',
     422, "items[1].label", "one of 0, 1", 0.5),
    (f"{CLOSED}/examples", '{"features": ["a"], "label": -1}', 422, "label", "one of", -1),
    # unknown streams
    ("/v1/streams/nowhere/predict", '{"features": ["a"]}', 404, "stream", "existing", "nowhere"),
    ("/v1/streams/nowhere/feedback", '{"id": "a", "label": 1}', 404, "stream", "existing", ...),
]  # fmt: skip


@pytest.mark.parametrize(("url", "text", "status", "field", "rule", "value"), CASES)
def test_bad_request_is_named_and_changes_nothing(
    service: Running, url: str, text: str, status: int, field: str, rule: str, value: Any
) -> None:
    setup(service)
    before = state(service)
    check(raw(service, url, text), status, field, rule, value)
    assert state(service) == before  # the client's rule: bad input changes no state


# 422 (RFC 9110 §15.5.21) for a bad stream declaration; webhook allow list: DESIGN.md (Security).
STREAM_CASES = [
    ({"stream": "Bad Name"}, "stream", "matches", "Bad Name"),
    ({"features": 0}, "features", "positive integer", 0),
    ({"features": True}, "features", "positive integer", True),
    ({"features": ["a", "a"]}, "features[1]", "unique", "a"),
    ({"features": []}, "features", "non-empty list", []),
    ({"learners": []}, "learners", "at least 1", []),
    ({"learners": [{"name": "x", "kind": "nonesuch"}]}, "learners[0].kind", "one of", "nonesuch"),
    ({"learners": [{"name": "x", "kind": "elimination", "negations": 3}]},
     "learners[0].negations", "boolean", ...),
    ({"learners": [{"name": "x", "kind": "elimination", "speed": 3}]},
     "learners[0].speed", "one of", "speed"),
    ({"learners": [{"name": "x", "kind": "elimination"}, {"name": "x", "kind": "elimination"}]},
     "learners[1].name", "unique", "x"),
    ({"learners": [{"name": "p", "kind": "perceptron", "margin": "NaN-marker"}]},
     "learners[0].margin", "finite", "NaN"),
    ({"serve": "ghost"}, "serve", "learner in the panel", "ghost"),
    ({"label_wait_seconds": 0}, "label_wait_seconds", "a number > 0", 0),
    ({"label_wait_seconds": "1"}, "label_wait_seconds", "finite number", "1"),
    ({"near": True}, "near", "finite number", True),
    ({"near": 1.5}, "near", "a number <= 1", 1.5),
    ({"on_exceed": "explode"}, "on_exceed", "'keep' or 'restart'", "explode"),
    ({"webhook": "http://127.0.0.1:9/hook"}, "webhook", "allow list", "http://127.0.0.1:9/hook"),
]  # fmt: skip


@pytest.mark.parametrize(("change", "field", "rule", "value"), STREAM_CASES)
def test_bad_stream_is_named_and_not_created(
    service: Running, change: dict[str, Any], field: str, rule: str, value: Any
) -> None:
    body = {"stream": "s", "features": 4, "learners": [{"name": "e", "kind": "elimination"}]}
    text = json.dumps({**body, **change}).replace('"NaN-marker"', "NaN")
    check(raw(service, "/v1/streams", text), 422, field, rule, value)
    assert service.get("/v1/streams").json()["streams"] == []


# DESIGN.md (Security): size limits with clear 4xx errors. 413 Content Too Large: RFC 9110
# §15.5.14; 409 Conflict for a full registry (state of the server): RFC 9110 §15.5.10.
def test_limits_are_4xx_and_change_nothing(make_app: MakeApp) -> None:
    app = make_app(
        max_batch_items=3, max_features_per_item=2, max_body_bytes=400, max_streams=2,
        max_learners=2,
    )  # fmt: skip
    with running(app) as service:
        setup(service)
        before = state(service)
        items = [{"features": ["a"]}] * 4
        check(service.post(f"{CLOSED}/predict", json={"items": items}), 422, "items",
              "at most 3 items", 4)  # fmt: skip
        check(service.post(f"{CLOSED}/predict", json={"features": ["a", "b", "c"]}), 422,
              "features", "at most 2 features", 3)  # fmt: skip
        batch = {"items": [{"features": ["a"]}, {"features": ["a", "b", "c"]}]}
        check(service.post(f"{CLOSED}/predict", json=batch), 422, "items[1].features",
              "at most 2 features", 3)  # fmt: skip
        check(service.post(f"{CLOSED}/examples", json={"features": ["a", "b", "c"], "label": 1}),
              422, "features", "at most 2 features", 3)  # fmt: skip
        big = {"features": {f"f{i}": 1 for i in range(60)}}
        check(service.post(f"{CLOSED}/predict", json=big), 413, "body", "at most 400 bytes")
        assert state(service) == before
        panel = [{"name": f"l{i}", "kind": "elimination"} for i in range(3)]
        check(service.post("/v1/streams", json={"stream": "s3", "features": 2, "learners": panel}),
              422, "learners", "at most 2 learners", 3)  # fmt: skip
        one = [{"name": "e", "kind": "elimination"}]
        check(service.post("/v1/streams", json={"stream": "s3", "features": 2, "learners": one}),
              409, "stream", "at most 2 streams", 3)  # fmt: skip
        assert state(service) == before


# RFC 9110 §15.5.14: 413 also for a chunked body with no Content-Length (limit on bytes read).
def test_body_limit_holds_without_a_content_length(make_app: MakeApp) -> None:
    with running(make_app(max_body_bytes=200)) as service:
        setup(service)

        async def chunks() -> Any:
            for _ in range(10):
                yield b" " * 50
            yield b"{}"

        response = service.post(f"{CLOSED}/predict", content=chunks(),
                                headers={"content-type": "application/json"})  # fmt: skip
        check(response, 413, "body", "at most 200 bytes")


def test_a_bad_batch_admits_no_feature_name(service: Running) -> None:
    """All or nothing: item 0 would admit 'p' to the open space, item 1 overfills it."""
    # Worked by hand: size 3 with "x" known leaves 2 places; {q, r, s} needs 3.
    setup(service)
    before = state(service)
    batch = {"items": [{"id": "n1", "features": ["p"]}, {"id": "n2", "features": ["q", "r", "s"]}]}
    # The space holds "x" and takes 2 more names: the error names the first new one.
    check(service.post(f"{OPEN}/predict", json=batch), 422, "items[1].features.q",
          "at most 3 distinct", "q")  # fmt: skip
    assert state(service) == before
    assert service.registry.get("open").space.names == ["x"]
    examples = {"items": [{"features": ["p"], "label": 1}, {"features": ["q", "r", "s"],
                                                            "label": 0}]}  # fmt: skip
    check(service.post(f"{OPEN}/examples", json=examples), 422, "items[1].features.q",
          "at most 3 distinct")  # fmt: skip
    assert state(service) == before


def test_a_bad_feedback_batch_applies_nothing(service: Running) -> None:
    setup(service)
    before = state(service)
    # All-or-nothing batches: common practice; the client's rule: bad input changes no state.
    batch = {"items": [{"id": "known", "label": 1}, {"id": 5, "label": 1}]}
    check(service.post(f"{CLOSED}/feedback", json=batch), 422, "items[1].id", "printable", 5)
    assert state(service) == before


def test_a_reused_id_in_a_batch_rejects_the_whole_batch(service: Running) -> None:
    setup(service)
    before = state(service)
    # RFC 9110 §15.5.10: 409 Conflict for an id already in use.
    batch = {"items": [{"id": "new", "features": ["a"]}, {"id": "known", "features": ["b"]}]}
    check(service.post(f"{CLOSED}/predict", json=batch), 409, "items[1].id", "one item", "known")
    twice = {"items": [{"id": "n", "features": ["a"]}, {"id": "n", "features": ["b"]}]}
    check(service.post(f"{CLOSED}/predict", json=twice), 409, "items[1].id", "one item", "n")
    assert state(service) == before


# RFC 9110 §15.5.5: 404 Not Found; §15.5.6: 405 Method Not Allowed.
def test_unknown_routes_and_methods_use_the_error_shape(service: Running) -> None:
    response = service.get("/v1/nothing-here")
    assert response.status_code == 404
    assert response.json()["error"]["status"] == 404
    response = service.request("PUT", "/v1/streams")
    assert response.status_code == 405
    assert response.json()["error"]["status"] == 405


def test_a_learner_refusing_an_item_rejects_the_whole_batch(service: Running) -> None:
    """Winnow reads values in [0, 1] only: the space accepts 2, the panel does not."""
    # THEORY.md (Multiplicative weights): Winnow's target is a disjunction of boolean variables.
    panel = [{"name": "e", "kind": "elimination"}, {"name": "w", "kind": "winnow"}]
    body = {"stream": "mixed", "features": 5, "learners": panel}
    assert service.post("/v1/streams", json=body).status_code == 201
    url = "/v1/streams/mixed"
    batch = {"items": [{"features": {"a": 1}}, {"features": {"b": 2}}]}
    check(service.post(f"{url}/predict", json=batch), 422, "items[1].features.b", "0 and 1", 2)
    examples = {"items": [{"features": {"a": 1}, "label": 1}, {"features": {"b": 2}, "label": 0}]}
    check(service.post(f"{url}/examples", json=examples), 422, "items[1].features.b", "0 and 1")
    stream = service.registry.get("mixed")
    assert stream.space.names == []
    assert len(stream.pending) == 0
    assert [seat.learner.examples for seat in stream.seats] == [0, 0]
