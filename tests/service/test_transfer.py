"""Moving a stream between shards: export from one app, import into another (service/transfer.py).

The reference is the stream that did not move: the same requests sent to the source (which keeps
its copy) and to the imported copy must get the same answers and leave the same ledger,
comparison and description (a differential check against the unmoved copy, common practice for
a state transfer). Every learner kind is in the panel, with restarts, expired predictions,
alerts and waiting labels, so the document carries every part of a stream's state.
"""

from __future__ import annotations

import copy
import json
import random
import re
import sqlite3
from contextlib import closing
from pathlib import Path
from typing import Any

import httpx
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from service.app import create_app
from service.settings import Settings
from service.store import FILE_NAME
from service.transfer_checks import FORMAT, HEADER
from tests.service.conftest import MakeApp
from tests.service.harness import Clock, Running, running, served, with_text_prints

STREAM = "lockers-moving"
FLAGS = [f"f{i}" for i in range(8)]
PANEL = [
    {"name": "elim", "kind": "elimination", "negations": True},
    {"name": "perc", "kind": "perceptron", "margin": 0.25},
    {"name": "win", "kind": "winnow"},
    {"name": "wm", "kind": "weighted-majority"},
    {"name": "pa", "kind": "passive-aggressive"},
    {"name": "halv", "kind": "halving", "rules": [["f0"], ["f1"], ["f0", "f1"], ["!f2"], "true"]},
]
SPEC = {
    "stream": STREAM,
    "features": 16,
    "learners": PANEL,
    "serve": "perc",
    "label_wait_seconds": 100,
    "on_exceed": "restart",
}
NOISY = {13, 27, 44}  # labels flipped: elimination is contradicted, so it restarts
ADMIN = "transfer-admin-token-0123456789"
STREAM_TOKEN = "transfer-stream-token-0123456789"
VIEWS = ("", "/ledger", "/compare")
EXPORT = f"/v1/streams/{STREAM}/export"
IMPORT = "/v1/streams/import"


def truth(item: dict[str, int], noisy: bool = False) -> int:
    """The target is f0 or f1; a noisy label flips it."""
    return int(bool(item["f0"] or item["f1"])) ^ int(noisy)


def ok(response: Any, status: int = 200) -> Any:
    assert response.status_code == status, response.text
    return response.json()


def the_items() -> dict[str, dict[str, int]]:
    """Every item the tests send: predictions p*, q*, r*, labelled examples e*."""
    rng = random.Random(7)
    prefixes = [("p", 60), ("q", 30), ("r", 5), ("e", 15)]
    return {
        f"{p}{i}": {name: rng.randint(0, 1) for name in FLAGS}
        for p, n in prefixes
        for i in range(n)
    }


ITEMS = the_items()


def label(item_id: str) -> int:
    return truth(ITEMS[item_id], int(item_id[1:]) in NOISY and item_id[0] == "p")


def predict(ids: list[str]) -> dict[str, Any]:
    return {"items": [{"id": i, "features": ITEMS[i]} for i in ids]}


def labels(ids: list[str]) -> dict[str, Any]:
    return {"items": [{"id": i, "label": label(i)} for i in ids]}


def examples(ids: list[str]) -> dict[str, Any]:
    return {"items": [{"id": i, "features": ITEMS[i], "label": label(i)} for i in ids]}


def ids(prefix: str, start: int, stop: int) -> list[str]:
    return [f"{prefix}{i}" for i in range(start, stop)]


def before_the_move(api: Running, clock: Clock) -> None:
    """On the source: predictions that expire, labelled ones, waiting ones, labelled examples."""
    base = f"/v1/streams/{STREAM}"
    ok(api.post("/v1/streams", json=SPEC, headers={HEADER: STREAM}), 201)
    ok(api.post(f"{base}/predict", json=predict(ids("p", 0, 10))))
    clock.advance(150)  # past the label wait: p0..p9 expire
    for start in range(10, 60, 10):
        ok(api.post(f"{base}/predict", json=predict(ids("p", start, start + 10))))
        clock.advance(3)
    ok(api.post(f"{base}/feedback", json=labels(ids("p", 10, 40))))
    ok(api.post(f"{base}/examples", json=examples(ids("e", 0, 10))))
    clock.advance(5)


