"""The HTTP round trip on small streams whose counts are worked out by hand."""

from __future__ import annotations

from typing import Any

from tests.service.conftest import MakeApp
from tests.service.harness import Clock, Running, running

FLAGS = ["a", "b", "c", "d"]

# A realizable stream for monotone elimination over the closed space {a, b, c, d} whose labels
# are the conjunction "a and b". Worked by hand from the elimination rule (Valiant 1984, CACM
# 27(11): start with every flag required, on a false negative keep only the flags that are on):
#   1. {a,b,c}   label 1: all 4 flags required, predicts 0 -> update 1, required {a,b,c}
#   2. {a,b,d}   label 1: c is off, predicts 0            -> update 2, required {a,b}
#   3. {a,c}     label 0: b is off, predicts 0            -> correct
#   4. {a,b}     label 1: predicts 1                      -> correct
#   5. {b,c,d}   label 0: a is off, predicts 0            -> correct
#   6. {a,b,c,d} label 1: predicts 1                      -> correct
# Updates: 2. The live ceiling is min(n, updates + |required|) = min(4, 2 + 2) = 4.
STREAM = [
    (["a", "b", "c"], 1),
    (["a", "b", "d"], 1),
    (["a", "c"], 0),
    (["a", "b"], 1),
    (["b", "c", "d"], 0),
    (["a", "b", "c", "d"], 1),
]


def create(service: Running, name: str = "lockers-north", **extra: Any) -> dict[str, Any]:
    body = {
        "stream": name,
        "features": FLAGS,
        "learners": [{"name": "elim", "kind": "elimination"}],
        **extra,
    }
    response = service.post("/v1/streams", json=body)
    assert response.status_code == 201, response.text
    return dict(response.json())


def learner(ledger: dict[str, Any], name: str = "elim") -> dict[str, Any]:
    return next(row for row in ledger["learners"] if row["name"] == name)


def test_labels_right_after_each_answer_give_the_worked_count(service: Running) -> None:
    create(service)
    answers = []
    for position, (flags, label) in enumerate(STREAM):
        answer = service.post(
            "/v1/streams/lockers-north/predict", json={"id": f"i{position}", "features": flags}
        ).json()
        answers.append(answer["label"])
        result = service.post(
            "/v1/streams/lockers-north/feedback", json={"id": f"i{position}", "label": label}
        ).json()
        assert result["status"] == "applied"
    # Served answers follow the worked sequence: 0, 0 (the two updates), then all correct.
    # Worked by hand above (elimination rule, THEORY.md: Conjunctions).
    assert answers == [0, 0, 0, 1, 0, 1]
    ledger = service.get("/v1/streams/lockers-north/ledger").json()
    row = learner(ledger)
    assert row["updates"] == 2
    assert row["served_mistakes"] == 2
    assert row["mistakes"] == 2
    assert row["examples"] == 6
    assert row["ceiling"]["value"] == 4
    assert row["ceiling"]["counts"] == "updates"
    # No label was outstanding at either update: G = 0, served ceiling (1 + 0) * 4.
    # THEORY.md: Delayed labels, served <= (1 + G) U.
    assert row["max_outstanding"] == 0
    assert row["served_ceiling"] == 4
    assert row["state"] == "within"
    assert ledger["pending"] == 0 and ledger["expired"] == 0


def test_delayed_labels_count_served_mistakes_and_outstanding_labels(service: Running) -> None:
    create(service)
    batch = [{"id": f"i{p}", "features": flags} for p, (flags, _) in enumerate(STREAM)]
    answers = service.post("/v1/streams/lockers-north/predict", json={"items": batch}).json()
    # Every item is answered by the initial hypothesis (all four flags): only item 6 is a 1.
    assert [a["label"] for a in answers["items"]] == [0, 0, 0, 0, 0, 1]
    assert all(a["served_by"] == "elim" and not a["duplicate"] for a in answers["items"])
    labels = [{"id": f"i{p}", "label": label} for p, (_, label) in enumerate(STREAM)]
    results = service.post("/v1/streams/lockers-north/feedback", json={"items": labels}).json()
    assert [r["status"] for r in results["items"]] == ["applied"] * 6
    assert [r["learners"]["elim"]["updated"] for r in results["items"]] == [
        True, True, False, False, False, False,
    ]  # fmt: skip
    row = learner(service.get("/v1/streams/lockers-north/ledger").json())
    # Worked by hand; bound from THEORY.md: Delayed labels, served <= (1 + G) U.
    # Served mistakes: items 1, 2 and 4 (label 1, answered 0). Updates: still 2, as labelled in
    # the same order. At update 1, 5 other predictions waited; at update 2, 4: G = 5.
    assert row["served_mistakes"] == 3
    assert row["updates"] == 2
    assert row["max_outstanding"] == 5
    assert row["served_ceiling"] == (1 + 5) * 4
    history = row["history"]
    assert [p["updates"] for p in history][-1] == 2
    assert [p["served_mistakes"] for p in history][-1] == 3


