"""Cross-site request refusal: state-changing browser requests must come from this server's own pages.

A POST, PUT, PATCH or DELETE that carries the session cookie, and every login (``POST /api/v1/session``,
where a forged login would plant the attacker's session: login CSRF), is refused with 403 when its
``Origin`` header (or, without one, the origin of its ``Referer``) is another origin. The origins
accepted are the one the request was addressed to (scheme and ``Host``) and the origin of
``public_base_url`` (the address users open, e.g. behind a TLS proxy). ``Origin: null`` (sandboxed or
privacy-stripped pages) is refused too. A request with neither header is not from a current browser's
cross-site form or script (they always send ``Origin`` on these methods) and is left to the CSRF token.

Requests with an API key (``Authorization`` or ``X-API-Key``) are not checked: a browser never adds
those headers to a cross-site request on its own, and gateways and scripts send no ``Origin``.
This is a second line beside the CSRF token (``server.security``), following the OWASP CSRF
Prevention Cheat Sheet's "verifying origin with standard headers" (from memory).
"""

from __future__ import annotations

import json
from urllib.parse import urlsplit

from starlette.requests import cookie_parser

from server.errors import error_body
from server.security import SESSION_COOKIE

STATE_CHANGING = frozenset({"POST", "PUT", "PATCH", "DELETE"})
LOGIN_PATH = "/api/v1/session"
DEFAULT_PORTS = {"http": 80, "https": 443}


def origin_of(url: str) -> str | None:
    """``scheme://host[:port]`` in lower case with the default port dropped; None if not a web URL."""
    try:
        parts = urlsplit(url.strip())
        port = parts.port
    except ValueError:
        return None
    scheme, host = parts.scheme.lower(), (parts.hostname or "").lower()
    if scheme not in DEFAULT_PORTS or not host:
        return None
    if ":" in host:  # IPv6 literal
        host = f"[{host}]"
    return f"{scheme}://{host}" if port in (None, DEFAULT_PORTS[scheme]) else f"{scheme}://{host}:{port}"


def _headers(scope) -> dict[str, str]:
    out: dict[str, str] = {}
    for name, value in scope.get("headers", ()):
        out.setdefault(name.decode("latin-1").lower(), value.decode("latin-1"))
    return out


def _has_session_cookie(cookie_header: str) -> bool:
    # the parser the app itself reads cookies with, so "has the cookie" means the same here and there
    return SESSION_COOKIE in cookie_header and SESSION_COOKIE in cookie_parser(cookie_header)


def needs_check(scope, headers: dict[str, str]) -> bool:
    if scope.get("type") != "http" or scope.get("method") not in STATE_CHANGING:
        return False
    if headers.get("x-api-key") or headers.get("authorization", "").lower().startswith("bearer "):
        return False
    return scope.get("path") == LOGIN_PATH or _has_session_cookie(headers.get("cookie", ""))


def request_origin(headers: dict[str, str]) -> str | None:
    """What the browser says the request came from: Origin, else the Referer's origin, else None.
    ``"null"`` (an opaque origin) is returned as is."""
    origin = headers.get("origin")
    if origin is not None:
        origin = origin.strip()
        return "null" if origin.lower() == "null" else (origin_of(origin) or "null")
    referer = headers.get("referer")
    if referer:
        return origin_of(referer) or "null"
    return None


def own_origins(scope, headers: dict[str, str], public_base_url: str) -> set[str]:
    found = set()
    host = headers.get("host")
    if host:
        own = origin_of(f"{scope.get('scheme', 'http')}://{host}")
        if own:
            found.add(own)
    public = origin_of(public_base_url or "")
    if public:
        found.add(public)
    return found


class OriginCheck:
    """ASGI middleware: 403 before anything is read for a cross-site state-changing cookie request."""

    def __init__(self, app, settings):
        self.app = app
        self.public_base_url = settings.public_base_url

    async def __call__(self, scope, receive, send):
        if scope.get("type") == "http":
            headers = _headers(scope)
            if needs_check(scope, headers):
                sent = request_origin(headers)
                allowed = own_origins(scope, headers, self.public_base_url)
                if sent is not None and sent not in allowed:
                    return await _refuse(send, sent, allowed)
        return await self.app(scope, receive, send)


async def _refuse(send, sent: str, allowed: set[str]) -> None:
    message = (f"cross-site request refused: it comes from {sent}, not from this server "
               f"({', '.join(sorted(allowed)) or 'its own pages'}); use the dashboard on this server, or an "
               "API key for scripts. If users open the server under another address, set "
               "HALFWATCH_PUBLIC_BASE_URL to it")
    body = json.dumps(error_body(403, "forbidden", message, "Origin")).encode()
    await send({"type": "http.response.start", "status": 403,
                "headers": [(b"content-type", b"application/json"),
                            (b"content-length", str(len(body)).encode())]})
    await send({"type": "http.response.body", "body": body})
