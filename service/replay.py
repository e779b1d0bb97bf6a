"""Replay a file of items and their labels against a running service, with late labels.

The file is JSON lines or CSV (see :mod:`service.records`): each item has an id, the time ``at``
it was seen, its features, and a label (or none, for a label that never comes).

Every item is predicted at its ``at`` time; its label is released after a simulated delay:

``fixed:SECONDS``      the same delay for every item;
``uniform:LOW,HIGH``   a delay drawn uniformly from [LOW, HIGH] seconds (seeded, reproducible);
``column:NAME``        the time in the file's column NAME (``column:label_at``).

Predictions and labels are merged into one timeline, so labels arrive late and out of order, as
they would in production. The timeline is played with a speed factor (simulated seconds per real
second; 0 plays as fast as the service answers). Consecutive predictions, and consecutive labels,
go in one batch request; ``window`` (simulated seconds) widens the batches further: within each
window the predictions are sent first, then the labels released in it, so a prediction may be
served before a label that was released a little earlier in the same window.

While it plays, the ledger is read every few labels, so the chart shows each learner's counted
mistakes against its ceiling as they were at that moment, and when each alert was raised.
"""

from __future__ import annotations

import json
import math
import time
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

from service.charts import AlertMark, Point, StreamChart
from service.client import LedgerClient
from service.records import Record, ReplayError, load_records, parse_time

__all__ = [
    "Delay",
    "Record",
    "Replay",
    "ReplayError",
    "ReplayResult",
    "Step",
    "ledger_command",
    "load_panel",
    "load_records",
    "parse_time",
    "plan",
    "prepare_stream",
    "progress_bar",
    "replay_command",
    "summary",
]


# -- delays and the timeline ------------------------------------------------------------------


@dataclass(frozen=True)
class Delay:
    """How long each label waits after its item: see the module docstring for the forms."""

    kind: Literal["fixed", "uniform", "column"]
    low: float = 0.0
    high: float = 0.0
    column: str = "label_at"

    @classmethod
    def parse(cls, text: str) -> Delay:
        kind, _, rest = text.partition(":")
        try:
            if kind == "fixed":
                low = float(rest)
                if math.isfinite(low) and low >= 0:
                    return cls("fixed", low, low)
            elif kind == "uniform":
                low_text, _, high_text = rest.partition(",")
                low, high = float(low_text), float(high_text)
                if math.isfinite(high) and 0 <= low <= high:
                    return cls("uniform", low, high)
            elif kind == "column" and rest:
                return cls("column", column=rest)
        except ValueError:
            pass
        raise ReplayError(
            f"The delay must be fixed:SECONDS, uniform:LOW,HIGH (0 <= LOW <= HIGH) or "
            f"column:NAME; got {text!r}.",
            field="delay",
            rule="fixed:SECONDS | uniform:LOW,HIGH | column:NAME",
            value=text,
        )

    def releases(self, records: Sequence[Record], seed: int = 0) -> list[float | None]:
        """When each record's label is released (None: it never is)."""
        if self.kind == "column":
            return [r.label_at if r.label is not None else None for r in records]
        rng = np.random.default_rng(seed)
        waits = rng.uniform(self.low, self.high, size=len(records))
        return [
            r.at + float(w) if r.label is not None else None
            for r, w in zip(records, waits, strict=True)
        ]


@dataclass
class Step:
    """One request of the replay: a batch of predictions or of labels, due at time ``t``."""

    kind: Literal["predict", "label"]
    indices: list[int]
    t: float


def plan(
    records: Sequence[Record],
    releases: Sequence[float | None],
    window: float = 0.0,
    max_batch: int = 500,
) -> list[Step]:
    """The replay's requests in order (see the module docstring for ``window``)."""
    events = [(r.at, 0, i) for i, r in enumerate(records)]
    events += [(t, 1, i) for i, t in enumerate(releases) if t is not None]
    events.sort()
    if window > 0:
        start = events[0][0]
        events.sort(key=lambda e: (math.floor((e[0] - start) / window), e[1], e[0], e[2]))
    steps: list[Step] = []
    for t, rank, i in events:
        kind: Literal["predict", "label"] = "predict" if rank == 0 else "label"
        last = steps[-1] if steps else None
        if last is not None and last.kind == kind and len(last.indices) < max_batch:
            last.indices.append(i)
            last.t = max(last.t, t)
        else:
            steps.append(Step(kind, [i], t))
    return steps