# (method, path under the stream, body, seconds the clock moves afterwards)
AFTER_THE_MOVE: list[tuple[str, str, Any, float]] = [
    # Labels sent again for ids labelled before the move: duplicates with the first outcome.
    ("POST", "/feedback", {"id": "p10", "label": label("p10")}, 1),
    ("POST", "/feedback", labels(ids("p", 10, 20)), 1),
    # A different label for one of them: a conflict; a label too late; an id never seen.
    ("POST", "/feedback", {"id": "p20", "label": 1 - label("p20")}, 0),
    ("POST", "/feedback", {"id": "p3", "label": 1}, 0),
    ("POST", "/feedback", {"id": "never-predicted", "label": 1}, 0),
    # A prediction asked again, and an id reused with other features.
    ("POST", "/predict", {"id": "p45", "features": ITEMS["p45"]}, 0),
    ("POST", "/predict", {"id": "p46", "features": {"f7": 0.5}}, 0),
    # Labels for the predictions made before the move.
    ("POST", "/feedback", labels(ids("p", 40, 60)), 2),
    ("POST", "/predict", predict(ids("q", 0, 30)), 4),
    ("POST", "/feedback", labels(ids("q", 0, 20)), 1),
    ("POST", "/examples", examples(["e0", *ids("e", 10, 15)]), 1),
    ("POST", "/examples", {"id": "e1", "features": ITEMS["e1"], "label": 1 - label("e1")}, 150),
    ("POST", "/feedback", {"id": "q25", "label": 1}, 0),  # expired on both
    ("POST", "/feedback", labels(["p12", "q3", "p41"]), 0),
    ("POST", "/predict", predict(ids("r", 0, 5)), 2),
    ("POST", "/feedback", labels(ids("r", 0, 5)), 0),
    ("GET", "/ledger", None, 0),
    ("GET", "/compare", None, 0),
    ("GET", "", None, 0),
]


def send(api: Running, step: tuple[str, str, Any, float]) -> Any:
    method, suffix, body, _ = step
    return api.request(method, f"/v1/streams/{STREAM}{suffix}", json=body)


def after_the_move(source: Running, target: Running, clock: Clock) -> list[Any]:
    """Send AFTER_THE_MOVE to both; each answer of the copy must be the source's."""
    answers = []
    for step in AFTER_THE_MOVE:
        a, b = send(source, step), send(target, step)
        assert (b.status_code, b.json()) == (a.status_code, a.json()), step
        answers.append(a)
        clock.advance(step[3])
    return answers


def views(api: Running) -> dict[str, Any]:
    return {suffix: ok(api.get(f"/v1/streams/{STREAM}{suffix}")) for suffix in VIEWS}


# -- the move ----------------------------------------------------------------------------------


