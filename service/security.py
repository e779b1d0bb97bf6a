"""Who may do what: the admin token, stream-scoped tokens, and the metrics token.

With no token configured the service is open to anyone who can reach it, which is why
``mistake-ledger serve`` then refuses any address but loopback (:func:`is_loopback`). With tokens,
every request under ``/v1`` and ``/metrics`` carries ``Authorization: Bearer <token>``:

- the admin token may do everything: create, list, show and delete streams, and use them;
- a stream token may predict, send feedback and examples, and read the description, ledger and
  comparison of the streams it names (ids or glob patterns such as ``lockers-*``), and list them;
- the metrics token (or the admin token) may read ``/metrics``.

A request without a known token gets 401; a known token outside its scope gets 403.
``/healthz`` and ``/readyz`` are open. Tokens are compared in constant time.
"""

from __future__ import annotations

import fnmatch
import hmac
import ipaddress
from dataclasses import dataclass
from typing import Literal

from service.errors import Forbidden, Unauthorized
from service.settings import Settings

Role = Literal["open", "admin", "stream", "metrics"]


@dataclass(frozen=True)
class Principal:
    """The holder of a request's token."""

    role: Role
    scopes: tuple[str, ...] = ()

    def may_use(self, stream: str) -> bool:
        if self.role in ("open", "admin"):
            return True
        if self.role == "stream":
            return any(fnmatch.fnmatchcase(stream, pattern) for pattern in self.scopes)
        return False


class Guard:
    """Turns a bearer token into a :class:`Principal` and checks scopes."""

    def __init__(self, settings: Settings) -> None:
        self.secured = settings.secured
        self._admin = _secret(settings.admin_token)
        self._metrics = _secret(settings.metrics_token)
        self._streams = [
            (token.encode(), tuple(scopes)) for token, scopes in settings.stream_tokens.items()
        ]

    def identify(self, token: str | None) -> Principal:
        if not self.secured:
            return Principal("open")
        if not token:
            raise Unauthorized(
                "This service needs a bearer token: send 'Authorization: Bearer <token>'.",
                field="Authorization",
                rule="a bearer token",
                value=None,
            )
        given = token.encode()
        found: Principal | None = None
        # Compare with every token, so the time taken does not tell which one matched.
        if self._admin is not None and hmac.compare_digest(given, self._admin):
            found = Principal("admin")
        if self._metrics is not None and hmac.compare_digest(given, self._metrics):
            found = found or Principal("metrics")
        for secret, scopes in self._streams:
            if hmac.compare_digest(given, secret):
                found = found or Principal("stream", scopes)
        if found is None:
            raise Unauthorized(
                "The bearer token is not one this service knows.",
                field="Authorization",
                rule="a configured token",
                value="<hidden>",
            )
        return found

    def admin(self, who: Principal, action: str) -> None:
        if who.role not in ("open", "admin"):
            raise Forbidden(
                f"Only the admin token may {action}.",
                field="Authorization",
                rule="admin token",
                value=who.role,
            )

    def stream(self, who: Principal, stream: str) -> None:
        if not who.may_use(stream):
            raise Forbidden(
                f"This token may not use stream {stream!r}.",
                field="stream",
                rule="a stream in the token's scope",
                value=stream,
            )

    def metrics(self, who: Principal) -> None:
        if who.role not in ("open", "admin", "metrics"):
            raise Forbidden(
                "Only the metrics or admin token may read the metrics.",
                field="Authorization",
                rule="metrics or admin token",
                value=who.role,
            )


def bearer_token(authorization: str | None) -> str | None:
    """The token of an ``Authorization: Bearer <token>`` header value, else None (read as
    FastAPI's HTTPBearer reads it: the scheme in any case, the token stripped)."""
    if not authorization:
        return None
    scheme, _, token = authorization.partition(" ")
    token = token.strip()
    if not scheme or not token or scheme.lower() != "bearer":
        return None
    return token


def _secret(value: object) -> bytes | None:
    if value is None:
        return None
    return str(value.get_secret_value()).encode()  # type: ignore[attr-defined]


def is_loopback(host: str) -> bool:
    """True for addresses that only this machine can reach (127.0.0.0/8, ::1, localhost)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False
