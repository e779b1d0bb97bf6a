"""The replay tool: reading files, the timeline, and a real replay against a loopback service.

The end-to-end check replays part of the demo scenario in the exact order of its timeline and
compares the service's ledger with the same learners run locally on the same order of events:
every learner's updates and served mistakes must agree.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner
from rich.console import Console

import learners
from service.charts import ledger_table
from service.client import LedgerClient
from service.replay import (
    Delay,
    Record,
    Replay,
    ReplayError,
    load_records,
    plan,
    prepare_stream,
)
from tests.service.harness import served

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "demo_data"
CATALOGUE = json.loads((SCENARIO / "streams.json").read_text(encoding="utf-8"))
ENTRIES = {e["stream"]: e for e in CATALOGUE["streams"]}


# -- a real service on loopback ---------------------------------------------------------------


@pytest.fixture(scope="module")
def service_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    from prometheus_client import CollectorRegistry

    from service.app import create_app
    from service.settings import Settings

    data = tmp_path_factory.mktemp("replay-store")
    settings = Settings.from_env({}, data_dir=data, durability="normal")
    app = create_app(settings, registry=CollectorRegistry())
    with served(app) as url:
        yield url


def subset(stream: str, count: int, out: Path) -> Path:
    """The first ``count`` records of a demo stream, as a JSON-lines file."""
    lines = (SCENARIO / ENTRIES[stream]["file"]).read_text(encoding="utf-8").splitlines()
    path = out / f"{stream}.jsonl"
    path.write_text("\n".join(lines[:count]) + "\n", encoding="utf-8")
    return path


def local_run(panel: dict[str, Any], records: list[Record], releases: list[float | None]):
    """The panel's learners on the same timeline, locally: updates and served mistakes."""
    # Reference: the learners package run in-process; served mistakes as in DESIGN.md (Accounting).
    space = learners.FeatureSpace(panel["features"])
    seats = {}
    for spec in panel["learners"]:
        params = {k: v for k, v in spec.items() if k not in ("name", "kind")}
        seats[spec["name"]] = learners.make(spec["kind"], features=space, **params)
    served = dict.fromkeys(seats, 0)
    votes: dict[int, dict[str, int]] = {}
    for step in plan(records, releases, window=0):
        for i in step.indices:
            record = records[i]
            if step.kind == "predict":
                votes[i] = {name: s.predict(record.features) for name, s in seats.items()}
            else:
                for name, seat in seats.items():
                    served[name] += votes[i][name] != record.label
                    seat.learn(record.features, record.label)
    return {name: (s.updates, served[name]) for name, s in seats.items()}


def test_replay_matches_the_same_learners_run_locally(service_url: str, tmp_path: Path) -> None:
    entry = ENTRIES["lockers-escalate"]
    panel = {**entry["panel"], "stream": "replay-escalate"}
    records = load_records(subset("lockers-escalate", 300, tmp_path))
    releases = Delay.parse("column:label_at").releases(records)
    with LedgerClient(service_url) as client:
        prepare_stream(client, panel["stream"], panel, recreate=True)
        player = Replay(client, panel["stream"], records, releases, polls=50)
        advanced: list[int] = []
        result = player.run(advanced.append)
    assert sum(advanced) == player.events == 600  # worked by hand: 300 predicts + 300 labels
    assert result.predictions == 300 and result.statuses == {"applied": 300}
    expected = local_run(panel, records, releases)
    got = {
        learner["name"]: (learner["updates"], learner["served_mistakes"])
        for learner in result.ledger["learners"]
    }
    assert got == expected
    assert any(updates > 0 for updates, _ in got.values())
    # The chart's series end where the ledger ends, and start at zero labels.
    assert result.chart is not None
    for name, points in result.chart.learners.items():
        assert points[0].labels == 0 and points[-1].labels == 300
        assert points[-1].counted == got[name][0] or result.chart.counts[name] == "mistakes"
        assert [p.labels for p in points] == sorted(p.labels for p in points)
    # The table names every learner and the serving one is marked (rich renders it).
    console = Console(width=200, record=True)
    console.print(ledger_table(result.ledger, result.compare))
    text = console.export_text()
    for name in expected:
        assert name in text
    assert f"{panel['serve']} *" in text