def test_the_imported_copy_answers_as_the_source_would(
    make_app: MakeApp, clock: Clock, tmp_path: Path
) -> None:
    with running(make_app()) as source:
        before_the_move(source, clock)
        ledger = ok(source.get(f"/v1/streams/{STREAM}/ledger"))
        # The document has every part to carry: waiting and expired predictions, past epochs
        # and alerts (elimination was contradicted and restarted), history.
        assert ledger["pending"] == 20 and ledger["expired"] == 10
        elim = next(row for row in ledger["learners"] if row["name"] == "elim")
        assert elim["epochs"] and elim["alerts"] and elim["history"]
        exported = source.get(EXPORT)
        document = ok(exported)
        assert (document["format"], document["version"], document["stream"]) == (
            FORMAT,
            1,
            STREAM,
        )
        assert document["exported"] == clock.t and document["seq"] > 0

        with running(make_app(data_dir=tmp_path / "target")) as target:
            created = ok(
                target.post(IMPORT, content=exported.content, headers={HEADER: STREAM}), 201
            )
            assert created == ok(source.get(f"/v1/streams/{STREAM}"))
            assert views(target) == views(source)
            # The copy exports the very same document; only its place in the log differs.
            again = ok(target.get(EXPORT))
            assert {**again, "seq": 0} == {**document, "seq": 0}

            answers = after_the_move(source, target, clock)
            # The traffic met what it was meant to meet.
            assert answers[0].json()["status"] == "duplicate"
            assert {item["status"] for item in answers[1].json()["items"]} == {"duplicate"}
            assert [answers[i].status_code for i in (2, 3, 4)] == [409, 410, 404]
            assert answers[5].json()["duplicate"] is True and answers[6].status_code == 409
            assert {item["status"] for item in answers[7].json()["items"]} == {"applied"}
            assert [i["status"] for i in answers[10].json()["items"]][:2] == [
                "duplicate",
                "applied",
            ]
            assert answers[11].status_code == 409 and answers[12].status_code == 410
            final = views(source)
            assert final["/ledger"]["pending"] == 0 and final["/ledger"]["expired"] == 20
            assert views(target) == final

        # A restart of the importing app keeps the stream, its ledger and its remembered ids.
        with running(make_app(data_dir=tmp_path / "target")) as target:
            assert views(target) == final
            repeat = {"id": "r1", "label": label("r1")}
            there = ok(target.post(f"/v1/streams/{STREAM}/feedback", json=repeat))
            assert there["status"] == "duplicate"
            assert there == ok(source.post(f"/v1/streams/{STREAM}/feedback", json=repeat))


def test_a_document_with_text_prints_imports_and_answers_alike(
    make_app: MakeApp, clock: Clock, tmp_path: Path
) -> None:
    """A document whose state is of version 1 (text digests for prints, as written before
    version 2) imports, and the copy answers the traffic after the move as the source does."""
    with running(make_app()) as source:
        before_the_move(source, clock)
        document = ok(source.get(EXPORT))
        with_text_prints(document["state"], ITEMS.__getitem__)
        with running(make_app(data_dir=tmp_path / "target")) as target:
            ok(target.post(IMPORT, json=document, headers={HEADER: STREAM}), 201)
            assert views(target) == views(source)
            answers = after_the_move(source, target, clock)
            # Repeats and conflicts were told apart on the copy (see the test above).
            assert answers[5].json()["duplicate"] is True and answers[6].status_code == 409
            assert answers[11].status_code == 409
            assert views(target) == views(source)


def test_an_import_survives_a_crash_before_its_snapshot(
    make_app: MakeApp, clock: Clock, tmp_path: Path
) -> None:
    """The answer waits for the logged import event, which a restart replays."""
    with running(make_app()) as source:
        before_the_move(source, clock)
        document = source.get(EXPORT).content
        target_dir = tmp_path / "target"
        with running(make_app(data_dir=target_dir)) as target:
            target.registry._snapshot = lambda stream: None  # as if it crashed before any
            ok(target.post(IMPORT, content=document), 201)
        with closing(sqlite3.connect(target_dir / FILE_NAME)) as db:
            kinds = [json.loads(body)["type"] for (body,) in db.execute("SELECT body FROM events")]
            assert kinds == ["import"]
            assert db.execute("SELECT count(*) FROM snapshots").fetchone() == (0,)
        with running(make_app(data_dir=target_dir)) as target:
            assert views(target) == views(source)


