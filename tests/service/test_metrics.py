"""/metrics, parsed with prometheus_client's own text parser, agrees with the ledger."""

from __future__ import annotations

from typing import Any

from prometheus_client.parser import text_string_to_metric_families

from tests.service.conftest import MakeApp
from tests.service.harness import Clock, Running, running
from tests.service.test_durability import create, drive

# DESIGN.md (Metrics); Prometheus naming (metric and label naming documentation): a common
# prefix, snake_case, `_total` on counters, base units (`_seconds`).
CONTRACT = {
    "mistake_ledger_predictions": "counter",
    "mistake_ledger_feedback": "counter",
    "mistake_ledger_feedback_duplicates": "counter",
    "mistake_ledger_feedback_conflicts": "counter",
    "mistake_ledger_predictions_expired": "counter",
    "mistake_ledger_served_mistakes": "counter",
    "mistake_ledger_updates": "counter",
    "mistake_ledger_alerts": "counter",
    "mistake_ledger_update_ceiling": "gauge",
    "mistake_ledger_served_ceiling": "gauge",
    "mistake_ledger_ceiling_count": "gauge",
    "mistake_ledger_learner_state": "gauge",
    "mistake_ledger_pending_predictions": "gauge",
    "mistake_ledger_label_delay_seconds": "histogram",
}


STANDARD = ("process_", "python_info", "python_gc_")


def scrape(service: Running) -> dict[str, dict[tuple[tuple[str, str], ...], float]]:
    """{sample name: {sorted labels: value}} from the text format."""
    # Reference parser: prometheus_client.parser (Prometheus exposition format, text-based).
    text = service.get("/metrics").text
    out: dict[str, dict[tuple[tuple[str, str], ...], float]] = {}
    for family in text_string_to_metric_families(text):
        if not family.name.startswith("mistake_ledger_"):
            # The client library's standard process, platform and gc metrics (prometheus_client).
            assert family.name.startswith(STANDARD), family.name
            continue
        assert CONTRACT.get(family.name) == family.type, family.name
        for sample in family.samples:
            out.setdefault(sample.name, {})[tuple(sorted(sample.labels.items()))] = sample.value
    return out


def value(samples: dict[str, Any], name: str, **labels: str) -> float | None:
    return samples.get(name, {}).get(tuple(sorted(labels.items())))


def test_metrics_match_the_ledger(service: Running, clock: Clock) -> None:
    create(service, "north", on_exceed="restart")
    drive(service, clock, "north", seed=7, steps=250)
    # A duplicate and a conflict, counted since start.
    service.post("/v1/streams/north/predict", json={"id": "dup", "features": ["f1"]})
    service.post("/v1/streams/north/feedback", json={"id": "dup", "label": 1})
    service.post("/v1/streams/north/feedback", json={"id": "dup", "label": 1})
    service.post("/v1/streams/north/feedback", json={"id": "dup", "label": 0})
    samples = scrape(service)
    assert set(CONTRACT) <= {name.removesuffix("_total") for name in samples} | {
        n for n in CONTRACT if n.endswith("_seconds")
    }
    ledger = service.get("/v1/streams/north/ledger").json()
    stream = service.registry.get("north")
    s = {"stream": "north"}
    assert value(samples, "mistake_ledger_predictions_total", **s) == stream.counts["predictions"]
    assert value(samples, "mistake_ledger_feedback_total", **s) == stream.counts["labels"]
    assert value(samples, "mistake_ledger_feedback_duplicates_total", **s) >= 1
    assert value(samples, "mistake_ledger_feedback_conflicts_total", **s) >= 1
    assert value(samples, "mistake_ledger_predictions_expired_total", **s) == ledger["expired"]
    assert value(samples, "mistake_ledger_pending_predictions", **s) == ledger["pending"]
    assert ledger["expired"] > 0
    alerts_seen = 0
    for row in ledger["learners"]:
        who = {**s, "learner": row["name"]}
        epochs = row["epochs"]
        # Counters run over all epochs; the ledger keeps each past epoch's counts.
        served = row["served_mistakes"] + sum(e["served_mistakes"] for e in epochs)
        updates = row["updates"] + sum(e["updates"] for e in epochs)
        assert value(samples, "mistake_ledger_served_mistakes_total", **who) == served
        assert value(samples, "mistake_ledger_updates_total", **who) == updates
        assert value(samples, "mistake_ledger_update_ceiling", **who) == row["ceiling"]["value"]
        assert value(samples, "mistake_ledger_served_ceiling", **who) == row["served_ceiling"]
        counted = row["updates"] if row["ceiling"]["counts"] == "updates" else row["mistakes"]
        assert value(samples, "mistake_ledger_ceiling_count", **who) == counted
        for state in ("within", "near", "exceeded", "contradicted"):
            shown = value(samples, "mistake_ledger_learner_state", **who, state=state)
            assert shown == (1.0 if row["state"] == state else 0.0)
        for state in ("exceeded", "contradicted"):
            raised = sum(1 for a in row["alerts"] if a["state"] == state)
            assert value(samples, "mistake_ledger_alerts_total", **who, state=state) == raised
            alerts_seen += raised
    assert alerts_seen > 0  # the noisy stream contradicts the conjunction learners
    # Prometheus exposition format (histograms): the le="+Inf" bucket equals _count.
    count = value(samples, "mistake_ledger_label_delay_seconds_count", **s)
    assert count == stream.counts["labels"]
    assert value(samples, "mistake_ledger_label_delay_seconds_bucket", **s, le="+Inf") == count


