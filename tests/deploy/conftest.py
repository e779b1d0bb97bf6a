"""Fixtures for the deploy/ tests: the external programs they run."""

from __future__ import annotations

import pytest

from tests.deploy.tools import require_tool


@pytest.fixture(scope="session")
def promtool() -> str:
    return require_tool("promtool")


@pytest.fixture(scope="session")
def nginx() -> str:
    return require_tool("nginx")