def test_a_stream_that_exists_is_not_replaced(make_app: MakeApp, clock: Clock) -> None:
    with running(make_app(max_streams=2)) as api:
        before_the_move(api, clock)
        document = json.loads(api.get(EXPORT).content)
        seen = views(api)
        error = ok(api.post(IMPORT, json=document), 409)["error"]
        assert (error["field"], error["rule"], error["value"]) == (
            "stream",
            "a new stream id",
            STREAM,
        )
        assert views(api) == seen
        # The limit on streams holds for imports too.
        ok(api.post(IMPORT, json=renamed(document, "second")), 201)
        error = ok(api.post(IMPORT, json=renamed(document, "third")), 409)["error"]
        assert (error["field"], error["rule"]) == ("stream", "at most 2 streams")


def renamed(document: dict[str, Any], name: str) -> dict[str, Any]:
    out = copy.deepcopy(document)
    out["stream"] = out["state"]["config"]["stream"] = name
    return out


# -- documents that are refused ----------------------------------------------------------------


@pytest.fixture(scope="module")
def document(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    """An exported stream (the traffic above, on its own app)."""
    clock = Clock()
    settings_ = Settings.from_env({}, data_dir=tmp_path_factory.mktemp("source"))
    with running(create_app(settings_, clock=clock, registry=CollectorRegistry())) as api:
        before_the_move(api, clock)
        return bytes(api.get(EXPORT).content)


_STEP = re.compile(r"\.?([A-Za-z_][A-Za-z0-9_]*)|\[(\d+)\]")


def steps(path: str) -> list[str | int]:
    return [name if name else int(index) for name, index in _STEP.findall(path)]


def put(doc: Any, path: str, value: Any) -> None:
    *head, last = steps(path)
    for step in head:
        doc = doc[step]
    doc[last] = value


def drop(doc: Any, path: str) -> None:
    *head, last = steps(path)
    for step in head:
        doc = doc[step]
    del doc[last]


def first_labelled(doc: dict[str, Any]) -> int:
    return next(j for j, r in enumerate(doc["state"]["resolved"]) if r[1] == "labelled")


# (what is wrong, change to the parsed document or raw text, the field the 422 must name)
BAD: list[tuple[str, Any, str]] = [
    ("not JSON", b"{not json", "body"),
    ("not an object", b"[]", "body"),
    ("another format", lambda d: put(d, "format", "spreadsheet"), "format"),
    ("a later version", lambda d: put(d, "version", 2), "version"),
    ("no state", lambda d: drop(d, "state"), "state"),
    ("an unknown field", lambda d: put(d, "extra", 1), "extra"),
    ("a later state version", lambda d: put(d, "state.version", 3), "state.version"),
    ("a bad stream id", lambda d: put(d, "stream", "Not An Id"), "stream"),
    ("another stream", lambda d: put(d, "stream", "elsewhere"), "state.config.stream"),
    (
        "an unknown learner kind",
        lambda d: put(d, "state.config.learners[0].kind", "oracle"),
        "state.config.learners[0].kind",
    ),
    (
        "a parameter the learner refuses",
        lambda d: put(d, "state.config.learners[1].params.margin", -1),
        "state.config.learners[1].params.margin",
    ),
    (
        "a webhook outside the allow list",
        lambda d: put(d, "state.config.webhook", "http://127.0.0.1:9/hook"),
        "state.config.webhook",
    ),
    ("a seat missing", lambda d: drop(d, "state.seats[5]"), "state.seats"),
    ("a seat renamed", lambda d: put(d, "state.seats[0].name", "other"), "state.seats[0].name"),
    (
        "a learner state of another version",
        lambda d: put(d, "state.seats[1].learner.version", 99),
        "state.seats[1].learner.version",
    ),
    (
        "a learner state of another kind",
        lambda d: put(d, "state.seats[0].learner.kind", "winnow"),
        "state.seats[0].learner.kind",
    ),
    (
        "learned weights that are not numbers",
        lambda d: put(d, "state.seats[1].learner.learned.w", "heavy"),
        "state.seats[1].learner.learned.w",
    ),
    ("a vote of 2", lambda d: put(d, "state.pending[0][4][0]", 2), "state.pending[0][4][0]"),
    (
        "an unknown feature index",
        lambda d: put(d, "state.pending[0][2][0]", 999),
        "state.pending[0][2][0]",
    ),
    (
        "a value winnow cannot read",
        lambda d: put(d, "state.pending[0][3]", [5.0] * len(d["state"]["pending"][0][2])),
        "state.pending[0][3]",
    ),
    (
        "a prediction from an epoch to come",
        lambda d: put(d, "state.pending[0][5][0]", 99),
        "state.pending[0][5][0]",
    ),
    (
        "a prediction after the stream's time",
        lambda d: put(d, "state.pending[0][1]", d["state"]["last_t"] + 1),
        "state.pending[0][1]",
    ),
    (
        "an outstanding count that does not fit",
        lambda d: put(d, "state.seats[1].outstanding", d["state"]["seats"][1]["outstanding"] + 1),
        "state.seats[1].outstanding",
    ),
    (
        "an id both waiting and labelled",
        lambda d: put(d, "state.resolved[0][0]", d["state"]["pending"][0][0]),
        "state.resolved[0][0]",
    ),
    (
        "a labelled id without its label",
        lambda d: put(d, f"state.resolved[{first_labelled(d)}][4]", None),
        "state.resolved[{j}][4]",
    ),
    (
        "a short delay histogram",
        lambda d: put(d, "state.delay.buckets", [0]),
        "state.delay.buckets",
    ),
    ("another space size", lambda d: put(d, "state.space.size", 17), "state.space.size"),
    ("a negative count", lambda d: put(d, "state.counts.labels", -1), "state.counts.labels"),
    (
        "an alert at no time",
        lambda d: put(d, "state.seats[0].alerts[0].at", "yesterday"),
        "state.seats[0].alerts[0].at",
    ),
    ("NaN", "NaN", "state.created"),
    ("a header for another stream", "header", HEADER),
]


@pytest.mark.parametrize(("case", "change", "field"), BAD, ids=[case for case, _, _ in BAD])
def test_a_bad_document_is_refused_naming_the_field(
    make_app: MakeApp, document: bytes, case: str, change: Any, field: str
) -> None:
    doc = json.loads(document)
    headers = {}
    if isinstance(change, bytes):
        body = change
    elif change == "NaN":
        body = re.sub(rb'"created":[0-9.e+]+', b'"created":NaN', document)
        assert body != document
    elif change == "header":
        body, headers = document, {HEADER: "lockers-elsewhere"}
    else:
        change(doc)
        body = json.dumps(doc).encode()
        field = field.format(j=first_labelled(json.loads(document)))
    with running(make_app()) as api:
        error = ok(api.post(IMPORT, content=body, headers=headers), 422)["error"]
        assert error["field"] == field, (case, error)
        assert error["rule"] and error["message"], error
        assert ok(api.get("/v1/streams")) == {"streams": []}


def test_refused_documents_leave_nothing_in_the_store(
    make_app: MakeApp, document: bytes, data_dir: Path
) -> None:
    with running(make_app()) as api:
        for _, change, _ in BAD:
            if callable(change):
                doc = json.loads(document)
                change(doc)
                assert api.post(IMPORT, json=doc).status_code == 422
    with closing(sqlite3.connect(data_dir / FILE_NAME)) as db:
        assert db.execute("SELECT count(*) FROM events").fetchone() == (0,)
        assert db.execute("SELECT count(*) FROM snapshots").fetchone() == (0,)
    with running(make_app()) as api:
        assert ok(api.get("/v1/streams")) == {"streams": []}


def test_an_import_has_its_own_size_limit(make_app: MakeApp, document: bytes) -> None:
    assert len(document) > 4096
    with running(make_app(max_body_bytes=4096, max_import_bytes=len(document))) as api:
        ok(api.post(IMPORT, content=document), 201)  # larger than any other body may be
    with running(make_app(max_import_bytes=len(document) - 1)) as api:
        api.delete(f"/v1/streams/{STREAM}")
        error = ok(api.post(IMPORT, content=document), 413)["error"]
        assert (error["field"], error["rule"]) == ("body", f"at most {len(document) - 1} bytes")
        assert ok(api.get("/v1/streams")) == {"streams": []}


# -- the header the sharding proxy routes by, and tokens ---------------------------------------


def test_a_create_whose_header_names_another_stream_is_refused(service: Running) -> None:
    body = {
        "stream": "lockers-east",
        "features": 4,
        "learners": [{"name": "p", "kind": "perceptron"}],
    }
    error = ok(service.post("/v1/streams", json=body, headers={HEADER: "lockers-west"}), 422)
    assert error["error"]["field"] == HEADER
    assert error["error"]["rule"] == "equal to the body's 'stream'"
    assert error["error"]["value"] == "lockers-west"
    assert ok(service.get("/v1/streams")) == {"streams": []}
    ok(service.post("/v1/streams", json=body, headers={HEADER: "lockers-east"}), 201)
    ok(service.post("/v1/streams", json={**body, "stream": "lockers-south"}), 201)  # no header


def test_only_the_admin_token_moves_streams(make_app: MakeApp, clock: Clock) -> None:
    tokens = {"admin_token": ADMIN, "stream_tokens": {STREAM_TOKEN: ["lockers-*"]}}
    with running(make_app(**tokens), token=ADMIN) as admin:
        before_the_move(admin, clock)
        document = admin.get(EXPORT).content
        scoped = admin.with_token(STREAM_TOKEN)
        assert scoped.get(f"/v1/streams/{STREAM}/ledger").status_code == 200  # its stream
        for response in (scoped.get(EXPORT), scoped.post(IMPORT, content=document)):
            error = ok(response, 403)["error"]
            assert (error["field"], error["rule"]) == ("Authorization", "admin token")
        anonymous = admin.with_token(None)
        assert anonymous.get(EXPORT).status_code == 401
        assert anonymous.post(IMPORT, content=document).status_code == 401
        ok(admin.delete(f"/v1/streams/{STREAM}"))
        ok(admin.post(IMPORT, content=document), 201)


# -- any change to a document: refused with the error shape, or a stream that works ------------


def nodes(value: Any, path: str = "") -> list[str]:
    out = [path] if path else []
    if isinstance(value, dict):
        for key, inner in value.items():
            out += nodes(inner, f"{path}.{key}" if path else key)
    elif isinstance(value, list):
        for index, inner in enumerate(value):
            out += nodes(inner, f"{path}[{index}]")
    return out


def get(doc: Any, path: str) -> Any:
    for step in steps(path):
        doc = doc[step]
    return doc


SCALARS = (
    st.none()
    | st.booleans()
    | st.integers(-3, 3)
    | st.sampled_from([2**53, 2**64, -(2**63)])
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=4)
)
VALUES = st.recursive(
    SCALARS,
    lambda inner: (
        st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=3), inner, max_size=2)
    ),
    max_leaves=5,
)


