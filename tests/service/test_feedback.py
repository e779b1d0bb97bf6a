"""Feedback rules: idempotent, conflicts change nothing, unknown and expired ids are told apart."""

from __future__ import annotations

from typing import Any

from tests.service.harness import Clock, Running

URL = "/v1/streams/gate"


def setup(service: Running, wait: float = 3600.0) -> None:
    body = {
        "stream": "gate",
        "features": ["a", "b", "c"],
        "learners": [{"name": "elim", "kind": "elimination"}],
        "label_wait_seconds": wait,
    }
    assert service.post("/v1/streams", json=body).status_code == 201


def ledger(service: Running) -> dict[str, Any]:
    return dict(service.get(f"{URL}/ledger").json())


# DESIGN.md (Feedback rules): idempotent; the same id and label again changes nothing.
def test_same_label_twice_is_a_duplicate_and_counts_once(service: Running) -> None:
    setup(service)
    service.post(f"{URL}/predict", json={"id": "p1", "features": ["a", "b"]})
    first = service.post(f"{URL}/feedback", json={"id": "p1", "label": 1})
    assert first.json()["status"] == "applied"
    before = ledger(service)
    second = service.post(f"{URL}/feedback", json={"id": "p1", "label": True})
    assert second.status_code == 200
    assert second.json()["status"] == "duplicate"
    # The duplicate reports what the original did.
    assert second.json()["learners"] == first.json()["learners"]
    assert ledger(service) == before
    assert before["learners"][0]["updates"] == 1


def test_a_different_label_is_a_conflict_and_changes_nothing(service: Running) -> None:
    setup(service)
    service.post(f"{URL}/predict", json={"id": "p1", "features": ["a"]})
    service.post(f"{URL}/feedback", json={"id": "p1", "label": 1})
    before = ledger(service)
    response = service.post(f"{URL}/feedback", json={"id": "p1", "label": 0})
    # DESIGN.md (Feedback rules); RFC 9110 §15.5.10: 409 Conflict.
    assert response.status_code == 409
    error = response.json()["error"]
    assert (error["field"], error["value"]) == ("label", 0)
    assert ledger(service) == before


def test_unknown_id_is_404(service: Running) -> None:
    setup(service)
    response = service.post(f"{URL}/feedback", json={"id": "never", "label": 1})
    assert response.status_code == 404  # RFC 9110 §15.5.5: 404 Not Found
    assert response.json()["error"]["field"] == "id"
    assert response.json()["error"]["value"] == "never"


def test_a_label_after_the_wait_is_410_and_the_expiry_is_counted(
    service: Running, clock: Clock
) -> None:
    setup(service, wait=60)
    service.post(f"{URL}/predict", json={"id": "late", "features": ["a"]})
    service.post(f"{URL}/predict", json={"id": "kept", "features": ["b"]})
    clock.advance(30)
    service.post(f"{URL}/predict", json={"id": "young", "features": ["c"]})
    clock.advance(30)  # "late" and "kept" waited exactly 60 s: expired; "young" 30 s
    view = ledger(service)
    # DESIGN.md (Feedback rules): expiry is counted, never silent.
    assert (view["pending"], view["expired"]) == (1, 2)
    response = service.post(f"{URL}/feedback", json={"id": "late", "label": 1})
    assert response.status_code == 410  # RFC 9110 §15.5.11: 410 Gone
    assert response.json()["error"]["value"] == "late"
    assert service.post(f"{URL}/feedback", json={"id": "young", "label": 0}).status_code == 200
    # DESIGN.md (Feedback rules): a label may come back as a labelled example.
    # The expired prediction can still teach, as a labelled example with its features.
    example = service.post(f"{URL}/examples", json={"features": ["a"], "label": 1})
    assert example.status_code == 200
    view = ledger(service)
    assert (view["pending"], view["expired"]) == (0, 2)
    assert view["learners"][0]["examples"] == 2


def test_the_sweeper_expires_without_requests(service: Running, clock: Clock) -> None:
    setup(service, wait=10)
    service.post(f"{URL}/predict", json={"id": "p", "features": ["a"]})
    clock.advance(11)
    service.registry.sweep()
    stream = service.registry.get("gate")
    # DESIGN.md (Feedback rules): predictions wait up to a set time; expiry is counted.
    assert (len(stream.pending), stream.counts["expired"]) == (0, 1)


def test_batch_feedback_reports_each_item_in_order(service: Running, clock: Clock) -> None:
    setup(service, wait=60)
    service.post(
        f"{URL}/predict",
        json={
            "items": [
                {"id": "x", "features": ["a"]},
                {"id": "y", "features": ["b"]},
                {"id": "old", "features": ["c"]},
            ]
        },
    )
    service.post(f"{URL}/feedback", json={"id": "y", "label": 0})
    clock.advance(59)
    service.post(f"{URL}/predict", json={"id": "z", "features": ["a", "b"]})
    clock.advance(1)  # x, y's memory and old expire or age; z waits
    response = service.post(
        f"{URL}/feedback",
        json={
            "items": [
                {"id": "z", "label": 1},
                {"id": "z", "label": 1},
                {"id": "z", "label": 0},
                {"id": "nobody", "label": 1},
                {"id": "old", "label": 1},
            ]
        },
    )
    assert response.status_code == 200
    # DESIGN.md (Feedback rules), applied in order: applied, duplicate, conflict, unknown, expired.
    statuses = [r["status"] for r in response.json()["items"]]
    assert statuses == ["applied", "duplicate", "conflict", "unknown", "expired"]


def test_predict_with_a_known_id_returns_the_stored_answer(service: Running) -> None:
    setup(service)
    first = service.post(f"{URL}/predict", json={"id": "p", "features": {"a": 1, "b": 1}}).json()
    # Idempotent retries with a client id: common practice. DESIGN.md (Features): a list of
    # flags and a mapping with value 1 are the same item.
    again = service.post(f"{URL}/predict", json={"id": "p", "features": ["b", "a"]}).json()
    assert again == {**first, "duplicate": True}
    assert ledger(service)["pending"] == 1
    other = service.post(f"{URL}/predict", json={"id": "p", "features": ["c"]})
    assert other.status_code == 409  # RFC 9110 §15.5.10: 409 Conflict (id reused)
    assert other.json()["error"]["field"] == "id"
    # After its label, a retry still gets the stored answer, and nothing is counted twice.
    service.post(f"{URL}/feedback", json={"id": "p", "label": 1})
    assert service.post(f"{URL}/predict", json={"id": "p", "features": ["a", "b"]}).json()[
        "duplicate"
    ]
    stream = service.registry.get("gate")
    assert stream.counts["predictions"] == 1


def test_ids_without_a_client_id_are_generated_and_unique(service: Running) -> None:
    setup(service)
    items = [{"features": ["a"]} for _ in range(5)]
    answers = service.post(f"{URL}/predict", json={"items": items}).json()["items"]
    ids = {a["id"] for a in answers}  # unique server-made ids: common practice
    assert len(ids) == 5
    assert ledger(service)["pending"] == 5


def test_an_example_may_not_reuse_a_waiting_prediction_id(service: Running) -> None:
    setup(service)
    service.post(f"{URL}/predict", json={"id": "p", "features": ["a"]})
    response = service.post(f"{URL}/examples", json={"id": "p", "features": ["a"], "label": 1})
    assert response.status_code == 409  # RFC 9110 §15.5.10: 409 Conflict
    assert ledger(service)["learners"][0]["examples"] == 0
