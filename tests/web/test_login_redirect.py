"""After login the browser stays on this server; a cross-site login is refused. Real headless Chromium.

Two real servers on 127.0.0.1: the app, and a stand-in for another site on a second port, reached by the
name ``localhost`` (another origin for the browser: RFC 6454 compares scheme, host and port). The other
site counts every request it gets, so a redirect that leaves the app shows as a hit there.

- Open redirect: ``/login?next=...`` with targets that browsers read as another host: ``/\\host`` (the
  WHATWG URL Standard treats ``\\`` as ``/`` in http URLs, and strips ASCII tab and newline), ``//host``
  and absolute URLs (from memory; the OWASP Unvalidated Redirects and Forwards Cheat Sheet lists the same
  tricks). Checked on the server's page and again on the login script alone.
- Login CSRF: a form on the other site posting to ``/api/v1/session`` is refused (403, no session
  cookie), while the app's own login form works (the browser's Origin header is accepted).
"""

from __future__ import annotations

import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from urllib.parse import quote, urlsplit

import pytest
from support.fixtures import PASSWORD, migrate, settings_for
from support.servers import serve_in_thread


class OtherSite:
    """A plain HTTP server standing in for a foreign site; records the paths it was asked for."""

    def __init__(self, html: str = "<p>other site</p>"):
        hits = self.hits = []
        page = html

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self):  # noqa: N802 - the http.server API
                hits.append(self.path)
                body = page.encode()
                self.send_response(200)
                self.send_header("Content-Type", "text/html; charset=utf-8")
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, *args):
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.port = self.server.server_address[1]
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    @property
    def base(self) -> str:
        return f"http://localhost:{self.port}"

    def close(self):
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture(scope="module")
def app_base(tmp_path_factory):
    from server.app import create_app
    from server.services.users import add_user

    settings = settings_for(tmp_path_factory.mktemp("redirect"))
    migrate(settings)
    app = create_app(settings)
    add_user(app.state.db, settings, username="viewer1", password=PASSWORD, role="viewer",
             email="viewer1@example.test", hashing=app.state.passwords)
    with serve_in_thread(app) as base:
        yield base
    app.state.db.dispose()


@pytest.fixture
def other():
    site = OtherSite()
    yield site
    site.close()


@pytest.fixture
def page(browser):
    ctx = browser.new_context()
    yield ctx.new_page()
    ctx.close()


def _log_in(page, app_base: str, next_value: str | None):
    url = f"{app_base}/login" + ("" if next_value is None else f"?next={next_value}")
    page.goto(url)
    page.fill("#username", "viewer1")
    page.fill("#password", PASSWORD)
    with page.expect_navigation():
        page.click("button[type=submit]")
    page.wait_for_load_state()


def _origin(url: str) -> str:
    p = urlsplit(url)
    return f"{p.scheme}://{p.netloc}"


def hostile_targets(other: OtherSite) -> list[str]:
    """``next`` values (as sent in the query string) that a browser would resolve to the other site."""
    host = f"localhost:{other.port}"
    return [
        f"/%5C{host}/landed",            # /\host  -> //host
        f"/%5C%5C{host}/landed",         # /\\host
        f"/%09/{host}/landed",           # /<TAB>/host -> //host (tab stripped)
        f"/%0A/{host}/landed",           # a line feed, stripped the same way
        f"//{host}/landed",              # protocol-relative
        quote(f"{other.base}/landed", safe=""),  # absolute URL
        f"%5C%5C{host}/landed",          # \\host
        quote(f"javascript:location='{other.base}/landed'", safe=""),
    ]


def test_login_with_a_hostile_next_stays_on_the_app(page, app_base, other):
    for target in hostile_targets(other):
        page.context.clear_cookies()
        _log_in(page, app_base, target)
        assert _origin(page.url) == app_base, (target, page.url)
        assert urlsplit(page.url).path == "/", (target, page.url)
    assert other.hits == [], f"the browser was sent to the other site: {other.hits}"


def test_login_with_a_same_origin_next_goes_there(page, app_base):
    _log_in(page, app_base, quote("/alarms?view=all", safe="/"))
    assert page.url == f"{app_base}/alarms?view=all"


def test_the_login_script_checks_the_target_itself(page, app_base, other):
    """Even if the page carried a hostile target, the script sends the browser to / on the app."""
    for raw in (f"/\\localhost:{other.port}/landed", f"/\t/localhost:{other.port}/landed",
                f"//localhost:{other.port}/landed", f"{other.base}/landed"):
        page.context.clear_cookies()
        page.goto(f"{app_base}/login")
        page.evaluate("v => { document.getElementById('next').value = v; }", raw)
        page.fill("#username", "viewer1")
        page.fill("#password", PASSWORD)
        with page.expect_navigation():
            page.click("button[type=submit]")
        page.wait_for_load_state()
        assert _origin(page.url) == app_base and urlsplit(page.url).path == "/", (raw, page.url)
    assert other.hits == []


def test_a_login_form_on_another_site_is_refused(browser, app_base):
    """Login CSRF: the other site's page posts the victim's browser into the attacker's account."""
    form = (f'<form id="f" method="post" action="{app_base}/api/v1/session" '
            'enctype="application/x-www-form-urlencoded">'
            f'<input name="username" value="viewer1"><input name="password" value="{PASSWORD}"></form>'
            '<script>document.getElementById("f").submit()</script>')
    site = OtherSite(form)
    ctx = browser.new_context()
    try:
        page = ctx.new_page()
        with page.expect_response(f"{app_base}/api/v1/session") as info:
            page.goto(f"{site.base}/")
        response = info.value
        assert response.status == 403, response.text()
        assert response.json()["error"]["field"] == "Origin"
        assert "cross-site" in response.json()["error"]["message"]
        assert not [c for c in ctx.cookies() if c["name"] == "halfwatch_session"]
    finally:
        ctx.close()
        site.close()