@st.composite
def changed(draw: st.DrawFn, document: bytes) -> tuple[str, bytes]:
    doc = json.loads(document)
    # A part of the document first (state.pending, state.seats[2].learner, ...), then a node in
    # it: the long lists (history, remembered ids) would otherwise take most of the draws.
    groups: dict[str, list[str]] = {}
    for path in nodes(doc):
        part = ".".join(re.sub(r"\[\d+\]", "", path).split(".")[:3])
        groups.setdefault(part, []).append(path)
    part = draw(st.sampled_from(sorted(groups)))
    path = draw(st.sampled_from(groups[part]))
    old = get(doc, path)
    options = [VALUES, st.just("<drop>")]
    if isinstance(old, int | float) and not isinstance(old, bool):
        options.insert(0, st.sampled_from([old + 1, old - 1, -old, old * 2, 0]))
    new = draw(st.one_of(*options))
    if new == "<drop>":
        drop(doc, path)
    else:
        put(doc, path, new)
    return f"{path} = {new!r}", json.dumps(doc, allow_nan=True).encode()


def exercise(api: Running, doc: dict[str, Any]) -> None:
    """Every kind of request on an accepted stream must be answered without a server error."""
    name = doc["stream"]
    base = f"/v1/streams/{name}"
    known = [entry[0] for entry in doc["state"]["pending"] + doc["state"]["resolved"]]
    calls: list[tuple[str, str, Any]] = [
        ("POST", f"{base}/predict", {"items": [{"id": "fresh", "features": ["f0", "f9"]}]}),
        ("POST", f"{base}/predict", {"id": known[0], "features": ITEMS.get(known[0], {})}),
        ("POST", f"{base}/feedback", {"items": [{"id": i, "label": 1} for i in known]}),
        ("POST", f"{base}/feedback", {"items": [{"id": i, "label": 0} for i in known]}),
        ("POST", f"{base}/examples", {"items": [{"features": {"f1": 1, "f3": 1}, "label": 1}]}),
        ("GET", f"{base}/ledger", None),
        ("GET", f"{base}/compare", None),
        ("GET", base, None),
        ("GET", f"{base}/export", None),
        ("GET", "/metrics", None),
    ]
    for method, path, body in calls:
        response = api.request(method, path, json=body)
        assert response.status_code < 500, (method, path, response.text)


