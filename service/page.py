"""The live page at ``/``: one HTML file and its assets, served from ``service/static/``.

The page is static; it reads the JSON API (``/v1/streams`` and each stream's ledger) from the
browser and polls it, so this module only serves files. It is mounted with one line::

    app.include_router(page.router)

Only files inside ``static/`` are served, each with a content type from a fixed table (the host's
MIME database is not consulted, so the answer is the same on every machine), and every response
carries a Content-Security-Policy that lets the page load and call nothing but its own origin.
"""

from __future__ import annotations

from pathlib import Path

from fastapi import APIRouter, HTTPException
from fastapi.responses import FileResponse, HTMLResponse

STATIC = Path(__file__).resolve().parent / "static"

CONTENT_TYPES = {
    ".html": "text/html; charset=utf-8",
    ".css": "text/css; charset=utf-8",
    ".js": "text/javascript; charset=utf-8",
    ".svg": "image/svg+xml",
    ".png": "image/png",
}

# The page fetches JSON from its own origin only and runs no inline script.
POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
    "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)
HEADERS = {
    "Content-Security-Policy": POLICY,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-cache",
}

router = APIRouter(include_in_schema=False)


@router.get("/", response_class=HTMLResponse)
def index() -> HTMLResponse:
    """The live page."""
    return HTMLResponse((STATIC / "index.html").read_text(encoding="utf-8"), headers=HEADERS)


@router.get("/static/{path:path}")
def asset(path: str) -> FileResponse:
    """One file from ``static/``; 404 for anything else, including paths that leave the folder."""
    target = (STATIC / path).resolve()
    kind = CONTENT_TYPES.get(target.suffix.lower())
    if kind is None or not target.is_relative_to(STATIC) or not target.is_file():
        raise HTTPException(status_code=404, detail=f"No page asset named {path!r}.")
    return FileResponse(target, media_type=kind, headers=HEADERS)
