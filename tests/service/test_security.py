"""Tokens: 401 without a known token, 403 outside its scope; no token means loopback only."""

from __future__ import annotations

import json
import os

import pytest
from click.testing import CliRunner
from pydantic import ValidationError

from service.cli import main
from service.security import is_loopback
from service.settings import Settings
from tests.service.conftest import MakeApp
from tests.service.harness import Running, running

ADMIN = "admin-token-0123456789"
NORTH = "stream-token-north-0001"
METRICS = "metrics-token-01234567"
ENV = {
    "MISTAKE_LEDGER_ADMIN_TOKEN": ADMIN,
    "MISTAKE_LEDGER_STREAM_TOKENS": json.dumps({NORTH: ["north", "west-*"]}),
    "MISTAKE_LEDGER_METRICS_TOKEN": METRICS,
}
PANEL = [{"name": "elim", "kind": "elimination"}]


def status(service: Running, method: str, url: str, body: object = None) -> int:
    return service.request(method, url, json=body).status_code


@pytest.fixture
def secured(make_app: MakeApp) -> Running:
    with running(make_app(ENV), token=ADMIN) as admin:
        for name in ("north", "south", "west-1"):
            body = {"stream": name, "features": 4, "learners": PANEL}
            assert admin.post("/v1/streams", json=body).status_code == 201
        admin.post("/v1/streams/north/predict", json={"id": "p", "features": ["a"]})
        yield admin


# RFC 9110 §15.5.2: 401 Unauthorized; RFC 6750 §3: WWW-Authenticate: Bearer on a 401.
# Health probes open to all: common practice. DESIGN.md (Security): tokens.
def test_without_a_token_everything_but_health_is_401(secured: Running) -> None:
    anonymous = secured.with_token(None)
    for method, url, body in [
        ("GET", "/v1/streams", None),
        ("POST", "/v1/streams", {"stream": "x", "features": 2, "learners": PANEL}),
        ("POST", "/v1/streams/north/predict", {"features": ["a"]}),
        ("POST", "/v1/streams/north/feedback", {"id": "p", "label": 1}),
        ("GET", "/v1/streams/north/ledger", None),
        ("DELETE", "/v1/streams/north", None),
        ("GET", "/metrics", None),
    ]:
        response = anonymous.request(method, url, json=body)
        assert response.status_code == 401, (method, url)
        assert response.json()["error"]["field"] == "Authorization"
        assert response.headers["www-authenticate"] == "Bearer"
    assert anonymous.get("/healthz").status_code == 200
    assert anonymous.get("/readyz").status_code == 200
    wrong = secured.with_token("not-a-token-of-this-service")
    assert status(wrong, "GET", "/v1/streams/north/ledger") == 401


# DESIGN.md (Security): stream-scoped tokens for predict and feedback, admin for management.
# RFC 9110 §15.5.4: 403 Forbidden; RFC 6750 §3.1: insufficient scope is a 403.
def test_a_stream_token_uses_only_its_streams(secured: Running) -> None:
    north = secured.with_token(NORTH)
    assert status(north, "POST", "/v1/streams/north/predict", {"features": ["a"]}) == 200
    assert status(north, "POST", "/v1/streams/west-1/predict", {"features": ["a"]}) == 200
    assert status(north, "POST", "/v1/streams/north/feedback", {"id": "p", "label": 1}) == 200
    body = {"features": ["b"], "label": 0}
    assert status(north, "POST", "/v1/streams/north/examples", body) == 200
    assert status(north, "GET", "/v1/streams/north/ledger") == 200
    assert status(north, "GET", "/v1/streams/north/compare") == 200
    assert status(north, "GET", "/v1/streams/north") == 200
    listed = north.get("/v1/streams").json()["streams"]
    assert [s["stream"] for s in listed] == ["north", "west-1"]
    # Outside its scope: other streams, and stream management.
    for method, url, body in [
        ("POST", "/v1/streams/south/predict", {"features": ["a"]}),
        ("POST", "/v1/streams/south/feedback", {"id": "p", "label": 1}),
        ("POST", "/v1/streams/south/examples", {"features": ["a"], "label": 1}),
        ("GET", "/v1/streams/south/ledger", None),
        ("GET", "/v1/streams/south", None),
        ("POST", "/v1/streams", {"stream": "x", "features": 2, "learners": PANEL}),
        ("DELETE", "/v1/streams/north", None),
        ("GET", "/metrics", None),
    ]:
        response = north.request(method, url, json=body)
        assert response.status_code == 403, (method, url)
        assert response.json()["error"]["code"] == "forbidden"
    # Nothing happened to south.
    assert secured.get("/v1/streams/south/ledger").json()["learners"][0]["examples"] == 0


# A read-only scrape token: common practice; RFC 9110 §15.5.4: 403 Forbidden outside its scope.
def test_the_metrics_token_reads_metrics_only(secured: Running) -> None:
    reader = secured.with_token(METRICS)
    assert reader.get("/metrics").status_code == 200
    assert status(reader, "GET", "/v1/streams/north/ledger") == 403
    assert status(reader, "POST", "/v1/streams/north/predict", {"features": ["a"]}) == 403


# DESIGN.md (Security): an admin token for stream management.
def test_the_admin_token_manages_streams(secured: Running) -> None:
    assert secured.get("/metrics").status_code == 200
    assert len(secured.get("/v1/streams").json()["streams"]) == 3
    assert status(secured, "DELETE", "/v1/streams/south") == 200


# A minimum token length: common practice.
def test_short_tokens_are_refused() -> None:
    with pytest.raises(ValidationError):
        Settings.from_env({"MISTAKE_LEDGER_ADMIN_TOKEN": "short"})
    with pytest.raises(ValidationError):
        Settings.from_env({"MISTAKE_LEDGER_STREAM_TOKENS": '{"short": ["a"]}'})


# DESIGN.md (Security): no token configured means loopback only (common practice).
def test_serve_refuses_a_public_address_without_tokens(monkeypatch: pytest.MonkeyPatch) -> None:
    for key in list(os.environ):
        if key.startswith("MISTAKE_LEDGER_"):
            monkeypatch.delenv(key)
    result = CliRunner().invoke(main, ["serve", "--host", "0.0.0.0", "--port", "8999"])
    assert result.exit_code == 2
    assert "Refusing to listen on 0.0.0.0" in result.output
    assert "MISTAKE_LEDGER_ADMIN_TOKEN" in result.output


# 127.0.0.0/8 is loopback (RFC 1122 §3.2.1.3), ::1 too (RFC 4291 §2.5.3), "localhost" names it
# (RFC 6761 §6.3): from memory; 0.0.0.0 and :: mean every interface: common practice.
def test_loopback_addresses() -> None:
    for host in ("127.0.0.1", "127.1.2.3", "::1", "[::1]", "localhost"):
        assert is_loopback(host), host
    for host in ("0.0.0.0", "::", "10.0.0.1", "192.168.1.5", "example.org", ""):
        assert not is_loopback(host), host