def test_examples_teach_every_learner_without_served_mistakes(service: Running) -> None:
    create(service)
    items = [{"id": f"e{p}", "features": f, "label": y} for p, (f, y) in enumerate(STREAM)]
    results = service.post("/v1/streams/lockers-north/examples", json={"items": items}).json()
    assert [r["status"] for r in results["items"]] == ["applied"] * 6
    row = learner(service.get("/v1/streams/lockers-north/ledger").json())
    # Worked by hand (2 updates, above); DESIGN.md (Accounting): a served mistake needs
    # a served answer, and examples have none.
    assert (row["updates"], row["served_mistakes"], row["examples"]) == (2, 0, 6)
    # The learned conjunction now answers "a and b".
    answer = service.post("/v1/streams/lockers-north/predict", json={"features": ["a", "b"]})
    assert answer.json()["label"] == 1
    # DESIGN.md (Feedback rules): the same id and label again is a duplicate.
    again = service.post("/v1/streams/lockers-north/examples", json=items[0]).json()
    assert again["status"] == "duplicate"


def test_every_learner_votes_and_the_serving_one_answers(service: Running) -> None:
    body = {
        "stream": "panel",
        "features": ["a", "b"],
        "learners": [
            {"name": "mono", "kind": "elimination"},
            {"name": "neg", "kind": "elimination", "negations": True},
        ],
        "serve": "neg",
    }
    assert service.post("/v1/streams", json=body).status_code == 201
    # THEORY.md (Conjunctions): elimination starts with all n variables, or all 2n literals.
    # DESIGN.md (Accounting): every learner votes, the serving learner answers.
    # Before any update: monotone requires every flag (predicts 1 on {a, b}); with negations
    # the hypothesis holds every literal and is always false (predicts 0).
    answer = service.post("/v1/streams/panel/predict", json={"features": ["a", "b"]}).json()
    assert answer["votes"] == {"mono": 1, "neg": 0}
    assert answer["label"] == 0 and answer["served_by"] == "neg"


def test_stream_management(service: Running, clock: Clock) -> None:
    description = create(service, label_wait_seconds=60, near=0.5)
    assert description["serve"] == "elim"
    assert description["label_wait_seconds"] == 60
    assert description["known_features"] == 4
    again = service.post(
        "/v1/streams",
        json={
            "stream": "lockers-north",
            "features": 3,
            "learners": [{"name": "x", "kind": "elimination"}],
        },
    )
    assert again.status_code == 409  # RFC 9110 §15.5.10: 409 Conflict (name taken)
    assert again.json()["error"]["field"] == "stream"
    create(service, "lockers-south")
    listed = service.get("/v1/streams").json()["streams"]
    assert [s["stream"] for s in listed] == ["lockers-north", "lockers-south"]
    assert service.get("/v1/streams/lockers-south").json()["stream"] == "lockers-south"
    assert service.delete("/v1/streams/lockers-south").status_code == 200
    # RFC 9110 §15.5.5: 404 Not Found once the stream is deleted.
    assert service.get("/v1/streams/lockers-south").status_code == 404
    assert service.post("/v1/streams/lockers-south/predict", json={"features": []}).status_code == (
        404
    )
    # The name is free again, and the new stream starts empty.
    create(service, "lockers-south")
    ledger = service.get("/v1/streams/lockers-south/ledger").json()
    assert learner(ledger)["examples"] == 0


def test_health_and_readiness(service: Running) -> None:
    # Liveness and readiness probes: common practice.
    # OpenAPI from the schemas: DESIGN.md (Interfaces).
    assert service.get("/healthz").json() == {"status": "alive"}
    assert service.get("/readyz").json()["status"] == "ready"
    schema = service.get("/openapi.json").json()
    assert "/v1/streams/{stream}/predict" in schema["paths"]


def test_history_stays_short(make_app: MakeApp) -> None:
    with running(make_app(history_points=8)) as service:
        body = {"stream": "h", "features": 1, "learners": [{"name": "p", "kind": "perceptron"}]}
        service.post("/v1/streams", json=body)
        # The same item labelled 1, 0, 1, ... updates the perceptron every time. Worked by hand:
        # from w = 0 a label 1 gives w = x, then label 0 sees w . x = |x|^2 > 0, wrong, w = 0 again.
        # A short history for plots: DESIGN.md (Words, ledger).
        items = [{"features": ["a"], "label": i % 2} for i in range(1, 41)]
        service.post("/v1/streams/h/examples", json={"items": items})
        row = learner(service.get("/v1/streams/h/ledger").json(), "p")
        assert row["updates"] == 40
        assert 2 <= len(row["history"]) <= 8
        assert row["history"][-1]["updates"] == 40  # the newest point is always kept
        times = [p["labels"] for p in row["history"]]
        assert times == sorted(times)
