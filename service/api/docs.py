"""The API documentation page, served from this host alone.

Swagger UI's script and stylesheet come from the installed ``swagger-ui-bundle-v2`` package
(a dependency; Swagger UI 5, which reads OpenAPI 3.1) and are served under
``/docs/assets/``: no request leaves the host, so the page works on an offline or
locked-down network. The validator badge (which would ask a public
service) is switched off. Without the package the page falls back to a plain list of the
routes with a link to ``/openapi.json``.
"""

from __future__ import annotations

import html
from importlib import import_module
from importlib.resources import files
from pathlib import Path
from typing import Any

from fastapi import APIRouter, FastAPI, Request, Response
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import HTMLResponse

from service.errors import NotFound

ASSETS = {
    "swagger-ui-bundle.js": "text/javascript",
    "swagger-ui.css": "text/css",
    "favicon-32x32.png": "image/png",
}
# Our own stylesheet on top of Swagger UI's (colours with enough contrast), from this package.
OWN_CSS = "evenhand-docs.css"
ASSET_PREFIX = "/docs/assets"


def swagger_ui_dir() -> Path | None:
    """Where the installed package keeps Swagger UI's files (None without the package)."""
    try:
        module: Any = import_module("swagger_ui_bundle")
    except ImportError:
        return None
    path = Path(module.swagger_ui_path)
    return path if all((path / name).is_file() for name in ASSETS) else None


def docs_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)
    folder = swagger_ui_dir()
    cache: dict[str, bytes] = {}

    @router.get("/docs")
    def docs_page(request: Request) -> HTMLResponse:
        if folder is None:
            return _route_list(request.app)
        page = get_swagger_ui_html(
            openapi_url="/openapi.json",
            title="Evenhand API",
            swagger_js_url=f"{ASSET_PREFIX}/swagger-ui-bundle.js",
            swagger_css_url=f"{ASSET_PREFIX}/swagger-ui.css",
            swagger_favicon_url=f"{ASSET_PREFIX}/favicon-32x32.png",
            swagger_ui_parameters={"validatorUrl": None, "persistAuthorization": False},
        )
        return HTMLResponse(_accessible(bytes(page.body).decode("utf-8")))

    @router.get(f"{ASSET_PREFIX}/{{file}}")
    def docs_asset(file: str) -> Response:
        if file == OWN_CSS:
            css = files("service.api").joinpath("static", "docs.css").read_bytes()
            return Response(css, media_type="text/css", headers={"Cache-Control": "max-age=86400"})
        media_type = ASSETS.get(file)
        if folder is None or media_type is None:
            raise NotFound(f"no documentation asset {file!r}")
        body = cache.get(file)
        if body is None:
            body = cache[file] = (folder / file).read_bytes()
        return Response(body, media_type=media_type, headers={"Cache-Control": "max-age=86400"})

    return router


def _accessible(page: str) -> str:
    """FastAPI's Swagger UI page with a language and our colour overrides after Swagger
    UI's stylesheet."""
    own = f'<link type="text/css" rel="stylesheet" href="{ASSET_PREFIX}/{OWN_CSS}">'
    page = page.replace("<html>", '<html lang="en">', 1)
    return page.replace("</head>", own + "\n</head>", 1)


def _route_list(app: FastAPI) -> HTMLResponse:
    items = []
    for path, operations in app.openapi()["paths"].items():
        for method, op in operations.items():
            summary = html.escape(str(op.get("summary", "")))
            items.append(f"<li><code>{method.upper()} {html.escape(path)}</code> {summary}</li>")
    page = (
        '<!doctype html><html lang="en"><head><meta charset="utf-8"><title>Evenhand API</title>'
        "</head><body><h1>Evenhand API</h1><p>The full description is the OpenAPI document "
        '<a href="/openapi.json">/openapi.json</a> (install <code>swagger-ui-bundle-v2</code> '
        f"for the interactive page).</p><ul>{''.join(items)}</ul></body></html>"
    )
    return HTMLResponse(page)
