"""The demo end to end: start the service, replay the invented scenario, show the ledgers.

``mistake-ledger demo`` starts the service on 127.0.0.1 (a child process with its own SQLite data
directory), creates every stream of ``demo_data/streams.json`` afresh, replays the streams side by
side with the verdicts arriving at their recorded times (the four weeks compressed into a few
seconds), then prints each stream's ledger and its comparison with the serving learner, writes
one chart per stream, and keeps serving the live page until interrupted (``--once``: it stops
after the replay).

The scenario's files are read from the project checkout (``demo_data/`` beside ``service/``), or
from ``--scenario DIR``; regenerate them with ``python -m demo_data.generate``.
"""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from datetime import datetime
from pathlib import Path
from typing import Any

import click
from rich.console import Console

from service.charts import StreamChart, draw, ledger_table
from service.charts import console as terminal
from service.client import ClientError, LedgerClient
from service.replay import (
    Delay,
    Record,
    Replay,
    ReplayError,
    ReplayResult,
    load_records,
    prepare_stream,
    progress_bar,
    summary,
)

SCENARIO = Path(__file__).resolve().parent.parent / "demo_data"


class DemoError(click.ClickException):
    """The demo cannot go on; the message says why and what to do."""


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def port_is_free(port: int) -> bool:
    """True when nothing listens on 127.0.0.1:``port`` (closed connections do not count)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as the server binds
        try:
            probe.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def read_catalogue(folder: Path) -> dict[str, Any]:
    """The scenario's ``streams.json``, with a clear error when it is missing."""
    path = folder / "streams.json"
    if not path.is_file():
        raise DemoError(
            f"No demo scenario at {folder}: {path.name} is missing. Run the demo from the project "
            "checkout, pass --scenario DIR, or write the files with python -m demo_data.generate."
        )
    data = json.loads(path.read_text(encoding="utf-8"))
    if not isinstance(data, dict) or not isinstance(data.get("streams"), list):
        raise DemoError(f"{path} must hold an object with a 'streams' list.")
    return data


class ServiceProcess:
    """The service as a child process on 127.0.0.1; stopped by :meth:`stop` (SIGTERM, then kill)."""

    def __init__(self, port: int, data_dir: Path, log: Path) -> None:
        self.port = port
        self.url = f"http://127.0.0.1:{port}"
        data_dir.mkdir(parents=True, exist_ok=True)
        self.log_path = log
        self._log = log.open("wb")
        command = [
            sys.executable,
            "-c",
            "from service.cli import main; main()",
            "serve",
            "--host",
            "127.0.0.1",
            "--port",
            str(port),
            "--data-dir",
            str(data_dir),
        ]
        self.process = subprocess.Popen(command, stdout=self._log, stderr=subprocess.STDOUT)

    def wait_ready(self, timeout: float = 60.0) -> None:
        """Block until the service answers its readiness check; fail with its log otherwise."""
        deadline = time.monotonic() + timeout
        with LedgerClient(self.url, timeout=2.0, retries=0) as probe:
            while time.monotonic() < deadline:
                if self.process.poll() is not None:
                    raise DemoError(f"The service stopped while starting:\n{self.log_tail()}")
                if probe.ready():
                    return
                time.sleep(0.1)
        raise DemoError(f"The service did not become ready in {timeout:.0f} s:\n{self.log_tail()}")

    def log_tail(self, lines: int = 20) -> str:
        self._log.flush()
        text = self.log_path.read_text(encoding="utf-8", errors="replace")
        return "\n".join(text.splitlines()[-lines:])

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=15)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=5)
        self._log.close()


def change_mark(records: list[Record], change_at: str | None) -> list[tuple[int, str]]:
    """Where the planted rule change shows on a chart: labels released before the first verdict
    given under the new rule."""
    if not change_at:
        return []
    change = datetime.fromisoformat(change_at).timestamp()
    firsts = [r.label_at for r in records if r.at >= change and r.label_at is not None]
    if not firsts:
        return []
    first = min(firsts)
    before = sum(1 for r in records if r.label_at is not None and r.label_at < first)
    return [(before, "rule change")]


