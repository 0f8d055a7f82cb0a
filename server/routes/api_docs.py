"""The API documentation page ``/docs``, served offline from the installed ``swagger-ui-py`` package.

FastAPI's default page loads Swagger UI from a CDN and starts it with an inline script; the server's
Content-Security-Policy (``script-src 'self'``, no remote origins) blocks both, and a plant network is
often offline. Here the page, its assets and its start-up script all come from this server: the assets
from the package's own files (a fixed list, never a path from the request), the start-up script from a
constant below. ``/openapi.json`` stays FastAPI's.
"""

from __future__ import annotations

from pathlib import Path

from fastapi import APIRouter
from fastapi.responses import FileResponse, HTMLResponse, Response

from server.errors import NotFound

router = APIRouter(include_in_schema=False)

ASSETS = {"swagger-ui-bundle.js": "text/javascript", "swagger-ui.css": "text/css",
          "favicon-32x32.png": "image/png"}
INIT_JS = """window.addEventListener("load", function () {
  window.ui = SwaggerUIBundle({ url: "/openapi.json", dom_id: "#swagger-ui", deepLinking: true,
    presets: [SwaggerUIBundle.presets.apis], layout: "BaseLayout" });
});
"""
PAGE = """<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>halfwatch API</title>
<link rel="stylesheet" href="/docs/assets/swagger-ui.css">
<link rel="icon" type="image/png" href="/docs/assets/favicon-32x32.png"></head>
<body><p style="margin:1em 2em;font-family:sans-serif">halfwatch is condition monitoring, not a machine
protection or trip system. Every amplitude field names its measure (peak or r.m.s., acceleration or
velocity, unit).</p>
<div id="swagger-ui"></div>
<script src="/docs/assets/swagger-ui-bundle.js"></script>
<script src="/docs/assets/halfwatch-init.js"></script>
</body></html>
"""


def _asset_dir() -> Path:
    """The Swagger UI 5 files shipped inside the ``swagger-ui-py`` package (OpenAPI 3.1 capable)."""
    import swagger_ui

    return Path(swagger_ui.__file__).parent / "static"


@router.get("/docs")
def docs_page() -> HTMLResponse:
    return HTMLResponse(PAGE)


@router.get("/docs/assets/{name}")
def docs_asset(name: str) -> Response:
    if name == "halfwatch-init.js":
        return Response(INIT_JS, media_type="text/javascript")
    if name not in ASSETS:
        raise NotFound(f"no documentation asset {name!r}; the page is /docs", field="name")
    return FileResponse(_asset_dir() / name, media_type=ASSETS[name],
                        headers={"Cache-Control": "public, max-age=86400"})
