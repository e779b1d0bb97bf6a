"""The README's first quick-start command, run from a clean checkout exactly as a newcomer would."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_make_demo_once_from_a_clean_checkout(tmp_path: Path) -> None:
    if shutil.which("git") is None or not (ROOT / ".git").exists():
        pytest.skip("needs the project's git checkout")
    readme = (ROOT / "README.md").read_text()
    # The README's quick start: the two commands it documents.
    assert "make demo ONCE=1" in readme and "make test" in readme
    checkout = tmp_path / "checkout"
    subprocess.run(["git", "clone", "-q", str(ROOT), str(checkout)], check=True)
    env = {k: v for k, v in os.environ.items() if not k.startswith(("VIRTUAL_ENV", "PYTHONPATH"))}
    env["PATH"] = os.pathsep.join(
        p for p in env.get("PATH", "").split(os.pathsep) if ".venv" not in p
    )
    done = subprocess.run(
        ["make", "demo", "ONCE=1", "DEMO_ARGS=--port 0"],
        cwd=checkout,
        env=env,
        capture_output=True,
        text=True,
        timeout=900,
    )
    out = done.stdout + done.stderr
    assert done.returncode == 0, out[-3000:]
    # The README's quick start (what it says the demo prints and writes), and the invented
    # scenario's three streams (demo_data/streams.json).
    for stream in ("lockers-hold", "lockers-escalate", "lockers-reweigh"):
        assert stream in out
        for suffix in ("png", "svg"):
            chart = checkout / "demo-output" / f"{stream}.{suffix}"
            assert chart.stat().st_size > 1000, chart
    assert re.search(r"Live page: http://127\.0\.0\.1:\d+/", out)
    alerts = re.search(r"(\d+) alert\(s\)", out)
    assert alerts and int(alerts.group(1)) >= 1, out[-2000:]
    assert "exceeded" in out and "contradicted" in out
    assert (checkout / "data").is_dir()  # the embedded SQLite store lives in the checkout