def replay_all(
    url: str,
    catalogue: Mapping[str, Any],
    folder: Path,
    *,
    pace: float,
    window: float,
    console: Console,
) -> list[tuple[Mapping[str, Any], ReplayResult]]:
    """Create every demo stream afresh and replay them side by side, one thread each."""
    entries = list(catalogue["streams"])
    jobs = []
    with LedgerClient(url, timeout=30.0) as client:
        for entry in entries:
            panel = dict(entry["panel"])
            prepare_stream(client, panel["stream"], panel, recreate=True)
            delay = Delay.parse(entry.get("delay", {}).get("replay", "column:label_at"))
            records = load_records(folder / entry["file"], delay.column)
            jobs.append((entry, panel["stream"], records, delay.releases(records)))
    with progress_bar(console) as progress:
        lock = threading.Lock()

        def play(job: tuple[Mapping[str, Any], str, list[Record], list[float | None]]) -> Any:
            entry, stream, records, releases = job
            span = max(t for t in releases if t is not None) - min(r.at for r in records)
            speed = span / pace if pace > 0 else 0.0
            task = progress.add_task(stream, total=len(records) + len(releases))

            def advance(n: int) -> None:
                with lock:
                    progress.advance(task, n)

            with LedgerClient(url, timeout=30.0) as client:
                player = Replay(client, stream, records, releases, speed=speed, window=window)
                result = player.run(advance)
            if result.chart is not None:
                result.chart.marks = change_mark(records, entry.get("planted", {}).get("change_at"))
            return entry, result

        with ThreadPoolExecutor(max_workers=len(jobs)) as pool:
            return list(pool.map(play, jobs))


def report(
    results: list[tuple[Mapping[str, Any], ReplayResult]], out_dir: Path, console: Console
) -> int:
    """Print each stream's table and alerts, write the charts; return how many alerts were seen."""
    alerts = 0
    for entry, result in results:
        title = f"{result.stream}: {entry.get('title', '')}".rstrip(": ")
        console.print()
        console.print(ledger_table(result.ledger, result.compare, title=title))
        console.print(summary(result))
        chart: StreamChart | None = result.chart
        if chart is not None:
            for labels, caption in chart.marks:
                console.print(f"  {result.stream}: {caption} after {labels} labels")
            for alert in chart.alerts:
                alerts += 1
                ceiling = "none" if alert.ceiling is None else f"{alert.ceiling:.1f}"
                console.print(
                    f"  alert: {alert.learner} {alert.state} after {alert.labels} labels "
                    f"(count {alert.count:.0f}, ceiling {ceiling})",
                    style="red",
                )
            paths = draw(chart, out_dir)
            console.print("  charts: " + ", ".join(str(p) for p in paths))
    return alerts


def _interrupt(signum: int, frame: object) -> None:
    raise KeyboardInterrupt


@click.command("demo")
@click.option("--once", is_flag=True, help="Stop the service and exit after the replay.")
@click.option(
    "--port",
    default=8000,
    show_default=True,
    type=click.IntRange(0, 65535),
    help="Port on 127.0.0.1 for the service (0: any free port).",
)
@click.option(
    "--data-dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("data"),
    show_default=True,
    help="SQLite data directory of the demo service.",
)
@click.option(
    "--out",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("demo-output"),
    show_default=True,
    help="Folder for the charts (<stream>.png and <stream>.svg).",
)
@click.option(
    "--scenario",
    type=click.Path(file_okay=False, path_type=Path),
    default=SCENARIO,
    help="Folder with streams.json and the stream files (default: the checkout's demo_data/).",
)
@click.option(
    "--pace",
    default=8.0,
    show_default=True,
    type=click.FloatRange(min=0),
    help="Real seconds in which each stream's four weeks are replayed (0: as fast as possible).",
)
@click.option(
    "--window",
    default=1800.0,
    show_default=True,
    type=click.FloatRange(min=0),
    help="Batch window in simulated seconds (see mistake-ledger replay --help).",
)
def demo_command(
    once: bool, port: int, data_dir: Path, out: Path, scenario: Path, pace: float, window: float
) -> None:
    """Run the demo: start the service, replay the invented scenario, print the ledgers."""
    console = terminal()
    catalogue = read_catalogue(scenario)
    port = port or free_port()
    if not port_is_free(port):
        raise DemoError(
            f"Port {port} on 127.0.0.1 is in use (another service?). Pass --port with another "
            "port, or --port 0 for any free one."
        )
    data_dir.mkdir(parents=True, exist_ok=True)
    # A SIGTERM (e.g. from a process manager) stops the child service too, as Ctrl-C does.
    signal.signal(signal.SIGTERM, _interrupt)
    service = ServiceProcess(port, data_dir, data_dir / "demo-service.log")
    started = time.monotonic()
    try:
        service.wait_ready()
        console.print(
            f"{catalogue.get('scenario', 'demo')}: service on {service.url} "
            f"(data in {data_dir}, log {service.log_path})"
        )
        try:
            results = replay_all(
                service.url, catalogue, scenario, pace=pace, window=window, console=console
            )
        except (ReplayError, ClientError) as error:
            raise DemoError(f"{error}\nservice log:\n{service.log_tail()}") from None
        alerts = report(results, out, console)
        console.print(
            f"\n{alerts} alert(s). Demo replay took {time.monotonic() - started:.1f} s. "
            f"Live page: {service.url}/"
        )
        if not once:
            console.print("Serving until interrupted (Ctrl-C).")
            while service.process.poll() is None:
                time.sleep(0.5)
            raise DemoError(f"The service stopped:\n{service.log_tail()}")
    except KeyboardInterrupt:
        console.print("Stopping.")
    finally:
        service.stop()
