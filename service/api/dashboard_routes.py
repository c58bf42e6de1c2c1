"""The dashboard: one HTML page at ``/`` and its scripts and style under ``/ui`` (no build step).

The page is static; everything it shows comes from the same API the SCADA side uses, with the same
tokens. It is always served (like ``/api/v1/health``), since it holds no data of its own. A strict
Content-Security-Policy keeps it to its own scripts and to this origin.
"""

from __future__ import annotations

import html
from pathlib import Path

from fastapi import FastAPI
from fastapi.responses import FileResponse, HTMLResponse, JSONResponse, Response

__all__ = ["DASHBOARD_DIR", "add_dashboard"]

DASHBOARD_DIR = Path(__file__).with_name("dashboard")
_TYPES = {".js": "text/javascript; charset=utf-8", ".css": "text/css; charset=utf-8"}
_FILES = {p.name: p for p in DASHBOARD_DIR.iterdir() if p.suffix in _TYPES}
_HEADERS = {
    "Content-Security-Policy": "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
                               "connect-src 'self'; frame-ancestors 'none'; base-uri 'none'; form-action 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-cache",
}


def add_dashboard(app: FastAPI, advisory: str) -> None:
    """``GET /`` (the page, with the advisory notice) and ``GET /ui/<file>`` (its modules and style)."""
    page = (DASHBOARD_DIR / "index.html").read_text(encoding="utf-8").replace("{{ADVISORY}}", html.escape(advisory))

    @app.get("/", response_class=HTMLResponse, include_in_schema=False)
    def index() -> HTMLResponse:
        return HTMLResponse(page, headers=_HEADERS)

    @app.get("/ui/{name}", include_in_schema=False, response_model=None)
    def asset(name: str) -> Response:
        path = _FILES.get(name)                   # only the files shipped, never a path from the request
        if path is None:
            return JSONResponse({"detail": "not found"}, status_code=404)
        return FileResponse(path, media_type=_TYPES[path.suffix], headers=_HEADERS)
