"""Cross-site requests: a state-changing request with the session cookie, and every login, must come from
this server's origin (Origin header, else Referer). API-key requests are not affected.

The rule follows the OWASP CSRF Prevention Cheat Sheet, "verifying origin with standard headers"
(from memory); origins compare scheme, host and port as in RFC 6454. The browser side (a real
cross-site form) is in tests/web/test_login_redirect.py.
"""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from support.fixtures import PASSWORD

from server.storage.tables import Asset, User

OWN = "http://testserver"  # the TestClient's base URL: its Host header is "testserver"
EVIL = "http://evil.example"


def _login(c, **headers):
    return c.post("/api/v1/session", json={"username": "engineer1", "password": PASSWORD}, headers=headers)


@pytest.mark.parametrize("headers", [
    {"Origin": EVIL},
    {"Origin": "null"},  # sandboxed frames and privacy-stripped pages
    {"Origin": "http://testserver.evil.example"},
    {"Origin": "https://testserver"},  # another scheme is another origin
    {"Origin": "http://testserver:8443"},  # another port too
    {"Referer": f"{EVIL}/phish.html"},  # no Origin: the Referer's origin counts
    {"Origin": "not a url"},
])
def test_a_login_from_another_origin_is_refused(app, users, headers):
    with TestClient(app) as c:
        r = _login(c, **headers)
        assert r.status_code == 403, r.text
        err = r.json()["error"]
        assert err["field"] == "Origin" and err["message"].startswith("cross-site request refused")
        assert "set-cookie" not in r.headers  # no session was made
        assert r.headers["x-content-type-options"] == "nosniff"  # the refusal has the security headers


@pytest.mark.parametrize("headers", [{"Origin": OWN}, {"Origin": "http://testserver:80"},
                                     {"Referer": f"{OWN}/login?next=/"}, {}])
def test_a_login_from_this_origin_or_without_browser_headers_works(app, users, headers):
    with TestClient(app) as c:
        r = _login(c, **headers)
        assert r.status_code == 200, r.text


def test_cookie_writes_from_another_origin_are_refused(users, plant):
    c = users.login("admin")  # the CSRF header is set: only the origin is wrong
    body = {"name": "Quarry pumps"}
    r = c.post("/api/v1/sites", json=body, headers={"Origin": EVIL})
    assert r.status_code == 403 and r.json()["error"]["field"] == "Origin", r.text
    r = c.put(f"/api/v1/assets/{plant.asset_ids['pump']}", headers={"Origin": EVIL},
              json={"area_id": plant.area_id, "name": "renamed", "nominal_speed_hz": 24.75})
    assert r.status_code == 403 and r.json()["error"]["field"] == "Origin"
    r = c.patch(f"/api/v1/users/{users.ids['viewer']}", json={"role": "admin"}, headers={"Origin": EVIL})
    assert r.status_code == 403 and r.json()["error"]["field"] == "Origin"
    r = c.delete("/api/v1/session", headers={"Referer": f"{EVIL}/x"})  # logout CSRF
    assert r.status_code == 403
    assert c.get("/api/v1/me").status_code == 200  # still logged in
    r = c.get("/api/v1/tree", headers={"Origin": EVIL})  # reads are not state-changing
    assert r.status_code == 200
    r = c.post("/api/v1/sites", json=body, headers={"Origin": OWN})
    assert r.status_code == 201, r.text
    with c.app.state.db.read() as s:
        assert s.scalar(select(Asset.name).where(Asset.id == plant.asset_ids["pump"])) == "CW pump 1"
        assert s.scalar(select(User.role).where(User.id == users.ids["viewer"])) == "viewer"


def test_the_public_base_url_counts_as_this_server(migrated_db, hw_settings, users):
    """Behind a TLS proxy the browser's origin is the public address, not the Host the app sees."""
    from server.app import create_app

    app = create_app(hw_settings.model_copy(update={"public_base_url": "https://halfwatch.plant.example/"}))
    with TestClient(app) as c:
        r = _login(c, Origin="https://halfwatch.plant.example")
        assert r.status_code == 200, r.text
        r = _login(c, Origin="https://other.plant.example")
        assert r.status_code == 403


def test_api_key_requests_are_not_affected(app, plant):
    from server.services.users import create_api_key

    key, _ = create_api_key(app.state.db, name="script", role="engineer")
    with TestClient(app) as c:
        for i, headers in enumerate(({"Authorization": f"Bearer {key}"}, {"X-API-Key": key})):
            r = c.post("/api/v1/sites", json={"name": f"Quarry pumps {i}"},
                       headers={**headers, "Origin": EVIL})
            assert r.status_code == 201, r.text


def test_origin_normalisation():
    from server.origin import origin_of

    # RFC 6454: scheme and host in lower case, the default port left out
    assert origin_of("HTTP://Example.COM:80/path?q") == "http://example.com"
    assert origin_of("https://example.com:443") == "https://example.com"
    assert origin_of("https://example.com:8443/") == "https://example.com:8443"
    assert origin_of("http://[::1]:8000/") == "http://[::1]:8000"
    for bad in ("null", "javascript:alert(1)", "file:///etc/passwd", "http://", "http://h:99999/"):
        assert origin_of(bad) is None, bad


@pytest.mark.parametrize("junk", ['bad"name=1', "x=\"unterminated", "a=b\\c"])
def test_a_malformed_cookie_beside_the_session_does_not_skip_the_check(app, users, junk):
    """Python's http.cookies gives up on such a header; the app's own cookie parser still finds the
    session, so the check must see it too (a cookie set by a sibling subdomain could be junk)."""
    c = users.login("engineer")
    token = c.cookies.get("halfwatch_session")
    with TestClient(app) as raw:
        r = raw.post("/api/v1/sites", json={"name": "Quarry pumps"},
                     headers={"Cookie": f"{junk}; halfwatch_session={token}", "Origin": EVIL,
                              "X-CSRF-Token": c.headers["X-CSRF-Token"]})
        assert r.status_code == 403 and r.json()["error"]["field"] == "Origin", r.text
