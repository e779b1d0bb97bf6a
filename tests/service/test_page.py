"""The live page at ``/``: it is served, it loads nothing from outside, and its files ship."""

from __future__ import annotations

import fnmatch
import re
import tomllib
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urlsplit

import pytest

from service import page
from tests.service.conftest import MakeApp
from tests.service.harness import Running, running

ROOT = Path(__file__).resolve().parents[2]
STATIC = ROOT / "service" / "static"
LOOPBACK = {"127.0.0.1", "localhost", "::1", "[::1]"}
# XML namespace names are identifiers that are never fetched (W3C, Namespaces in XML 1.0, sec. 2.2);
# inline SVG needs this one.
NAMESPACES = {"http://www.w3.org/2000/svg"}
URL = re.compile(r"""(?:https?:)?//[^\s"'`<>)]+""", re.IGNORECASE)


@pytest.fixture()
def client(service: Running) -> Running:
    """The whole service app (conftest), so the test sees the page where it is mounted."""
    return service


class _Links(HTMLParser):
    """Every URL-valued attribute of the page, with the tag it sits on."""

    ATTRS = {"src", "href", "action", "formaction", "poster", "data", "srcset", "manifest"}

    def __init__(self) -> None:
        super().__init__()
        self.links: list[tuple[str, str]] = []
        self.ids: set[str] = set()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        for name, value in attrs:
            if name == "id" and value:
                self.ids.add(value)
            if name in self.ATTRS and value:
                self.links.append((tag, value))


def _parse(html: str) -> _Links:
    parser = _Links()
    parser.feed(html)
    return parser


def _remote(url: str) -> bool:
    """True for a URL that would leave the machine (absolute or scheme-relative, not loopback)."""
    parts = urlsplit(url)
    if not parts.netloc and not parts.scheme:
        return False
    return parts.hostname not in {h.strip("[]") for h in LOOPBACK}


def test_root_serves_the_page_as_html(client: Running) -> None:
    response = client.get("/")
    assert response.status_code == 200
    assert response.headers["content-type"] == "text/html; charset=utf-8"
    assert "<title>mistake-ledger</title>" in response.text
    # The browser itself refuses anything but this origin (CSP Level 3, W3C).
    policy = response.headers["content-security-policy"]
    assert "default-src 'none'" in policy
    assert "connect-src 'self'" in policy
    assert "script-src 'self'" in policy


def test_page_needs_no_token_but_its_data_does(make_app: MakeApp) -> None:
    with running(make_app({"MISTAKE_LEDGER_ADMIN_TOKEN": "page-admin-0123456789"})) as app:
        assert app.get("/").status_code == 200
        assert app.get("/static/page.js").status_code == 200
        assert app.get("/v1/streams").status_code == 401
        admin = app.with_token("page-admin-0123456789")
        assert admin.get("/v1/streams").status_code == 200


def test_page_references_only_local_assets_and_each_is_served(client: Running) -> None:
    links = _parse(client.get("/").text).links
    assets = [url for tag, url in links if tag in {"script", "link", "img"}]
    assert {"/static/page.js", "/static/page.css", "/static/icon.svg"} <= set(assets)
    for _tag, url in links:
        assert not _remote(url), f"the page links to {url!r}, outside this service"
    # Content types: text/javascript (RFC 9239), text/css (RFC 2318), image/svg+xml (IANA).
    expected = {".js": "text/javascript", ".css": "text/css", ".svg": "image/svg+xml"}
    for url in assets:
        response = client.get(url)
        assert response.status_code == 200, url
        kind = response.headers["content-type"].split(";")[0]
        assert kind == expected[Path(url).suffix], (url, kind)
        assert response.headers["x-content-type-options"] == "nosniff"


ASSETS = sorted(p.relative_to(STATIC).as_posix() for p in STATIC.rglob("*") if p.is_file())


@pytest.mark.parametrize("name", ASSETS)
def test_no_asset_names_a_remote_address(name: str) -> None:
    text = (STATIC / name).read_text(encoding="utf-8")
    remote = [u for u in URL.findall(text) if u not in NAMESPACES and _remote(u)]
    assert remote == [], f"{name} names addresses outside this service: {remote}"


def test_script_only_uses_elements_the_page_has() -> None:
    ids = _parse((STATIC / "index.html").read_text(encoding="utf-8")).ids
    used = set(re.findall(r"""\$\("([\w-]+)"\)""", (STATIC / "page.js").read_text("utf-8")))
    assert used, "the script looks up no element by id: the pattern above is stale"
    assert used - ids == set()


@pytest.mark.parametrize(
    "path",
    [
        "/static/missing.css",
        "/static/%2E%2E/secret.css",  # leaves the folder once decoded
        "/static/..%2Fsecret.css",
        "/static/inner/%2E%2E/%2E%2E/secret.css",
        "/static/notes.py",  # a kind of file the page never serves
        "/static/",
    ],
)
def test_nothing_outside_the_assets_is_served(
    client: Running, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, path: str
) -> None:
    (tmp_path / "static" / "inner").mkdir(parents=True)
    (tmp_path / "static" / "shown.css").write_text("p {}")
    (tmp_path / "static" / "notes.py").write_text("x = 1")
    (tmp_path / "secret.css").write_text("p {}")
    monkeypatch.setattr(page, "STATIC", tmp_path / "static")
    assert client.get("/static/shown.css").status_code == 200
    assert client.get(path).status_code == 404


def _glob(path: str, pattern: str) -> bool:
    """Glob match where ``*`` stays inside one folder, as package-data patterns do."""
    parts, wanted = path.split("/"), pattern.split("/")
    return len(parts) == len(wanted) and all(map(fnmatch.fnmatchcase, parts, wanted))


@pytest.mark.parametrize("name", ASSETS)
def test_every_asset_is_package_data(name: str) -> None:
    """A wheel carries only the files the package-data patterns match (setuptools docs)."""
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    patterns = config["tool"]["setuptools"]["package-data"]["service"]
    assert any(_glob(f"static/{name}", p) for p in patterns), (name, patterns)