def test_replay_command_with_csv_writes_table_and_charts(service_url: str, tmp_path: Path) -> None:
    from service.replay import replay_command

    entry = ENTRIES["lockers-reweigh"]
    names = entry["panel"]["features"]
    lines = (SCENARIO / entry["file"]).read_text(encoding="utf-8").splitlines()
    rows = [json.loads(line) for line in lines[:250]]
    csv_path = tmp_path / "reweigh.csv"
    with csv_path.open("w", encoding="utf-8") as handle:
        handle.write(",".join(["id", "at", "label_at", "label", *names]) + "\n")
        for row in rows:
            values = [str(row["features"].get(n, "")) for n in names]
            cells = [row["id"], row["at"], row["label_at"], str(row["label"]), *values]
            handle.write(",".join(cells) + "\n")
    charts = tmp_path / "charts"
    result = CliRunner(env={"COLUMNS": "200"}).invoke(
        replay_command,
        [
            str(csv_path),
            "--url",
            service_url,
            "--stream",
            "lockers-reweigh",
            "--panel",
            str(SCENARIO / "streams.json"),
            "--recreate",
            "--delay",
            "uniform:600,86400",
            "--seed",
            "3",
            "--window",
            "3600",
            "--charts",
            str(charts),
        ],  # fmt: skip
        terminal_width=200,
    )
    assert result.exit_code == 0, result.output
    for learner in entry["panel"]["learners"]:
        assert learner["name"] in result.output
    assert "250 applied" in result.output  # CSV reading per RFC 4180: common practice
    png = (charts / "lockers-reweigh.png").read_bytes()
    # PNG specification: the 8-byte file signature; SVG: the <svg> root element.
    assert png.startswith(b"\x89PNG\r\n\x1a\n") and len(png) > 10_000
    svg = (charts / "lockers-reweigh.svg").read_text(encoding="utf-8")
    assert "<svg" in svg and "perceptron" in svg


def test_ledger_command_prints_the_table(service_url: str) -> None:
    from service.replay import ledger_command

    panel = {**ENTRIES["lockers-hold"]["panel"], "stream": "ledger-hold"}
    with LedgerClient(service_url) as client:
        prepare_stream(client, panel["stream"], panel, recreate=True)
        client.predict("ledger-hold", ["weight_mismatch"], id="a")
        client.feedback("ledger-hold", "a", 0)
    result = CliRunner(env={"COLUMNS": "200"}).invoke(
        ledger_command, ["ledger-hold", "--url", service_url], terminal_width=200
    )
    assert result.exit_code == 0, result.output
    assert "elimination *" in result.output and "halving" in result.output
    missing = CliRunner(env={"COLUMNS": "200"}).invoke(
        ledger_command, ["no-such-stream", "--url", service_url]
    )
    assert missing.exit_code == 1 and "404" in missing.output  # RFC 9110 §15.5.5: 404


def test_the_services_errors_reach_the_caller_with_field_rule_and_value(service_url: str) -> None:
    from service.client import RequestRejected

    bad = {
        "stream": "bad-panel",
        "features": 10,
        "learners": [{"name": "w", "kind": "winnow", "variant": "winnow9"}],
    }
    with LedgerClient(service_url, retries=3) as client:
        with pytest.raises(RequestRejected) as caught:
            client.create_stream(bad)
        assert caught.value.status == 422  # RFC 9110 §15.5.21: 422 Unprocessable Content
        assert caught.value.field is not None and "variant" in caught.value.field
        assert caught.value.value == "winnow9" and caught.value.rule
        assert client.has_stream("bad-panel") is False  # nothing was created


# -- the timeline -----------------------------------------------------------------------------


def record(i: int, at: float, label_at: float | None, label: int | None = 1) -> Record:
    return Record(f"r{i}", at, label_at, ["f"], label, i + 1)


def test_exact_order_predicts_before_a_label_released_at_the_same_moment() -> None:
    records = [record(0, 0, 50), record(1, 10, 10), record(2, 20, 30), record(3, 40, None, None)]
    steps = plan(records, [r.label_at for r in records], window=0)
    order = [(s.kind, s.indices) for s in steps]
    # Worked by hand: events sorted by time, a predict before a label at the same moment:
    # predicts at 0 and 10 (one batch), label 1 at 10, predict 20, label 2 at 30, predict 40,
    # label 0 at 50; record 3 has no label.
    assert order == [
        ("predict", [0, 1]),
        ("label", [1]),
        ("predict", [2]),
        ("label", [2]),
        ("predict", [3]),
        ("label", [0]),
    ]