@given(data=st.data())
@settings(
    max_examples=150,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
def test_a_changed_document_is_refused_or_makes_a_working_stream(
    service: Running, document: bytes, data: st.DataObject
) -> None:
    what, body = data.draw(changed(document))
    response = service.post(IMPORT, content=body)
    assert response.status_code in (201, 422), (what, response.text)
    if response.status_code == 422:
        error = response.json()["error"]
        assert error["field"] and error["rule"] and error["message"], (what, error)
        assert ok(service.get("/v1/streams")) == {"streams": []}, what
        return
    doc = json.loads(body)
    exercise(service, doc)
    ok(service.delete(f"/v1/streams/{doc['stream']}"))


# -- the command line, against two services on loopback ---------------------------------------


@pytest.mark.slow
def test_export_and_import_commands_move_a_stream(
    make_app: MakeApp, clock: Clock, tmp_path: Path
) -> None:
    from service.cli import main

    with running(make_app()) as local:
        before_the_move(local, clock)
    source_app, target_app = make_app(), make_app(data_dir=tmp_path / "target")
    with served(source_app) as old, served(target_app) as new:
        runner = CliRunner()
        exported = runner.invoke(main, ["export", STREAM, "--url", old])
        assert exported.exit_code == 0, exported.output
        document = json.loads(exported.stdout)
        assert document["stream"] == STREAM and document["format"] == FORMAT
        assert (
            f"stream {STREAM!r}: seq {document['seq']}, 20 waiting predictions" in exported.stderr
        )
        path = tmp_path / "moving.json"
        path.write_text(exported.stdout)
        imported = runner.invoke(main, ["import", str(path), "--url", new])
        assert imported.exit_code == 0, imported.output
        assert f"imported into {new}" in imported.output
        for suffix in VIEWS:
            there = httpx.get(f"{new}/v1/streams/{STREAM}{suffix}").json()
            assert there == httpx.get(f"{old}/v1/streams/{STREAM}{suffix}").json()
        # Importing it again is refused, and the error reaches the operator with its field.
        again = runner.invoke(main, ["import", str(path), "--url", new])
        assert again.exit_code == 1 and "409" in again.output and "exists" in again.output
        missing = runner.invoke(main, ["export", "no-such-stream", "--url", old])
        assert missing.exit_code == 1 and "404" in missing.output
