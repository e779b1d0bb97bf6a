"""Fixtures for the service tests: a fresh app per test with its own store, registry and clock."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi import FastAPI
from prometheus_client import CollectorRegistry

from service.app import create_app
from service.settings import Settings
from tests.service.harness import Clock, Running, running

MakeApp = Callable[..., FastAPI]


@pytest.fixture
def clock() -> Clock:
    return Clock()


@pytest.fixture
def data_dir(tmp_path: Path) -> Path:
    return tmp_path / "data"


@pytest.fixture
def make_app(data_dir: Path, clock: Clock) -> MakeApp:
    """Build an app on the test's data directory; keyword arguments are settings."""

    def make(env: dict[str, str] | None = None, **overrides: Any) -> FastAPI:
        overrides.setdefault("data_dir", data_dir)
        settings = Settings.from_env(env or {}, **overrides)
        return create_app(settings, clock=clock, registry=CollectorRegistry())

    return make


@pytest.fixture
def service(make_app: MakeApp) -> Iterator[Running]:
    with running(make_app()) as started:
        yield started
