"""deploy/proxy/mistake-ledger.conf: nginx routes each stream to one shard by consistent hashing.

nginx (Debian's package) is the outside reference: ``nginx -t`` parses the config, and the
end-to-end test runs nginx on loopback in front of small stand-in shards (plain HTTP servers that
say who they are) to check the routing itself, including the consistent-hashing property: when a
shard is added, a stream either stays where it was or moves to the new shard, never between the
old ones (the ring construction of consistent hashing; nginx docs, ngx_http_upstream_hash_module,
"consistent" = ketama). The last test puts real services behind it and moves the streams that
hash to an added shard by export and import, as deploy/README.md tells an operator to.
"""

from __future__ import annotations

import http.client
import json
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest
import uvicorn

from service.client import LedgerClient
from service.demo import free_port
from tests.deploy.tools import DEPLOY

CONF = DEPLOY / "proxy" / "mistake-ledger.conf"
STREAMS = [f"stream-{i:02d}" for i in range(40)]


def main_config(tmp: Path, include: Path) -> Path:
    """A minimal nginx.conf around the shipped http-context file, writing only inside tmp."""
    temp = {name: tmp / name for name in ("body", "proxy", "fastcgi", "uwsgi", "scgi")}
    text = f"""
pid {tmp / "nginx.pid"};
error_log stderr warn;
worker_processes 1;
events {{ worker_connections 64; }}
http {{
    access_log off;
    client_body_temp_path {temp["body"]};
    proxy_temp_path {temp["proxy"]};
    fastcgi_temp_path {temp["fastcgi"]};
    uwsgi_temp_path {temp["uwsgi"]};
    scgi_temp_path {temp["scgi"]};
    include {include};
}}
"""
    path = tmp / "nginx.conf"
    path.write_text(text)
    return path


def test_nginx_accepts_the_config(nginx: str, tmp_path: Path) -> None:
    conf = main_config(tmp_path, CONF)
    result = subprocess.run(
        [nginx, "-t", "-q", "-p", str(tmp_path), "-e", "stderr", "-c", str(conf)],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert result.returncode == 0, result.stderr


# ---------------------------------------------------------------- end to end


class Shard:
    """A stand-in shard: answers every request with its name and records what it received."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.seen: list[tuple[str, str, dict[str, str]]] = []
        shard = self

        class Handler(BaseHTTPRequestHandler):
            def _answer(self) -> None:
                length = int(self.headers.get("Content-Length") or 0)
                self.rfile.read(length)
                shard.seen.append((self.command, self.path, dict(self.headers)))
                body = json.dumps({"shard": shard.name}).encode()
                self.send_response(200)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            do_GET = do_POST = do_DELETE = _answer

            def log_message(self, format: str, *args: object) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.port = self.server.server_address[1]
        self.thread = threading.Thread(
            target=self.server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True
        )
        self.thread.start()

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()


class Proxy:
    """The shipped config with its example addresses replaced by the stand-ins' ports."""

    def __init__(
        self, nginx: str, tmp: Path, shards: list[Shard], hold: tuple[str, ...] = ()
    ) -> None:
        text = CONF.read_text()
        if hold:  # streams on hold, in the map the config ships for it (commented out)
            example = "    # lockers-north  1;"
            assert text.count(example) == 1
            text = text.replace(example, "\n".join(f"    {stream}  1;" for stream in hold))
        lines = [line for line in text.splitlines() if line.strip().startswith("server 127.")]
        assert [line.split()[1] for line in lines] == ["127.0.0.1:8000", "127.0.0.1:8001"]
        template = lines[1]
        servers = [template.replace("127.0.0.1:8001", f"127.0.0.1:{s.port}") for s in shards]
        text = text.replace(lines[0] + "\n" + lines[1], "\n".join(servers))
        self.port = free_port()
        assert "listen 127.0.0.1:8080;" in text
        text = text.replace("listen 127.0.0.1:8080;", f"listen 127.0.0.1:{self.port};")
        tmp.mkdir(parents=True, exist_ok=True)
        (tmp / "routes.conf").write_text(text)
        conf = main_config(tmp, tmp / "routes.conf")
        self.process = subprocess.Popen(
            [nginx, "-p", str(tmp), "-e", "stderr", "-c", str(conf), "-g", "daemon off;"],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
        deadline = time.monotonic() + 10
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=0.2).close()
                break
            except OSError:
                if self.process.poll() is not None or time.monotonic() > deadline:
                    self.stop()
                    raise RuntimeError("nginx did not start") from None
                time.sleep(0.02)

    def request(
        self, method: str, path: str, headers: dict[str, str] | None = None, body: bytes = b""
    ) -> tuple[int, dict[str, object]]:
        status, _, data = self.exchange(method, path, headers, body)
        return status, data

    def exchange(
        self, method: str, path: str, headers: dict[str, str] | None = None, body: bytes = b""
    ) -> tuple[int, dict[str, str], dict[str, object]]:
        """One request: status, response headers (lower-case names) and the JSON body."""
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=10)
        try:
            conn.request(method, path, body=body or None, headers=headers or {})
            response = conn.getresponse()
            payload = response.read()
            answer_headers = {k.lower(): v for k, v in response.getheaders()}
        finally:
            conn.close()
        try:
            data = json.loads(payload) if payload else {}
        except json.JSONDecodeError:
            data = {"raw": payload.decode(errors="replace")}
        return response.status, answer_headers, data

    def shard_of(self, stream: str) -> object:
        status, data = self.request("GET", f"/v1/streams/{stream}/ledger")
        assert status == 200, (stream, status, data)
        return data["shard"]

    def stop(self) -> None:
        self.process.terminate()
        try:
            self.process.wait(timeout=10)
        finally:
            if self.process.stderr is not None:
                self.process.stderr.close()


