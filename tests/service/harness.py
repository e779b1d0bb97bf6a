"""Run an app in-process for tests: its lifespan, and httpx requests through ASGITransport.

(starlette's TestClient warns that its httpx backend is deprecated, and warnings are errors in
this test suite, so the tests drive the app with httpx's own ASGI transport from a blocking
portal instead: the same requests, no sockets.)
"""

from __future__ import annotations

import asyncio
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager, contextmanager
from typing import Any

import httpx
import uvicorn
from anyio.from_thread import BlockingPortal, start_blocking_portal
from fastapi import FastAPI

from service.demo import free_port
from service.streams import fingerprint


class Clock:
    """A clock that moves only when told to."""

    def __init__(self, t: float = 1_700_000_000.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t

    def advance(self, seconds: float) -> None:
        self.t += seconds


class Running:
    """A started app: call ``get``/``post``/``delete`` like a synchronous client."""

    def __init__(self, app: FastAPI, portal: BlockingPortal, token: str | None) -> None:
        self.app = app
        self.portal = portal
        self.headers = {"Authorization": f"Bearer {token}"} if token else {}
        self._client = httpx.AsyncClient(
            transport=httpx.ASGITransport(app=app), base_url="http://testserver"
        )

    def request(self, method: str, url: str, **kwargs: Any) -> httpx.Response:
        headers = {**self.headers, **kwargs.pop("headers", {})}
        return self.portal.call(
            lambda: self._client.request(method, url, headers=headers, **kwargs)
        )

    def get(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("GET", url, **kwargs)

    def post(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("POST", url, **kwargs)

    def delete(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("DELETE", url, **kwargs)

    def concurrently(self, calls: list[tuple[str, str, dict[str, Any]]]) -> list[httpx.Response]:
        """Send several requests at once on the app's event loop; answers in order."""

        async def run() -> list[httpx.Response]:
            return list(
                await asyncio.gather(
                    *(self._client.request(m, u, headers=self.headers, **kw) for m, u, kw in calls)
                )
            )

        return self.portal.call(run)

    def with_token(self, token: str | None) -> Running:
        return Running(self.app, self.portal, token)

    @property
    def registry(self) -> Any:
        return self.app.state.registry


@contextmanager
def running(app: FastAPI, token: str | None = None) -> Iterator[Running]:
    """Start ``app`` (its lifespan) and yield a client for it; stop it on exit."""
    with start_blocking_portal() as portal:
        lifespan: AbstractContextManager[Any] = portal.wrap_async_context_manager(
            app.router.lifespan_context(app)
        )
        with lifespan:
            yield Running(app, portal, token)


@contextmanager
def served(app: FastAPI) -> Iterator[str]:
    """``app`` served by uvicorn on a free loopback port, in a thread; yields its base URL."""
    port = free_port()
    server = uvicorn.Server(
        uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning", lifespan="on")
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        assert time.monotonic() < deadline, "the service did not start"
        time.sleep(0.02)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=20)


def with_text_prints(state: dict[str, Any], features_of: Callable[[str], Any]) -> None:
    """Make a stream state (``Stream.to_state``, parsed JSON) one of version 1, whose prints
    were text digests (``service.streams.fingerprint``) of each id's features."""
    assert state["version"] == 2
    state["version"] = 1
    for entry in state["pending"]:  # [id, t, keys, vals, votes, epochs, print]
        entry[6] = fingerprint(features_of(entry[0]))
    for entry in state["resolved"]:  # [id, kind, at, print, label, votes, wrong, updated]
        entry[3] = fingerprint(features_of(entry[0]))
