"""Prometheus metrics, read from the streams' ledgers at scrape time.

A collector registered on the :class:`prometheus_client.CollectorRegistry` passed to
``create_app`` (never the process-wide one) reads every stream under its lock when scraped, so the
metrics always agree with the ledger, survive a restart exactly as the ledger does, and vanish
with a deleted stream. Names (prefix ``mistake_ledger_``, base units, ``_total`` for counters)::

    counters   predictions_total{stream}            predictions answered (not duplicates)
               feedback_total{stream}               labels applied
               feedback_duplicates_total{stream}    labels repeated for an id (since start)
               feedback_conflicts_total{stream}     labels against an earlier one (since start)
               predictions_expired_total{stream}    predictions whose label never came in time
               served_mistakes_total{stream,learner}  votes that differed from the label, all epochs
               updates_total{stream,learner}        learner updates, all epochs
               alerts_total{stream,learner,state}   alerts raised (state: exceeded, contradicted)
    gauges     update_ceiling{stream,learner}       U of the current epoch (absent: none claimed)
               served_ceiling{stream,learner}       (1 + G) U (absent when it does not apply)
               ceiling_count{stream,learner}        the quantity U bounds (updates or mistakes)
               learner_state{stream,learner,state}  1 for the current state, 0 for the others
               pending_predictions{stream}          predictions waiting for a label
    histogram  label_delay_seconds{stream}          time from predict to label

Cardinality: with the stream label, each stream exports 21 series of its own (5 counters, the
pending gauge, and 15 for the histogram: 13 buckets, sum and count) and each learner 11 (2
counters, 3 ceiling gauges, 2 alert states, 4 states), so S streams of L learners make
S * (21 + 11 L) series: 1000 streams of 4 learners are 65,000. With ``metrics_stream_label`` off
every family drops the stream label (21 + 11 * distinct learner names in all): counters, pending
and the histogram are sums over streams, the learner families are summed by learner name
(``learner_state`` then counts the learners in each state, the form to alert on; the ceiling
gauges are sums and only meaningful beside ``ceiling_count`` summed the same way).
The duplicate and conflict counters are not replayed: they count since the process started.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Iterator
from typing import Any

from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
    Metric,
)
from prometheus_client.registry import Collector

from service.accounting import finite_or_none
from service.registry import Registry
from service.streams import DELAY_BUCKETS

PREFIX = "mistake_ledger_"
STATES = ("within", "near", "exceeded", "contradicted")
ALERT_STATES = ("exceeded", "contradicted")

_STREAM_COUNTERS = (
    ("predictions_total", "Predictions answered (duplicates not counted).", "predictions"),
    ("feedback_total", "Labels applied to waiting predictions.", "labels"),
    ("feedback_duplicates_total", "Labels repeated for an id (counted since start).", "duplicates"),
    (
        "feedback_conflicts_total",
        "Labels contradicting an earlier label (since start).",
        "conflicts",
    ),
    ("predictions_expired_total", "Predictions whose label did not come in time.", "expired"),
)


class LedgerCollector(Collector):
    """Exports the ledger of every stream of a registry (see the module docstring)."""

    def __init__(self, registry: Registry, *, stream_label: bool = True) -> None:
        self.registry = registry
        self.stream_label = stream_label

    def describe(self) -> list[Metric]:
        return []  # avoid a collect() at registration time

    def collect(self) -> Iterator[Metric]:
        read = [self._read(stream) for stream in list(self.registry.streams.values())]
        rows = [row for row in read if row is not None]
        keep = self.stream_label
        s_labels = ["stream"] if keep else []
        l_labels = [*s_labels, "learner"]

        for name, doc, key in _STREAM_COUNTERS:
            family = CounterMetricFamily(PREFIX + name, doc, labels=s_labels)
            for labels, value in _sum(rows, keep, lambda r, k=key: [((), r["counts"][k])]):
                family.add_metric(labels, value)
            yield family

        pending = GaugeMetricFamily(
            PREFIX + "pending_predictions", "Predictions waiting for a label.", labels=s_labels
        )
        for labels, value in _sum(rows, keep, lambda r: [((), r["pending"])]):
            pending.add_metric(labels, value)
        yield pending

        learner_families: list[tuple[type, str, str, list[str], str]] = [
            (
                CounterMetricFamily,
                "served_mistakes_total",
                "Served votes that differed from the label, all epochs.",
                l_labels,
                "served",
            ),
            (
                CounterMetricFamily,
                "updates_total",
                "Learner updates, all epochs.",
                l_labels,
                "updates",
            ),
            (
                GaugeMetricFamily,
                "update_ceiling",
                "The current epoch's ceiling U on the counted quantity.",
                l_labels,
                "ceiling",
            ),
            (
                GaugeMetricFamily,
                "served_ceiling",
                "The served-mistake ceiling (1 + G) U of the current epoch.",
                l_labels,
                "served_ceiling",
            ),
            (
                GaugeMetricFamily,
                "ceiling_count",
                "The quantity the ceiling bounds (updates or mistakes) in the current epoch.",
                l_labels,
                "count",
            ),
        ]
        for cls, name, doc, labels_, key in learner_families:
            family = cls(PREFIX + name, doc, labels=labels_)
            for labels, value in _sum(
                rows, keep, lambda r, k=key: [((s["name"],), s[k]) for s in r["seats"]]
            ):
                family.add_metric(labels, value)
            yield family

        alerts = CounterMetricFamily(
            PREFIX + "alerts_total", "Alerts raised, by state reached.", labels=[*l_labels, "state"]
        )
        for labels, value in _sum(
            rows,
            keep,
            lambda r: [
                ((s["name"], st), s["alerts"][st]) for s in r["seats"] for st in ALERT_STATES
            ],
        ):
            alerts.add_metric(labels, value)
        yield alerts

        state = GaugeMetricFamily(
            PREFIX + "learner_state",
            "1 for the learner's current state against its ceiling, 0 for the others.",
            labels=[*l_labels, "state"],
        )
        for labels, value in _sum(
            rows,
            keep,
            lambda r: [
                ((s["name"], st), int(s["state"] == st)) for s in r["seats"] for st in STATES
            ],
        ):
            state.add_metric(labels, value)
        yield state

        delay = HistogramMetricFamily(
            PREFIX + "label_delay_seconds",
            "Seconds from a prediction to its label.",
            labels=s_labels,
        )
        groups: dict[tuple[str, ...], tuple[list[int], float]] = {}
        for row in rows:
            where: tuple[str, ...] = (row["stream"],) if keep else ()
            buckets, total = groups.get(where, ([0] * (len(DELAY_BUCKETS) + 1), 0.0))
            groups[where] = (
                [a + b for a, b in zip(buckets, row["delay"], strict=True)],
                total + row["delay_sum"],
            )
        for group, (buckets, total) in groups.items():
            cumulative, running = [], 0
            for bound, count in zip([*map(_le, DELAY_BUCKETS), "+Inf"], buckets, strict=True):
                running += count
                cumulative.append((bound, running))
            delay.add_metric(list(group), cumulative, sum_value=total)
        yield delay

    def _read(self, stream: Any) -> dict[str, Any] | None:
        with stream.lock:
            if stream.deleted:
                return None
            seats = []
            for seat in stream.seats:
                ceiling = seat.learner.ceiling()
                value = finite_or_none(ceiling.value)
                seats.append(
                    {
                        "name": seat.name,
                        "served": seat.total_served,
                        "updates": seat.total_updates,
                        "ceiling": value,
                        "served_ceiling": seat.served_ceiling(ceiling),
                        "count": seat.count(ceiling),
                        "state": seat.state(ceiling),
                        "alerts": dict(seat.alert_counts),
                    }
                )
            return {
                "stream": stream.name,
                "counts": {**stream.counts, **stream.volatile},
                "pending": len(stream.pending),
                "seats": seats,
                "delay": list(stream.delay_buckets),
                "delay_sum": stream.delay_sum,
            }


def _le(bound: float) -> str:
    return repr(float(bound))


def _sum(rows: list[dict[str, Any]], keep_stream: bool, pick: Any) -> list[tuple[list[str], float]]:
    """(labels, value) per series; without the stream label, values with equal labels add up.

    ``pick(row)`` yields (labels below the stream, value or None); None values are left out.
    """
    totals: dict[tuple[str, ...], float] = defaultdict(float)
    order: list[tuple[str, ...]] = []
    for row in rows:
        for labels, value in pick(row):
            if value is None:
                continue
            key = ((row["stream"],) if keep_stream else ()) + tuple(labels)
            if key not in totals:
                order.append(key)
            totals[key] += value
    return [(list(key), totals[key]) for key in order]