@pytest.fixture
def shards() -> Iterator[list[Shard]]:
    started = [Shard(name) for name in ("a", "b", "c")]
    yield started
    for shard in started:
        shard.stop()


@pytest.mark.slow
def test_routes_each_stream_to_one_shard(nginx: str, tmp_path: Path, shards: list[Shard]) -> None:
    a, b, _ = shards
    proxy = Proxy(nginx, tmp_path / "two", [a, b])
    try:
        home = {stream: proxy.shard_of(stream) for stream in STREAMS}
        # Both shards hold streams.
        assert set(home.values()) == {"a", "b"}
        # Every route of a stream goes to its shard, with path and token unchanged.
        for stream in STREAMS[:10]:
            for method, suffix in [
                ("POST", "/predict"),
                ("POST", "/feedback"),
                ("POST", "/examples"),
                ("GET", "/compare"),
                ("GET", ""),
                ("DELETE", ""),
            ]:
                path = f"/v1/streams/{stream}{suffix}"
                status, data = proxy.request(
                    method, path, {"Authorization": "Bearer t0k3n-of-the-stream"}, b"{}"
                )
                assert (status, data) == (200, {"shard": home[stream]}), (method, path)
                served = a if home[stream] == "a" else b
                seen_method, seen_path, seen_headers = served.seen[-1]
                assert (seen_method, seen_path) == (method, path)
                assert seen_headers["Authorization"] == "Bearer t0k3n-of-the-stream"
        # A create goes where the stream's later requests go, picked by the header.
        for stream in STREAMS[:10]:
            body = json.dumps({"stream": stream, "features": 4}).encode()
            status, data = proxy.request(
                "POST", "/v1/streams", {"Mistake-Ledger-Stream": stream}, body
            )
            assert (status, data) == (200, {"shard": home[stream]})
            assert (a if home[stream] == "a" else b).seen[-1][:2] == ("POST", "/v1/streams")
    finally:
        proxy.stop()


@pytest.mark.slow
def test_refuses_what_it_cannot_route(nginx: str, tmp_path: Path, shards: list[Shard]) -> None:
    a, b, _ = shards
    proxy = Proxy(nginx, tmp_path / "two", [a, b])
    try:
        cases = [
            ("POST", "/v1/streams", {}, 400, "Mistake-Ledger-Stream"),
            ("POST", "/v1/streams", {"Mistake-Ledger-Stream": "Not A Stream"}, 400, None),
            ("GET", "/v1/streams", {}, 400, None),
            ("GET", "/v1/streams/", {}, 404, "stream"),
            ("POST", "/v1/streams/-bad/predict", {}, 404, "stream"),
            ("GET", "/metrics", {}, 404, "path"),
            ("GET", "/readyz", {}, 404, "path"),
        ]
        for method, path, headers, status, field in cases:
            got, data = proxy.request(method, path, headers, b"{}")
            assert got == status, (method, path, got, data)
            error = data["error"]
            assert isinstance(error, dict) and error["status"] == status
            if field is not None:
                assert error["field"] == field
        assert proxy.request("GET", "/healthz") == (200, {"status": "ok", "by": "proxy"})
        # None of these reached a shard.
        assert a.seen == [] and b.seen == []
    finally:
        proxy.stop()


