"""Access control: each role can do exactly what it may; sessions, CSRF and API keys."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from support.fixtures import PASSWORD
from support.signals import tone_record

from server.storage.tables import ApiKey, User

T0 = "2026-03-02T08:00:00Z"
ROLES = ("viewer", "technician", "engineer", "admin")


def raw_post(c, point_id, rng, **headers):
    return c.post(f"/api/v1/points/{point_id}/records",
                  params={"fs_hz": 2560, "units": "g", "measured_at": T0},
                  content=tone_record(rng, n=2048).tobytes(),
                  headers={"Content-Type": "application/octet-stream", **headers})


# (name, minimum role, request maker)
ACTIONS = [
    ("read tree", "viewer", lambda c, p, rng: c.get("/api/v1/tree")),
    ("read routes", "viewer", lambda c, p, rng: c.get("/api/v1/routes")),
    ("read failed jobs", "viewer", lambda c, p, rng: c.get("/api/v1/jobs")),
    ("upload record", "technician", lambda c, p, rng: raw_post(c, p.point_id, rng)),
    ("create asset", "engineer", lambda c, p, rng: c.post("/api/v1/assets", json={
        "area_id": p.area_id, "name": "New fan", "kind": "fan", "nominal_speed_hz": 20})),
    ("create route", "engineer", lambda c, p, rng: c.post("/api/v1/routes", json={
        "site_id": p.site_id, "name": "Night walk", "stops": [{"point_id": p.point_id}]})),
    ("list users", "admin", lambda c, p, rng: c.get("/api/v1/users")),
    ("create key", "admin", lambda c, p, rng: c.post("/api/v1/apikeys", json={"name": "gw"})),
]


@pytest.mark.parametrize("role", ROLES)
def test_each_role_can_do_exactly_what_it_may(users, plant, rng, role):
    c = users.login(role)
    rank = ROLES.index(role)
    for name, needed, make in ACTIONS:
        r = make(c, plant, rng)
        if rank >= ROLES.index(needed):
            assert r.status_code in (200, 201), (role, name, r.text)
        else:
            assert r.status_code == 403, (role, name, r.text)
            assert needed in r.json()["error"]["message"]


def test_everything_needs_login_except_health_login_and_docs(client, plant, rng):
    for name, _needed, make in ACTIONS:
        r = make(client, plant, rng)
        assert r.status_code == 401, (name, r.text)
        assert r.json()["error"]["code"] == "unauthorized"
    for path in ("/api/v1/records/1", f"/api/v1/points/{plant.point_id}/trend", "/api/v1/me"):
        assert client.get(path).status_code == 401
    assert client.get("/healthz").status_code == 200
    assert client.get("/openapi.json").status_code == 200
    # every route in the API schema except health and login refuses a caller without credentials
    for path, ops in client.get("/openapi.json").json()["paths"].items():
        for method in ops:
            if path in ("/healthz", "/api/v1/session"):
                continue
            r = client.request(method.upper(), re.sub(r"\{[^}]+\}", "1", path))
            assert r.status_code == 401, (method, path, r.status_code)


def test_cookie_writes_need_the_csrf_token(users, plant, rng):
    c = users.login("technician")
    token = c.headers.pop("X-CSRF-Token")
    r = raw_post(c, plant.point_id, rng)
    assert r.status_code == 403 and r.json()["error"]["field"] == "X-CSRF-Token"
    assert raw_post(c, plant.point_id, rng, **{"X-CSRF-Token": "wrong"}).status_code == 403
    assert raw_post(c, plant.point_id, rng, **{"X-CSRF-Token": token}).status_code == 201
    assert c.cookies.get("halfwatch_csrf") == token  # readable cookie for the dashboard's scripts
    assert c.get("/api/v1/me").json()["csrf_token"] == token


def test_session_cookie_flags_and_logout(app, users):
    with TestClient(app) as c:
        r = c.post("/api/v1/session", data={"username": "viewer1", "password": PASSWORD})  # form login
        assert r.status_code == 200
        cookies = r.headers.get_list("set-cookie")
        cookie = [h for h in cookies if h.startswith("halfwatch_session=")][0].lower()
        assert "httponly" in cookie and "samesite=lax" in cookie and "secure" not in cookie
        assert c.get("/api/v1/me").json()["role"] == "viewer"
        csrf = r.json()["csrf_token"]
        assert c.delete("/api/v1/session", headers={"X-CSRF-Token": csrf}).status_code == 200
        assert c.get("/api/v1/me").status_code == 401


def test_secure_cookie_when_configured(tmp_path, migrated_template):
    from support.fixtures import migrate, settings_for

    from server.app import create_app
    from server.services.users import add_user

    settings = settings_for(tmp_path, session_cookie_secure=True)
    migrate(settings, migrated_template)
    app = create_app(settings)
    add_user(app.state.db, settings, username="eve", password=PASSWORD, role="viewer")
    with TestClient(app) as c:
        r = c.post("/api/v1/session", json={"username": "eve", "password": PASSWORD})
        assert "secure" in r.headers["set-cookie"].lower()


def test_wrong_password_and_unknown_user_answer_alike(client, users):
    a = client.post("/api/v1/session", json={"username": "viewer1", "password": "nope-nope"})
    b = client.post("/api/v1/session", json={"username": "nobody", "password": "nope-nope"})
    assert a.status_code == b.status_code == 401
    assert a.json() == b.json()
    r = client.post("/api/v1/session", json={"username": "viewer1"})
    assert r.status_code == 422 and r.json()["error"]["field"] == "password"


def test_passwords_are_argon2id_hashes(users, migrated_db):
    from argon2 import PasswordHasher  # argon2-cffi is the reference verifier

    with migrated_db.read() as s:
        u = s.scalar(select(User).where(User.username == "admin1"))
    assert u.password_hash.startswith("$argon2id$") and PASSWORD not in u.password_hash
    assert PasswordHasher().verify(u.password_hash, PASSWORD)


def test_api_key_shown_once_hashed_scoped_revocable(users, plant, rng, migrated_db):
    admin = users.login("admin")
    r = admin.post("/api/v1/apikeys", json={"name": "line 3 gateway", "site_id": plant.site_id})
    assert r.status_code == 201
    key, info = r.json()["key"], r.json()["api_key"]
    listed = admin.get("/api/v1/apikeys").json()["api_keys"]
    assert key not in str(listed) and info["prefix"] in key
    with migrated_db.read() as s:
        row = s.get(ApiKey, info["id"])
    assert key not in (row.key_hash, row.prefix) and row.last_used_at is None

    c = TestClient(admin.app)
    assert raw_post(c, plant.point_id, rng, **{"X-API-Key": key}).status_code == 201
    assert raw_post(c, plant.other_point_id, rng, **{"X-API-Key": key}).status_code == 403
    tree = c.get("/api/v1/tree", headers={"Authorization": f"Bearer {key}"}).json()
    assert [s["id"] for s in tree["sites"]] == [plant.site_id]
    with migrated_db.read() as s:
        used = s.get(ApiKey, info["id"]).last_used_at
    assert used is not None and abs(used - dt.datetime.now(dt.UTC)) < dt.timedelta(minutes=1)

    assert admin.delete(f"/api/v1/apikeys/{info['id']}").status_code == 200
    r = raw_post(c, plant.point_id, rng, **{"X-API-Key": key})
    assert r.status_code == 401 and "revoked" in r.json()["error"]["message"]
    assert raw_post(c, plant.point_id, rng, **{"X-API-Key": "hwk_nope_nope"}).status_code == 401


def test_deactivated_user_loses_the_session(users):
    tech = users.login("technician")
    admin = users.login("admin")
    assert admin.patch(f"/api/v1/users/{users.ids['technician']}", json={"active": False}).status_code == 200
    assert tech.get("/api/v1/me").status_code == 401


def test_admin_adds_user_who_can_log_in(users, app):
    admin = users.login("admin")
    r = admin.post("/api/v1/users", json={"username": "route.tech", "password": "long enough pw",
                                          "role": "technician"})
    assert r.status_code == 201
    assert admin.post("/api/v1/users", json={"username": "route.tech", "password": "long enough pw"}
                      ).status_code == 409
    short = admin.post("/api/v1/users", json={"username": "x", "password": "short"})
    assert short.status_code == 422 and short.json()["error"]["field"] == "password"
    with TestClient(app) as c:
        assert c.post("/api/v1/session", json={"username": "route.tech", "password": "long enough pw"}
                      ).status_code == 200


def _site_names(c) -> list[str]:
    r = c.get("/api/v1/tree")
    assert r.status_code == 200, r.text
    return sorted(s["name"] for s in r.json()["sites"])


def test_a_user_limited_to_a_site_sees_only_that_site_until_the_limit_changes(users, app, plant):
    """A user may be limited to one site like an API key (users.site_id, migration 0011); the limit is
    read on every request, so a change holds from the user's next request, and is in the audit trail."""
    admin = users.login("admin")
    r = admin.post("/api/v1/users", json={"username": "hill.viewer", "password": "long enough pw",
                                          "site_id": plant.other_site_id})
    assert r.status_code == 201 and r.json()["user"]["site_id"] == plant.other_site_id, r.text
    uid = r.json()["user"]["id"]
    with TestClient(app) as c:
        assert c.post("/api/v1/session", json={"username": "hill.viewer", "password": "long enough pw"}
                      ).status_code == 200
        assert _site_names(c) == ["Hilltop annex"]
        assert c.get(f"/api/v1/dashboard/points/{plant.point_id}/series").status_code == 403  # Riverside
        assert _site_names(admin) == ["Hilltop annex", "Riverside works"]
        # a change of role leaves the limit as it is; null lifts it
        r = admin.patch(f"/api/v1/users/{uid}", json={"role": "technician"})
        assert r.status_code == 200 and r.json()["user"]["site_id"] == plant.other_site_id
        assert _site_names(c) == ["Hilltop annex"]
        assert admin.patch(f"/api/v1/users/{uid}", json={"site_id": None}).status_code == 200
        assert _site_names(c) == ["Hilltop annex", "Riverside works"]
        assert admin.patch(f"/api/v1/users/{uid}", json={"site_id": plant.site_id}).status_code == 200
        assert _site_names(c) == ["Riverside works"]
        # a user limited to a site cannot manage users (it could widen its own reach)
        assert c.get("/api/v1/users").status_code == 403
    r = admin.post("/api/v1/users", json={"username": "nowhere", "password": "long enough pw",
                                          "site_id": 987654})
    assert r.status_code == 422 and r.json()["error"]["field"] == "site_id", r.text
    r = admin.get("/api/v1/audit", params={"target": "user"})
    assert r.status_code == 200, r.text
    limits = [c["details"].get("site_id", "-") for c in r.json()["changes"]
              if c["target_id"] == uid and c["action"] == "update"]
    assert limits == [plant.site_id, None, "-"], limits  # newest first; a role change leaves no site_id
