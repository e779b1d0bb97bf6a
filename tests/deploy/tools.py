"""Where the deploy files are, and external programs the deploy tests need.

A test that needs promtool or nginx is skipped on a developer machine without the program, but
fails when ``CI=true``: CI installs both (.ci/run), so it can never pass without having run them.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"


def require_tool(name: str) -> str:
    """The path of the external program ``name``, or skip (locally) / fail (in CI) without it."""
    path = shutil.which(name) or shutil.which(name, path="/usr/sbin:/usr/local/sbin:/sbin")
    if path is not None:
        return path
    if os.environ.get("CI") == "true":
        pytest.fail(f"{name} is required in CI (CI=true) but was not found on PATH or in /usr/sbin")
    pytest.skip(f"{name} is not installed here (install Debian's package to run this test)")