# -- playing --------------------------------------------------------------------------------


@dataclass
class ReplayResult:
    """What a replay did and what the service said at the end."""

    stream: str
    predictions: int = 0
    duplicates: int = 0
    labels: int = 0
    statuses: Counter[str] = field(default_factory=Counter)
    seconds: float = 0.0
    requests: int = 0  # predict and feedback batches sent
    ledger: dict[str, Any] = field(default_factory=dict)
    compare: dict[str, Any] = field(default_factory=dict)
    chart: StreamChart | None = None


class Replay:
    """Plays one file's timeline against one stream of a running service."""

    def __init__(
        self,
        client: LedgerClient,
        stream: str,
        records: Sequence[Record],
        releases: Sequence[float | None],
        *,
        speed: float = 0.0,
        window: float = 0.0,
        max_batch: int = 500,
        polls: int = 200,
        clock: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        self.client = client
        self.stream = stream
        self.records = list(records)
        self.steps = plan(self.records, releases, window, max_batch)
        self.total_labels = sum(1 for t in releases if t is not None)
        self.events = len(self.records) + self.total_labels
        self.speed = speed
        self.poll_every = max(1, self.total_labels // max(1, polls))
        self._clock = clock
        self._sleep = sleep
        self._position: dict[str, int] = {}  # item id -> labels applied when its label was sent
        self._chart = StreamChart(stream, {})
        self._alerts_seen: set[tuple[str, str, Any, Any]] = set()
        self._last_ledger: dict[str, Any] = {}

    def run(self, advance: Callable[[int], None] | None = None) -> ReplayResult:
        """Play every step; ``advance(n)`` is called after each request with its event count."""
        result = ReplayResult(self.stream)
        started = self._clock()
        origin = self.steps[0].t if self.steps else 0.0
        next_poll = self.poll_every
        self._poll(result)
        for step in self.steps:
            if self.speed > 0:
                due = started + (step.t - origin) / self.speed
                wait = due - self._clock()
                if wait > 0:
                    self._sleep(wait)
            if step.kind == "predict":
                self._predict(step, result)
            else:
                self._label(step, result)
                if result.labels >= next_poll:
                    self._poll(result)
                    next_poll = result.labels + self.poll_every
            result.requests += 1
            if advance is not None:
                advance(len(step.indices))
        self._poll(result)
        result.ledger = self._last_ledger
        result.compare = self.client.compare(self.stream)
        result.seconds = self._clock() - started
        result.chart = self._chart
        return result

    def _predict(self, step: Step, result: ReplayResult) -> None:
        items = [
            {"id": self.records[i].id, "features": self.records[i].features} for i in step.indices
        ]
        answers = self.client.predict_many(self.stream, items)
        result.predictions += len(answers)
        result.duplicates += sum(1 for a in answers if a.get("duplicate"))

    def _label(self, step: Step, result: ReplayResult) -> None:
        items = [{"id": self.records[i].id, "label": self.records[i].label} for i in step.indices]
        outcomes = self.client.feedback_many(self.stream, items)
        for item, outcome in zip(items, outcomes, strict=True):
            status = str(outcome.get("status", "unknown"))
            result.statuses[status] += 1
            if status == "applied":
                result.labels += 1
            self._position[str(item["id"])] = result.labels

    def _poll(self, result: ReplayResult) -> None:
        ledger = self.client.ledger(self.stream)
        self._last_ledger = ledger
        chart = self._chart
        chart.serve = ledger.get("serve")
        for learner in ledger.get("learners", []):
            name = learner["name"]
            ceiling = learner.get("ceiling") or {}
            counts = ceiling.get("counts", "updates")
            chart.kinds[name] = learner.get("kind", "")
            chart.counts[name] = counts
            chart.states[name] = learner.get("state", "within")
            chart.learners.setdefault(name, []).append(
                Point(
                    labels=result.labels,
                    counted=int(learner.get(counts, learner.get("updates", 0))),
                    served=int(learner.get("served_mistakes", 0)),
                    ceiling=ceiling.get("value"),
                    epoch=int(learner.get("epoch", 0)),
                )
            )
            for alert in _alerts_of(learner):
                key = (name, str(alert.get("state")), alert.get("at"), alert.get("count"))
                if key in self._alerts_seen:
                    continue
                self._alerts_seen.add(key)
                chart.alerts.append(
                    AlertMark(
                        learner=name,
                        state=str(alert.get("state")),
                        labels=self._where(alert, result.labels),
                        count=float(alert.get("count") or 0),
                        ceiling=alert.get("ceiling"),
                    )
                )

    def _where(self, alert: Mapping[str, Any], fallback: int) -> int:
        """The label count at which an alert was raised: its last evidence id, if we sent it."""
        positions = [self._position[i] for i in alert.get("evidence") or [] if i in self._position]
        return max(positions) if positions else fallback


def _alerts_of(learner: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    """A learner's alerts, including those recorded with its past epochs."""
    alerts = list(learner.get("alerts") or [])
    for epoch in learner.get("epochs") or []:
        if isinstance(epoch, Mapping):
            alerts.extend(epoch.get("alerts") or [])
    return alerts


# -- panels, progress and the commands ------------------------------------------------------


def load_panel(path: Path, stream: str) -> dict[str, Any]:
    """A stream description from ``path``: a create-stream body, or a catalogue of streams.

    A catalogue is ``{"streams": [{"panel": {...}}, ...]}`` (the demo's ``streams.json``); the
    entry whose panel is named ``stream`` is used. The description's stream name becomes
    ``stream``.
    """
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as error:
        raise ReplayError(
            f"Cannot read the panel file {str(path)!r}: {error}.",
            field="panel",
            rule="a readable JSON file",
            value=str(path),
        ) from None
    if isinstance(data, dict) and isinstance(data.get("streams"), list):
        entries = [e.get("panel", e) for e in data["streams"] if isinstance(e, dict)]
        matches = [e for e in entries if isinstance(e, dict) and e.get("stream") == stream]
        if not matches:
            names = ", ".join(str(e.get("stream")) for e in entries if isinstance(e, dict))
            raise ReplayError(
                f"The catalogue {str(path)!r} has no stream {stream!r}; it has {names}.",
                field="stream",
                rule="a stream of the catalogue",
                value=stream,
            )
        data = matches[0]
    if not isinstance(data, dict):
        raise ReplayError(
            f"The panel file {str(path)!r} must hold a JSON object.",
            field="panel",
            rule="JSON object",
            value=str(path),
        )
    return {**data, "stream": stream}


def prepare_stream(
    client: LedgerClient, stream: str, panel: Mapping[str, Any] | None, recreate: bool
) -> None:
    """Make sure ``stream`` exists: delete it first when ``recreate``, create it from ``panel``."""
    exists = client.has_stream(stream)
    if exists and recreate:
        client.delete_stream(stream)
        exists = False
    if not exists:
        if panel is None:
            raise ReplayError(
                f"Stream {stream!r} does not exist on the service; pass --panel to create it.",
                field="stream",
                rule="an existing stream, or a panel to create it from",
                value=stream,
            )
        client.create_stream(panel)


def progress_bar(console: Any) -> Any:
    """A rich progress display with one bar per stream."""
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
    )

    return Progress(
        TextColumn("{task.description:<18}"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn("events"),
        TimeElapsedColumn(),
        console=console,
        transient=False,
    )


def summary(result: ReplayResult) -> str:
    """One line on what a replay sent and how the service answered."""
    statuses = ", ".join(f"{n} {s}" for s, n in sorted(result.statuses.items()))
    return (
        f"{result.stream}: {result.predictions} predictions ({result.duplicates} duplicates), "
        f"labels {statuses or 'none'}; {result.requests} batches in {result.seconds:.1f} s"
    )


def _client(url: str, token: str | None, timeout: float, retries: int) -> LedgerClient:
    return LedgerClient(url, token, timeout=timeout, retries=retries)


def _commands() -> tuple[Any, Any]:
    import click

    from service.charts import console as terminal
    from service.charts import draw, ledger_table
    from service.client import ClientError

    url_option = click.option(
        "--url",
        default="http://127.0.0.1:8000",
        show_default=True,
        envvar="MISTAKE_LEDGER_URL",
        help="Address of the running service.",
    )
    token_option = click.option(
        "--token",
        default=None,
        envvar="MISTAKE_LEDGER_TOKEN",
        help="Bearer token (admin, or one scoped to the stream); env MISTAKE_LEDGER_TOKEN.",
    )

    @click.command("replay")
    @click.argument("file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
    @url_option
    @token_option
    @click.option("--stream", help="Stream to replay into (default: the file name's stem).")
    @click.option(
        "--delay",
        default="column:label_at",
        show_default=True,
        help="When each label arrives: fixed:SECONDS, uniform:LOW,HIGH (seeded) or column:NAME "
        "(a time column of the file).",
    )
    @click.option("--seed", default=0, show_default=True, help="Seed of the uniform delays.")
    @click.option(
        "--speed",
        default=0.0,
        show_default=True,
        type=click.FloatRange(min=0),
        help="Simulated seconds per real second (86400: a day a second); 0 plays as fast as the "
        "service answers.",
    )
    @click.option(
        "--window",
        default=0.0,
        show_default=True,
        type=click.FloatRange(min=0),
        help="Batch window in simulated seconds: each window's predictions go first, then its "
        "labels. 0 keeps the exact order of the timeline.",
    )
    @click.option(
        "--batch", default=500, show_default=True, type=click.IntRange(min=1),
        help="Most items in one request.",
    )  # fmt: skip
    @click.option(
        "--panel",
        type=click.Path(exists=True, dir_okay=False, path_type=Path),
        help="JSON description of the stream (or a catalogue such as demo_data/streams.json) "
        "to create it from when it does not exist.",
    )
    @click.option("--recreate", is_flag=True, help="Delete the stream first (needs --panel).")
    @click.option(
        "--charts",
        type=click.Path(file_okay=False, path_type=Path),
        default=Path("replay-output"),
        show_default=True,
        help="Folder for the chart files (<stream>.png and <stream>.svg).",
    )
    @click.option("--no-charts", is_flag=True, help="Do not draw charts.")
    @click.option("--timeout", default=30.0, show_default=True, help="Seconds per request.")
    @click.option("--retries", default=3, show_default=True, help="Retries per request.")
    def replay(
        file: Path,
        url: str,
        token: str | None,
        stream: str | None,
        delay: str,
        seed: int,
        speed: float,
        window: float,
        batch: int,
        panel: Path | None,
        recreate: bool,
        charts: Path,
        no_charts: bool,
        timeout: float,
        retries: int,
    ) -> None:
        """Replay FILE (JSON lines or CSV) against a running service, with late labels."""
        console = terminal()
        name = stream or file.stem
        if recreate and panel is None:
            raise click.UsageError("--recreate needs --panel to create the stream again.")
        try:
            rule = Delay.parse(delay)
            records = load_records(file, rule.column if rule.kind == "column" else "label_at")
            description = load_panel(panel, name) if panel is not None else None
            with _client(url, token, timeout, retries) as client:
                prepare_stream(client, name, description, recreate)
                player = Replay(
                    client, name, records, rule.releases(records, seed),
                    speed=speed, window=window, max_batch=batch,
                )  # fmt: skip
                with progress_bar(console) as progress:
                    task = progress.add_task(name, total=player.events)
                    result = player.run(lambda n: progress.advance(task, n))
        except (ReplayError, ClientError) as error:
            raise click.ClickException(str(error)) from None
        console.print(ledger_table(result.ledger, result.compare))
        console.print(summary(result))
        if not no_charts and result.chart is not None:
            for path in draw(result.chart, charts):
                console.print(f"chart: {path}")

    @click.command("ledger")
    @click.argument("stream")
    @url_option
    @token_option
    @click.option("--json", "as_json", is_flag=True, help="Print the raw JSON instead of a table.")
    @click.option("--compare/--no-compare", default=True, show_default=True,
                  help="Add the comparison with the serving learner.")  # fmt: skip
    def ledger(stream: str, url: str, token: str | None, as_json: bool, compare: bool) -> None:
        """Print STREAM's ledger: counts, ceilings, states and alerts of every learner."""
        console = terminal()
        try:
            with _client(url, token, 10.0, 2) as client:
                data = client.ledger(stream)
                versus = client.compare(stream) if compare else None
        except ClientError as error:
            raise click.ClickException(str(error)) from None
        if as_json:
            click.echo(json.dumps({"ledger": data, "compare": versus}, indent=2))
        else:
            console.print(ledger_table(data, versus))

    return replay, ledger


replay_command, ledger_command = _commands()
