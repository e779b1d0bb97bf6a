"""Webhook delivery of alerts, off the request path.

When a learner reaches exceeded or contradicted, the stream's alert (learner, state, count,
ceiling, evidence ids) is recorded in the ledger and, once its event is committed, handed to
:meth:`AlertSender.submit`, which only puts it on a queue. One background thread POSTs each alert
as JSON to the stream's webhook with a timeout, retrying with exponential backoff; a prediction
never waits for it. Only URLs in the settings' allow list are used: a stream cannot be created
with another one, and the list is checked again before each delivery.

Delivery is at most once per committed alert: alerts queued when the process stops, or whose
retries all fail, are logged and not sent again (the ledger keeps them).
"""

from __future__ import annotations

import contextlib
import logging
import queue
import threading
import time
from collections.abc import Callable
from typing import Any
from urllib.parse import urlsplit

import httpx

from service.settings import Settings

log = logging.getLogger("mistake_ledger.alerts")

QUEUE_LIMIT = 10_000


def allowed(url: str, allow: list[str]) -> bool:
    """True when ``url`` has the scheme, host and port of an allowed prefix, path under it."""
    try:
        target = urlsplit(url)
        target_port = target.port
    except ValueError:
        return False
    if target.scheme not in ("http", "https") or not target.hostname:
        return False
    if target.username or target.password:
        return False
    for prefix in allow:
        try:
            base = urlsplit(prefix)
            base_port = base.port
        except ValueError:
            continue
        if (
            base.scheme == target.scheme
            and base.hostname == target.hostname
            and (base_port or _default_port(base.scheme))
            == (target_port or _default_port(target.scheme))
            and _under(target.path or "/", base.path or "/")
        ):
            return True
    return False


def _default_port(scheme: str) -> int:
    return 443 if scheme == "https" else 80


def _under(path: str, base: str) -> bool:
    if base.endswith("/"):
        return path.startswith(base)
    return path == base or path.startswith(base + "/")


class AlertSender:
    """A queue and one thread that POSTs alerts to allow-listed webhooks."""

    def __init__(
        self,
        settings: Settings,
        *,
        post: Callable[[str, dict[str, Any], float], int] | None = None,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        self.allow = list(settings.webhook_allow)
        self.timeout = settings.webhook_timeout_seconds
        self.retries = settings.webhook_retries
        self.backoff = settings.webhook_backoff_seconds
        self._post = post or _post
        self._sleep = sleep
        self._queue: queue.Queue[tuple[str, dict[str, Any]] | None] = queue.Queue(QUEUE_LIMIT)
        self._thread: threading.Thread | None = None
        self.delivered = 0
        self.failed = 0
        self.dropped = 0

    def allowed(self, url: str) -> bool:
        return allowed(url, self.allow)

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="alert-sender", daemon=True)
        self._thread.start()

    def submit(self, url: str, alert: dict[str, Any]) -> None:
        """Queue one alert for delivery; never blocks."""
        try:
            self._queue.put_nowait((url, alert))
        except queue.Full:
            self.dropped += 1
            log.error("alert queue full; dropped an alert for %s", alert.get("stream"))

    def close(self, timeout: float = 5.0) -> None:
        if self._thread is None:
            return
        with contextlib.suppress(queue.Full):
            self._queue.put(None, timeout=timeout)
        self._thread.join(timeout)
        self._thread = None

    def _run(self) -> None:
        while True:
            job = self._queue.get()
            if job is None:
                return
            url, alert = job
            if self._deliver(url, alert):
                self.delivered += 1
            else:
                self.failed += 1

    def _deliver(self, url: str, alert: dict[str, Any]) -> bool:
        if not self.allowed(url):
            log.error("webhook %s is not in the allow list; alert not sent", url)
            return False
        for attempt in range(self.retries + 1):
            try:
                status = self._post(url, alert, self.timeout)
                if 200 <= status < 300:
                    return True
                log.warning("webhook %s answered %s (attempt %d)", url, status, attempt + 1)
            except httpx.HTTPError as exc:
                log.warning("webhook %s failed: %s (attempt %d)", url, exc, attempt + 1)
            if attempt < self.retries:
                self._sleep(self.backoff * 2**attempt)
        log.error("webhook %s: alert not delivered after %d attempts", url, self.retries + 1)
        return False


def _post(url: str, payload: dict[str, Any], timeout: float) -> int:
    response = httpx.post(
        url, json=payload, timeout=timeout, follow_redirects=False, trust_env=False
    )
    return response.status_code