def test_label_delay_buckets(service: Running, clock: Clock) -> None:
    create(service, "north")
    url = "/v1/streams/north"
    for i, delay in enumerate([0, 5, 5, 30]):
        service.post(f"{url}/predict", json={"id": f"d{i}", "features": ["f1"]})
        clock.advance(delay)
        service.post(f"{url}/feedback", json={"id": f"d{i}", "label": 0})
    samples = scrape(service)
    s = {"stream": "north"}
    bucket = "mistake_ledger_label_delay_seconds_bucket"
    # Worked by hand, cumulative buckets (Prometheus exposition format): delays 0, 5, 5, 30 give
    # le=1: 1, le=10: 3, le=60: 4; sum 0 + 5 + 5 + 30 = 40.
    assert value(samples, bucket, **s, le="1.0") == 1
    assert value(samples, bucket, **s, le="10.0") == 3
    assert value(samples, bucket, **s, le="60.0") == 4
    assert value(samples, "mistake_ledger_label_delay_seconds_sum", **s) == 40


# DESIGN.md (Metrics): allow turning the stream label off; series then sum over streams.
def test_the_stream_label_can_be_turned_off(make_app: MakeApp, clock: Clock) -> None:
    with running(make_app(metrics_stream_label=False)) as service:
        create(service, "north")
        create(service, "south")
        drive(service, clock, "north", seed=8, steps=60)
        drive(service, clock, "south", seed=9, steps=60)
        samples = scrape(service)
        assert all("stream" not in dict(labels) for per in samples.values() for labels in per)
        north = service.registry.get("north")
        south = service.registry.get("south")
        total = north.counts["predictions"] + south.counts["predictions"]
        assert value(samples, "mistake_ledger_predictions_total") == total
        for i, seat in enumerate(north.seats):
            both = seat.total_updates + south.seats[i].total_updates
            assert value(samples, "mistake_ledger_updates_total", learner=seat.name) == both
            states = [
                value(samples, "mistake_ledger_learner_state", learner=seat.name, state=st)
                for st in ("within", "near", "exceeded", "contradicted")
            ]
            assert sum(s or 0 for s in states) == 2  # one learner of that name per stream


# Removing a deleted object's series (bounded cardinality): common practice.
def test_a_deleted_stream_leaves_the_metrics(service: Running) -> None:
    create(service, "north")
    assert value(scrape(service), "mistake_ledger_pending_predictions", stream="north") == 0
    service.delete("/v1/streams/north")
    assert value(scrape(service), "mistake_ledger_pending_predictions", stream="north") is None
