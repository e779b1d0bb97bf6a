"""``mistake-ledger demo --once`` end to end, as a user runs it: a child process, a free port."""

from __future__ import annotations

import json
import os
import re
import socket
import subprocess
import sys
from datetime import datetime
from pathlib import Path

import pytest

from service.demo import change_mark, free_port, read_catalogue
from service.replay import load_records

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.slow
def test_demo_once_prints_the_ledgers_writes_charts_and_raises_alerts(tmp_path: Path) -> None:
    port = free_port()
    data, out = tmp_path / "data", tmp_path / "out"
    command = [
        sys.executable, "-c", "from service.cli import main; main()",
        "demo", "--once", "--port", str(port), "--data-dir", str(data), "--out", str(out),
        "--pace", "1",
    ]  # fmt: skip
    env = {**os.environ, "COLUMNS": "220", "NO_COLOR": "1"}
    run = subprocess.run(
        command, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300
    )
    assert run.returncode == 0, run.stdout[-3000:] + run.stderr[-3000:]
    text = run.stdout
    catalogue = json.loads((ROOT / "demo_data" / "streams.json").read_text(encoding="utf-8"))
    for entry in catalogue["streams"]:
        stream = entry["stream"]
        assert stream in text
        for learner in entry["panel"]["learners"]:
            assert learner["name"] in text
        for fmt in ("png", "svg"):
            assert (out / f"{stream}.{fmt}").stat().st_size > 5_000
        # PNG specification: the 8-byte file signature.
        assert (out / f"{stream}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert f"http://127.0.0.1:{port}/" in text
    # The scenario's story: alerts are raised, and only once the planted rule has changed.
    # THEORY.md: a ceiling holds while the stream satisfies its assumption (demo_data/streams.json).
    alerts = re.findall(r"alert: (\S+) (exceeded|contradicted) after (\d+) labels", text)
    assert alerts, text[-3000:]
    changes = dict(re.findall(r"(\S+): rule change after (\d+) labels", text))
    assert set(changes) == {e["stream"] for e in catalogue["streams"]}
    assert all(int(labels) >= min(map(int, changes.values())) for _, _, labels in alerts)
    # --once stopped the service: the port is free again (bind succeeds: common practice).
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", port))


def test_the_scenario_is_found_from_the_checkout_and_marks_the_change() -> None:
    catalogue = read_catalogue(ROOT / "demo_data")
    entry = catalogue["streams"][0]
    records = load_records(ROOT / "demo_data" / entry["file"])
    [(labels, caption)] = change_mark(records, entry["planted"]["change_at"])
    assert caption == "rule change"
    # Worked from the scenario's own timeline (demo_data/streams.json, planted change_at).
    # Every label released before that point belongs to an item dropped off before the change.
    change = datetime.fromisoformat(entry["planted"]["change_at"]).timestamp()
    released = sorted((r.label_at, r.at) for r in records if r.label_at is not None)
    assert all(at < change for _, at in released[:labels])
    assert released[labels][1] >= change


def test_a_missing_scenario_says_what_to_do(tmp_path: Path) -> None:
    from click import ClickException

    # An error that says what to do next: common practice.
    with pytest.raises(ClickException, match="demo_data.generate"):
        read_catalogue(tmp_path)


def test_a_busy_port_is_refused_before_anything_starts(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from service.demo import demo_command

    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        result = CliRunner().invoke(
            demo_command, ["--once", "--port", str(port), "--data-dir", str(tmp_path / "d")]
        )
    # Refusing before any state is written: common practice.
    assert result.exit_code == 1
    assert f"Port {port}" in result.output and "--port 0" in result.output
    assert not (tmp_path / "d").exists()
