"""HTML pages of the dashboard and its static files (plotly.js straight from the installed package).

Every page needs a login: without a session the browser is sent to ``/login?next=...``. A page a role
may not use answers 403 with an HTML page saying which role it needs. The pages are shells; their
scripts read the JSON API (``/api/v1/...`` and the helpers in :mod:`server.routes.dashboard`).
"""

from __future__ import annotations

import mimetypes
import unicodedata
from pathlib import Path
from urllib.parse import quote, urlsplit

from fastapi import APIRouter, Depends, Request
from fastapi.responses import FileResponse, HTMLResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from server.errors import NotFound
from server.security import Principal, optional_principal

WEB = Path(__file__).resolve().parents[2] / "web"
STATIC = WEB / "static"
TEMPLATES = WEB / "templates"
STATIC_CACHE = "public, max-age=300"

CAUTION = ("Condition monitoring only, not a machine protection or trip system. Site rules, the "
           "manufacturer's limits and local codes take precedence over anything shown here. Work on a "
           "machine follows the site's lockout and permit-to-work rules and is done by qualified people.")

#: the menu: (path, label, lowest role that sees it)
MENU = (("/", "Plant", "viewer"), ("/alarms", "Alarms", "viewer"), ("/routes", "Routes", "viewer"),
        ("/settings", "Settings", "viewer"))


def plotly_js_path() -> Path:
    import plotly

    return Path(plotly.__file__).parent / "package_data" / "plotly.min.js"


_templates = None


def templates():
    global _templates
    if _templates is None:
        from fastapi.templating import Jinja2Templates

        _templates = Jinja2Templates(directory=str(TEMPLATES))
        _templates.env.globals.update(caution=CAUTION, menu=MENU)
    return _templates


def render_error_page(request: Request, status: int, body: dict) -> Response | None:
    """HTML for errors of page paths; the API keeps its JSON (installed as app.state.html_error_renderer)."""
    path = request.url.path
    if path.startswith("/api/") or path.startswith("/static/") or path in ("/docs", "/openapi.json"):
        return None
    if status == 401:
        return RedirectResponse(f"/login?next={quote(path)}", status_code=303)
    message = (body.get("error") or {}).get("message") or "error"
    return templates().TemplateResponse(request, "error.html", {
        "status": status, "message": message, "principal": getattr(request.state, "principal", None),
        "simulated": request.app.state.settings.simulated_data, "page": "error"}, status_code=status)


async def page_principal(request: Request) -> Principal | None:
    """The logged-in user of a page (or None); installs the HTML error renderer on first use."""
    if getattr(request.app.state, "html_error_renderer", None) is None:
        request.app.state.html_error_renderer = render_error_page
    principal = await run_in_threadpool(optional_principal, request)
    if principal is not None:
        request.state.principal = principal
    return principal


router = APIRouter(include_in_schema=False)


def _login_redirect(request: Request) -> RedirectResponse:
    target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
    return RedirectResponse(f"/login?next={quote(target)}", status_code=303)


def _page(request: Request, principal: Principal | None, name: str, *, need: str = "viewer", **context):
    if principal is None:
        return _login_redirect(request)
    settings = request.app.state.settings
    if not principal.has_role(need):
        return templates().TemplateResponse(request, "error.html", {
            "status": 403, "principal": principal, "simulated": settings.simulated_data, "page": "error",
            "message": f"This page needs the {need} role; you are logged in as {principal.role}."},
            status_code=403)
    ctx = {"principal": principal, "simulated": settings.simulated_data, "page": name,
           "default_tz": settings.site_timezone, **context}
    return templates().TemplateResponse(request, f"{name}.html", ctx)


def safe_next_path(value: str | None) -> str:
    """Where the login page may send the browser afterwards: a path on this server, else ``/``.

    Browsers read ``\\`` as ``/`` and drop tabs and line breaks inside a URL, so ``/\\evil.example``
    and ``/<TAB>/evil.example`` mean ``//evil.example``, another host. A safe target starts with one
    ``/`` followed by neither ``/`` nor ``\\``, holds no backslash, whitespace or control character,
    and names no scheme or host. The login script (web/static/login.js) checks the same again."""
    v = value or ""
    if not v.startswith("/") or v[1:2] in ("/", "\\") or "\\" in v:
        return "/"
    if any(ch.isspace() or unicodedata.category(ch) in ("Cc", "Cf") for ch in v):
        return "/"
    parts = urlsplit(v)
    if parts.scheme or parts.netloc:
        return "/"
    return v


@router.get("/login", response_class=HTMLResponse)
async def login_page(request: Request, next: str = "/"):
    return templates().TemplateResponse(request, "login.html", {
        "principal": None, "next": safe_next_path(next), "page": "login",
        "simulated": request.app.state.settings.simulated_data})


@router.get("/", response_class=HTMLResponse)
async def overview_page(request: Request, principal: Principal | None = Depends(page_principal)):
    return _page(request, principal, "overview")


def _positive_id(value: int, field: str) -> int:
    if value < 1:
        raise NotFound(f"no {field.replace('_id', '')} {value}", field=field)
    return value


@router.get("/assets/{asset_id}", response_class=HTMLResponse)
async def asset_page(request: Request, asset_id: int, principal: Principal | None = Depends(page_principal)):
    return _page(request, principal, "asset", asset_id=_positive_id(asset_id, "asset_id"))


@router.get("/records/{record_id}", response_class=HTMLResponse)
async def record_page(request: Request, record_id: int,
                      principal: Principal | None = Depends(page_principal)):
    return _page(request, principal, "record", record_id=_positive_id(record_id, "record_id"))


@router.get("/points/{point_id}/window", response_class=HTMLResponse)
async def window_page(request: Request, point_id: int, principal: Principal | None = Depends(page_principal)):
    return _page(request, principal, "window", point_id=_positive_id(point_id, "point_id"))


@router.get("/alarms", response_class=HTMLResponse)
async def alarms_page(request: Request, principal: Principal | None = Depends(page_principal)):
    return _page(request, principal, "alarms")


@router.get("/routes", response_class=HTMLResponse)
async def routes_page(request: Request, principal: Principal | None = Depends(page_principal)):
    return _page(request, principal, "routes")


@router.get("/settings", response_class=HTMLResponse)
async def settings_page(request: Request, principal: Principal | None = Depends(page_principal)):
    return _page(request, principal, "settings", need="viewer")  # viewers: their own email alerts


@router.get("/static/plotly.min.js")
def plotly_js():
    return FileResponse(plotly_js_path(), media_type="text/javascript",
                        headers={"Cache-Control": "public, max-age=86400"})


@router.get("/static/{name:path}")
def static_file(name: str):
    path = (STATIC / name).resolve()
    if STATIC not in path.parents or not path.is_file():
        raise NotFound(f"no static file {name}", field="name")
    media = mimetypes.guess_type(path.name)[0] or "application/octet-stream"
    if path.suffix == ".js":
        media = "text/javascript"
    return FileResponse(path, media_type=media, headers={"Cache-Control": STATIC_CACHE})