def test_windows_send_predictions_first_and_never_a_label_before_its_item() -> None:
    records = [record(i, at=i * 100.0, label_at=i * 100.0 + 150) for i in range(10)]
    steps = plan(records, [r.label_at for r in records], window=1000, max_batch=4)
    # Worked by hand: 10 predictions in batches of at most 4 (4, 4, 2), then 10 labels likewise.
    assert [(s.kind, len(s.indices)) for s in steps] == [
        ("predict", 4), ("predict", 4), ("predict", 2), ("label", 4), ("label", 4), ("label", 2),
    ]  # fmt: skip
    # (nine labels fall in the first window, the tenth in the next; consecutive labels share
    # batches across windows)
    steps = plan(records, [r.label_at for r in records], window=300)
    predicted: set[int] = set()
    for step in steps:
        if step.kind == "predict":
            predicted.update(step.indices)
        else:
            assert set(step.indices) <= predicted


def test_delays() -> None:
    records = [record(i, at=1000.0 * i, label_at=None) for i in range(200)]
    # Worked by hand from the definitions: fixed adds d; uniform stays in [low, high], seeded.
    fixed = Delay.parse("fixed:3600").releases(records)
    assert fixed == [1000.0 * i + 3600 for i in range(200)]
    first = Delay.parse("uniform:600,86400").releases(records, seed=7)
    assert first == Delay.parse("uniform:600,86400").releases(records, seed=7)
    waits = [t - r.at for t, r in zip(first, records, strict=True) if t is not None]
    assert all(600 <= w <= 86400 for w in waits)
    assert first != Delay.parse("uniform:600,86400").releases(records, seed=8)
    for bad in ("fixed:-1", "uniform:5,1", "uniform:1", "column:", "later", "fixed:nan"):
        with pytest.raises(ReplayError) as caught:
            Delay.parse(bad)
        assert caught.value.field == "delay" and caught.value.value == bad


# ISO 8601 timestamps (Python datetime.fromisoformat as reference); RFC 8259 (JSON) lines.
# The client's rule: an error names the field, the rule and the value.
@pytest.mark.parametrize(
    ("line", "field", "rule"),
    [
        ('{"id": "a", "at": "yesterday", "features": []}', "at", "ISO 8601"),
        ('{"id": "a", "at": 5, "features": [], "label": 2}', "label", "one of 0, 1"),
        ('{"id": "a", "at": 5, "features": "x"}', "features", "list of strings"),
        ('{"at": 5, "features": []}', "id", "non-empty string"),
        (
            '{"id": "a", "at": 5, "label_at": 4, "features": [], "label": 1}',
            "label_at",
            "not before",
        ),
        ("[1, 2]", "line 1", "one JSON object"),
        ("{oops", "line 1", "one JSON object"),
    ],
)
def test_bad_json_lines_name_the_field(tmp_path: Path, line: str, field: str, rule: str) -> None:
    path = tmp_path / "bad.jsonl"
    path.write_text(line + "\n", encoding="utf-8")
    with pytest.raises(ReplayError) as caught:
        load_records(path)
    assert caught.value.field == field
    assert rule in caught.value.rule
    assert "line 1" in str(caught.value)


def test_csv_reading_and_its_errors(tmp_path: Path) -> None:
    path = tmp_path / "items.csv"
    path.write_text(
        "id,at,label_at,label,weight,flag\n"
        "a,2026-03-02T10:00:00Z,2026-03-02T12:00:00Z,1,0.5,1\n"
        "b,1772445600,,,0,\n",
        encoding="utf-8",
    )
    a, b = load_records(path)
    assert a.features == {"weight": 0.5, "flag": 1.0} and a.label == 1
    # Worked by hand: 10:00Z to 12:00Z is 7200 s; 1772445600 is 2026-03-02T10:00:00Z.
    assert a.label_at is not None and a.label_at - a.at == 7200
    assert b.features == {} and b.label is None and b.label_at is None
    path.write_text("id,at,verdict_at,label,w\na,10,2026-01-01T00:00:10+01:00,1,2\n", "utf-8")
    [c] = load_records(path, label_column="verdict_at")
    # Reference: Python's datetime with a +01:00 offset (ISO 8601 offsets).
    one_hour_east = timezone(timedelta(hours=1))
    assert c.features == {"w": 2.0}
    assert c.label_at == datetime(2026, 1, 1, 0, 0, 10, tzinfo=one_hour_east).timestamp()
    path.write_text("id,at,label,weight\na,5,1,heavy\n", encoding="utf-8")
    with pytest.raises(ReplayError) as caught:
        load_records(path)
    assert (caught.value.field, caught.value.value) == ("features.weight", "heavy")
    assert "line 2" in str(caught.value)
    path.write_text("id,label\na,1\n", encoding="utf-8")
    with pytest.raises(ReplayError, match="'at'"):
        load_records(path)
    path.write_text("id,at,label\na,5,1\na,6,0\n", encoding="utf-8")
    with pytest.raises(ReplayError, match="already used"):
        load_records(path)