@pytest.mark.slow
def test_a_down_shard_keeps_its_streams(nginx: str, tmp_path: Path, shards: list[Shard]) -> None:
    a, b, _ = shards
    proxy = Proxy(nginx, tmp_path / "two", [a, b])
    try:
        home = {stream: proxy.shard_of(stream) for stream in STREAMS}
        b.stop()
        for _ in range(3):  # repeated failures must not take b out of the ring
            for stream in STREAMS:
                status, data = proxy.request("POST", f"/v1/streams/{stream}/predict", {}, b"{}")
                if home[stream] == "b":
                    assert status == 502, (stream, status, data)
                else:
                    assert (status, data) == (200, {"shard": "a"})
        # Shard a never saw a request for one of b's streams.
        served_by_a = {path.split("/")[3] for _, path, _ in a.seen}
        assert served_by_a == {s for s, shard in home.items() if shard == "a"}
    finally:
        proxy.stop()


@pytest.mark.slow
def test_adding_a_shard_moves_streams_only_to_it(
    nginx: str, tmp_path: Path, shards: list[Shard]
) -> None:
    a, b, c = shards
    two = Proxy(nginx, tmp_path / "two", [a, b])
    try:
        before = {stream: two.shard_of(stream) for stream in STREAMS}
    finally:
        two.stop()
    three = Proxy(nginx, tmp_path / "three", [a, b, c])
    try:
        after = {stream: three.shard_of(stream) for stream in STREAMS}
    finally:
        three.stop()
    moved = {s for s in STREAMS if after[s] != before[s]}
    assert moved, "no stream moved to the new shard"
    assert all(after[s] == "c" for s in moved), {s: (before[s], after[s]) for s in moved}
    # (How many move depends on the new shard's share of the ring, which varies with its address;
    # plain modulo hashing would also move streams between a and b, which this rules out.)


@pytest.mark.slow
def test_an_import_goes_where_its_stream_lives(
    nginx: str, tmp_path: Path, shards: list[Shard]
) -> None:
    a, b, _ = shards
    proxy = Proxy(nginx, tmp_path / "two", [a, b])
    try:
        home = {stream: proxy.shard_of(stream) for stream in [*STREAMS, "import"]}
        for stream in STREAMS[:10]:
            # POST /v1/streams/import names its stream in the document: routed by the header.
            body = json.dumps({"stream": stream, "state": {}}).encode()
            status, data = proxy.request(
                "POST", "/v1/streams/import", {"Mistake-Ledger-Stream": stream}, body
            )
            assert (status, data) == (200, {"shard": home[stream]}), stream
            served = a if home[stream] == "a" else b
            assert served.seen[-1][:2] == ("POST", "/v1/streams/import")
            # The export of that stream goes by the path, to the same shard.
            status, data = proxy.request("GET", f"/v1/streams/{stream}/export")
            assert (status, data) == (200, {"shard": home[stream]})
        seen = len(a.seen) + len(b.seen)
        status, data = proxy.request("POST", "/v1/streams/import", {}, b"{}")
        error = data["error"]
        assert status == 400 and isinstance(error, dict)
        assert error["field"] == "Mistake-Ledger-Stream"
        assert len(a.seen) + len(b.seen) == seen
        # Other methods on that path name a stream called "import", routed by the path.
        for method in ("GET", "DELETE"):
            status, data = proxy.request(method, "/v1/streams/import")
            assert (status, data) == (200, {"shard": home["import"]}), method
    finally:
        proxy.stop()


@pytest.mark.slow
def test_a_stream_on_hold_gets_503_and_reaches_no_shard(
    nginx: str, tmp_path: Path, shards: list[Shard]
) -> None:
    a, b, _ = shards
    held = STREAMS[3]
    proxy = Proxy(nginx, tmp_path / "hold", [a, b], hold=(held,))
    try:
        requests = [
            ("POST", f"/v1/streams/{held}/predict", {}),
            ("POST", f"/v1/streams/{held}/feedback", {}),
            ("GET", f"/v1/streams/{held}/export", {}),
            ("GET", f"/v1/streams/{held}", {}),
            ("POST", "/v1/streams", {"Mistake-Ledger-Stream": held}),
            ("POST", "/v1/streams/import", {"Mistake-Ledger-Stream": held}),
        ]
        for method, path, headers in requests:
            status, answer_headers, data = proxy.exchange(method, path, headers, b"{}")
            assert status == 503, (method, path, status, data)
            # Retry-After: RFC 9110 section 10.2.3 (delay in seconds); the shape is the service's.
            assert answer_headers.get("retry-after") == "5", answer_headers
            error = data["error"]
            assert isinstance(error, dict)
            assert (error["status"], error["field"], error["value"]) == (503, "stream", held)
        assert a.seen == [] and b.seen == []
        # Every other stream is served as before.
        for stream in STREAMS[:3] + STREAMS[4:8]:
            status, data = proxy.request("POST", f"/v1/streams/{stream}/feedback", {}, b"{}")
            assert status == 200 and data["shard"] in ("a", "b"), (stream, status, data)
    finally:
        proxy.stop()


# ---------------------------------------------------------------- moving streams, for real


