"""The API reference page at ``/docs`` (Swagger UI), served wholly by the service itself.

FastAPI's default page loads Swagger UI's script and style from a public CDN, so on an isolated plant
network it stays blank. Here the same page is built with FastAPI's ``get_swagger_ui_html`` but points
at ``/docs/assets/<file>``, served from the Swagger UI distribution the ``swagger-ui-py`` package
ships (its ``static`` folder, with Swagger UI's own licence file, served at ``/docs/assets/LICENSE``).

The page has a policy of its own: scripts and styles from this origin only, plus the one inline start-up
script FastAPI writes, allowed by its SHA-256 hash (no ``'unsafe-inline'``).
"""

from __future__ import annotations

import base64
import hashlib
import html
import importlib.util
import re
from pathlib import Path

from fastapi import FastAPI
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import FileResponse, HTMLResponse, JSONResponse, Response

__all__ = ["ASSETS_URL", "add_docs", "swagger_ui_dir"]

ASSETS_URL = "/docs/assets"
# The files the page needs, and the licence that travels with them; nothing else of the package is served.
_TYPES = {"swagger-ui-bundle.js": "text/javascript; charset=utf-8", "swagger-ui.css": "text/css; charset=utf-8",
          "favicon-32x32.png": "image/png", "LICENSE": "text/plain; charset=utf-8"}
_INLINE_SCRIPT = re.compile(r"<script>(.*?)</script>", re.DOTALL)
_LICENCE = (f'<p>Swagger UI is served from this service under the Apache License 2.0 '
            f'(<a href="{ASSETS_URL}/LICENSE">its licence</a>).</p>')


def swagger_ui_dir() -> Path:
    """The folder of Swagger UI's distribution files in the installed ``swagger-ui-py`` package.

    Found without importing the package (its import pulls in its web-framework helpers, unused here).
    """
    spec = importlib.util.find_spec("swagger_ui")
    if spec is None or not spec.submodule_search_locations:
        raise RuntimeError("the swagger-ui-py package is not installed (a runtime dependency of rwls)")
    return Path(next(iter(spec.submodule_search_locations))) / "static"


def _policy(page: str) -> str:
    """A Content-Security-Policy for ``page``: its own origin, and its inline scripts by hash."""
    hashes = " ".join("'sha256-" + base64.b64encode(hashlib.sha256(body.encode()).digest()).decode() + "'"
                      for body in _INLINE_SCRIPT.findall(page))
    # Swagger UI sets element styles through the DOM (which style-src allows) and draws icons from data: URIs.
    return (f"default-src 'none'; script-src 'self' {hashes}; style-src 'self'; "
            "img-src 'self' data:; font-src 'self' data:; connect-src 'self'; frame-ancestors 'none'; "
            "base-uri 'none'; form-action 'none'")


def add_docs(app: FastAPI, title: str, advisory: str) -> None:
    """``GET /docs`` (the page, with the advisory notice) and ``GET /docs/assets/<file>`` (script, style,
    icon and licence of Swagger UI).

    Call it on an app made with ``docs_url=None, redoc_url=None``.
    """
    folder = swagger_ui_dir()
    files = {name: folder / name for name in _TYPES}
    missing = [name for name, path in files.items() if not path.is_file()]
    if missing:
        raise RuntimeError(f"swagger-ui-py lacks {', '.join(missing)} in {folder}")
    page = bytes(get_swagger_ui_html(
        openapi_url=app.openapi_url or "/openapi.json", title=f"{title}: API reference",
        swagger_js_url=f"{ASSETS_URL}/swagger-ui-bundle.js", swagger_css_url=f"{ASSETS_URL}/swagger-ui.css",
        swagger_favicon_url=f"{ASSETS_URL}/favicon-32x32.png",
        # No validator badge: by default Swagger UI would ask a public validator about the document.
        swagger_ui_parameters={"validatorUrl": None},
    ).body).decode()
    notice = f'<p role="note"><strong>Advisory use only.</strong> {html.escape(advisory)}</p>'
    page = (page.replace("<html>", '<html lang="en">', 1)
            .replace('<div id="swagger-ui">', notice + '<div id="swagger-ui">', 1)
            .replace("</body>", _LICENCE + "\n</body>", 1))
    headers = {"Content-Security-Policy": _policy(page), "X-Content-Type-Options": "nosniff",
               "Referrer-Policy": "no-referrer", "Cache-Control": "no-cache"}

    @app.get("/docs", response_class=HTMLResponse, include_in_schema=False)
    def docs() -> HTMLResponse:
        return HTMLResponse(page, headers=headers)

    @app.get(ASSETS_URL + "/{name}", include_in_schema=False, response_model=None)
    def asset(name: str) -> Response:
        path = files.get(name)                    # only the files listed, never a path from the request
        if path is None:
            return JSONResponse({"detail": "not found"}, status_code=404)
        return FileResponse(path, media_type=_TYPES[name], headers=headers)