class Served:
    """A real service (its own store) served by uvicorn on a loopback port, in a thread."""

    def __init__(self, data_dir: Path) -> None:
        from prometheus_client import CollectorRegistry

        from service.app import create_app
        from service.settings import Settings

        app = create_app(Settings.from_env({}, data_dir=data_dir), registry=CollectorRegistry())
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.server = uvicorn.Server(
            uvicorn.Config(app, host="127.0.0.1", port=self.port, log_level="warning")
        )
        self.thread = threading.Thread(target=self.server.run, daemon=True)
        self.thread.start()
        deadline = time.monotonic() + 20
        while not self.server.started:
            assert time.monotonic() < deadline, "the service did not start"
            time.sleep(0.02)

    def holds(self, stream: str) -> bool:
        with LedgerClient(self.url, retries=0) as client:
            return client.has_stream(stream)

    def stop(self) -> None:
        self.server.should_exit = True
        self.thread.join(timeout=20)


@pytest.mark.slow
def test_adding_a_shard_moves_its_streams_by_export_and_import(nginx: str, tmp_path: Path) -> None:
    """The procedure of deploy/README.md, "Moving a stream between shards", end to end."""
    a, b = Served(tmp_path / "a"), Served(tmp_path / "b")
    c: Served | None = None
    proxies: list[Proxy] = []
    try:
        two = Proxy(nginx, tmp_path / "two", [a, b])
        proxies.append(two)
        streams = [f"lockers-{i:02d}" for i in range(12)]
        json_type = {"Content-Type": "application/json"}
        for stream in streams:
            spec = {
                "stream": stream,
                "features": 8,
                "learners": [{"name": "p", "kind": "perceptron"}],
            }
            status, data = two.request(
                "POST",
                "/v1/streams",
                {**json_type, "Mistake-Ledger-Stream": stream},
                json.dumps(spec).encode(),
            )
            assert status == 201, data
            items = [{"id": f"{stream}-{k}", "features": {"f0": k % 2, "f1": 1}} for k in range(6)]
            body = json.dumps({"items": items}).encode()
            assert two.request("POST", f"/v1/streams/{stream}/predict", json_type, body)[0] == 200
            labels = [{"id": item["id"], "label": k % 2} for k, item in enumerate(items[:4])]
            body = json.dumps({"items": labels}).encode()
            assert two.request("POST", f"/v1/streams/{stream}/feedback", json_type, body)[0] == 200
        before = {s: two.request("GET", f"/v1/streams/{s}/ledger")[1] for s in streams}

        # 1. A new shard, and the new list of shards tried on a spare proxy: the streams that
        #    now hash to the new shard are the ones it does not know (404).
        c = Served(tmp_path / "c")
        spare = Proxy(nginx, tmp_path / "spare", [a, b, c])
        moving = [s for s in streams if spare.request("GET", f"/v1/streams/{s}")[0] == 404]
        spare.stop()
        assert moving and len(moving) < len(streams)
        # 2. Hold them on the proxy in service (a reload with the hold map filled in).
        two.stop()
        proxies.remove(two)
        held = Proxy(nginx, tmp_path / "held", [a, b], hold=tuple(moving))
        proxies.append(held)
        for stream in moving:
            status, _ = held.request("POST", f"/v1/streams/{stream}/feedback", json_type, b"{}")
            assert status == 503
        # 3. Export each from its shard, import it into the new one (shard addresses).
        for stream in moving:
            old = a if a.holds(stream) else b
            with LedgerClient(old.url) as source, LedgerClient(c.url) as target:
                document = source.export_stream(stream)
                target.import_stream(document)
                assert source.export_stream(stream)["seq"] == document["seq"]  # nothing since
        # 4. The new list of shards, nothing on hold; 5. delete the old copies.
        held.stop()
        proxies.remove(held)
        three = Proxy(nginx, tmp_path / "three", [a, b, c])
        proxies.append(three)
        for stream in moving:
            with LedgerClient(a.url if a.holds(stream) else b.url) as old_shard:
                old_shard.delete_stream(stream)
        for stream in streams:
            assert three.request("GET", f"/v1/streams/{stream}/ledger")[1] == before[stream]
            assert [s.holds(stream) for s in (a, b, c)].count(True) == 1
            # A label for a prediction made before the move is applied where the stream is now.
            body = json.dumps({"id": f"{stream}-5", "label": 1}).encode()
            status, data = three.request("POST", f"/v1/streams/{stream}/feedback", json_type, body)
            assert (status, data["status"]) == (200, "applied"), (stream, data)
        assert all(c.holds(s) for s in moving)
    finally:
        for proxy in proxies:
            proxy.stop()
        for served in (a, b, c):
            if served is not None:
                served.stop()
