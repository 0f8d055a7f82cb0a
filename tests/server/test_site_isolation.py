"""Site isolation, generated from the app's routes: a caller limited to site 1 never reads, changes or
moves site 2's data.

Every (method, path) the app serves must be classified in ``SITE_RULES`` below, or
``test_every_route_is_classified_for_site_isolation`` fails: a route added later without a decision
about site data breaks the suite. Each route is then called by an admin API key limited to site 1
(the highest role, so a role check cannot hide a missing site check):

- ``REFUSE``: the request names a site-2 object (path id, query or body) and must get 403, with
  nothing changed in the database. Path ids are filled from the parameter name (``{point_id}`` -> the
  site-2 point, ...); a parameter with no site-2 object fails the test until it is added to ``IDS``.
  ``test_the_same_requests_on_site_1_are_not_refused`` sends each one again with site-1 ids and must
  not get 403, so the probes are valid requests refused for their site alone.
- ``ROWS``: a list; it must show site 1 (a site-1 marker present) and nothing of site 2.
- ``NONE``: names or returns no site data (the reason is given); still, nothing of site 2 may appear.

"Nothing of site 2" is checked on every answer, of every class: none of the site-2 names or addresses
in the text, and no ``site_id``/``area_id``/``asset_id``/``point_id``/``record_id`` of site 2 in the JSON
(or the CSV columns). Updates are also checked "as they will be": moving a site-1 object under a site-2
parent is refused (``MOVES``). Runs on SQLite and, with HALFWATCH_TEST_POSTGRES_URL, PostgreSQL.
The scenario (sites, machines, addresses) is invented for the tests.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import re
import zipfile
from dataclasses import dataclass

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from support.plant import make_plant
from support.routes import app_routes
from support.signals import tone_record

from server.security import Principal

REFUSE, ROWS, NONE = "refuse", "rows", "none"
SITE1_NAMES = ("Riverside works", "Weekly CW walk", "s1planner@example.test", "site-1 gateway")
SITE2_NAMES = ("Hilltop annex", "Boiler house", "ID fan", "F-DE-H", "Hilltop walk", "s2planner@example.test",
               "hilltop gateway")
ID_KEYS = ("site_id", "area_id", "asset_id", "point_id", "record_id")
SETUP = Principal("user", 0, "setup", "admin")  # an unlimited admin for building the scenario
S1_USER_PASSWORD = "river bend 4 quay"


@dataclass
class Side:
    """The ids of one site's objects."""

    site: int
    area: int
    asset: int
    point: int
    route: int
    record: int
    job: int
    alarm: int
    sub: int
    key: int

    def marks(self) -> dict[str, int]:
        return {"site_id": self.site, "area_id": self.area, "asset_id": self.asset, "point_id": self.point,
                "record_id": self.record}


@dataclass
class World:
    s1: Side
    s2: Side
    user: int
    headers: dict[str, str]  # the site-1 admin key


def _wav(rng) -> bytes:
    from scipy.io import wavfile

    buf = io.BytesIO()
    wavfile.write(buf, 2560, tone_record(rng, n=8192))
    return buf.getvalue()


def build_world(app, rng) -> World:
    from server.alarms import service
    from server.alarms.tables import AlarmEvent, AlarmPointStatus, AlarmState
    from server.services import assets
    from server.services.ingest import ingest_record
    from server.services.users import add_user, create_api_key
    from server.storage.tables import Job, Record
    from server.worker import run_once

    db, settings = app.state.db, app.state.settings
    plant = make_plant(db)
    p1, p2 = plant.point_id, plant.other_point_id
    route2 = assets.create(db, "route", {"site_id": plant.other_site_id, "name": "Hilltop walk",
                                         "stops": [{"point_id": p2}]}, SETUP)["route"]["id"]
    now = dt.datetime.now(dt.UTC)
    recs = [ingest_record(db, point_id=p, samples=tone_record(rng, n=8192), fs_hz=2560.0, units="m/s2",
                          measured_at=now - dt.timedelta(hours=2), origin="api",
                          uploader="test").record_id for p in (p1, p2)]
    while run_once(db, settings):
        pass
    states = []
    with db.unit_of_work() as s:
        for pid, rec in zip((p1, p2), recs, strict=True):
            rec_row = s.get(Record, rec)
            asset_id = rec_row.point.asset_id
            area = rec_row.point.asset.area
            st = s.scalar(select(AlarmState).where(AlarmState.point_id == pid,  # the worker's state row
                                                   AlarmState.metric == "half_order_velocity"))
            if st is None:
                st = AlarmState(point_id=pid, asset_id=asset_id, metric="half_order_velocity")
                s.add(st)
            st.level, st.since, st.last_value, st.last_record_id = "alert", now, 3.0, rec
            s.add(AlarmEvent(kind="transition", point_id=pid, asset_id=asset_id, area_id=area.id,
                             site_id=area.site_id, metric="half_order_velocity", from_level="normal",
                             to_level="alert", value=3.0, threshold=2.8, record_id=rec,
                             summary="half-order velocity rose", created_at=now))
            s.merge(AlarmPointStatus(point_id=pid, data_quality_open=True, data_quality_reason="clipping",
                                     updated_at=now))
            s.flush()
            states.append(st.id)
        jobs = [s.scalar(select(Job.id).where(Job.record_id == r)) for r in recs]
    subs = [service.create_subscription(db, {"email": email, "scope": "site", "scope_id": site},
                                        actor="setup")["id"]
            for email, site in (("s1planner@example.test", plant.site_id),
                                ("s2planner@example.test", plant.other_site_id))]
    for pid in (p1, p2):  # audit rows about each site's rules
        service.set_rule(db, {"point_id": pid, "metric": "half_order_velocity", "alert": 2.0, "danger": 4.0},
                         actor="setup")
    key1, _info1 = create_api_key(db, name="site-1 gateway", role="admin", site=plant.site_id)
    _spare, spare1 = create_api_key(db, name="site-1 spare", role="viewer", site=plant.site_id)
    _key2, info2 = create_api_key(db, name="hilltop gateway", role="technician", site=plant.other_site_id)
    user = add_user(db, settings, username="planner", password="a long pass phrase 7", role="viewer",
                    email="planner@example.test", hashing=app.state.passwords)["id"]
    # a user limited to site 1 (migration 0011), an admin so a role check cannot hide a missing site check
    add_user(db, settings, username="riverside-admin", password=S1_USER_PASSWORD, role="admin",
             email="", site=plant.site_id, hashing=app.state.passwords)
    fan_area = make_area_of(db, plant.asset_ids["fan"])
    s1 = Side(plant.site_id, plant.area_id, plant.asset_ids["pump"], p1, plant.route_id, recs[0], jobs[0],
              states[0], subs[0], spare1["id"])
    s2 = Side(plant.other_site_id, fan_area, plant.asset_ids["fan"], p2, route2, recs[1], jobs[1], states[1],
              subs[1], info2["id"])
    return World(s1, s2, user, {"Authorization": f"Bearer {key1}"})


def make_area_of(db, asset_id: int) -> int:
    from server.storage.tables import Asset

    with db.read() as s:
        return s.get(Asset, asset_id).area_id


# --- what each route is, for site data ---------------------------------------------------------------

def _zip(rows: str = "point,file,measured_at,units,fs_hz\n") -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("manifest.csv", rows)
    return buf.getvalue()


def _record_raw(w: World, side: Side, rng):
    return {"params": {"fs_hz": 2560, "units": "m/s2",
                       "measured_at": (dt.datetime.now(dt.UTC) - dt.timedelta(hours=1)).isoformat()},
            "content": tone_record(rng, n=8192).tobytes(),
            "headers": {"Content-Type": "application/octet-stream"}}


def _record_file(w: World, side: Side, rng):
    return {"files": {"file": ("reading.wav", _wav(rng), "audio/wav")},
            "data": {"units": "m/s2",
                     "measured_at": (dt.datetime.now(dt.UTC) - dt.timedelta(hours=1)).isoformat()}}


def _point_body(w, side, rng):
    return {"json": {"asset_id": w.s1.asset, "name": f"moved point {side.site}", "direction": "horizontal"}}


def _asset_body(w, side, rng):
    return {"json": {"area_id": w.s1.area, "name": f"moved machine {side.site}", "kind": "pump",
                     "nominal_speed_hz": 24.75}}


def _route_body(w, side, rng):
    return {"json": {"site_id": w.s1.site, "name": f"moved walk {side.site}",
                     "stops": [{"point_id": side.point}]}}


def _rule_body(key):
    return lambda w, side, rng: {"json": {key: getattr(side, key.removesuffix("_id")),
                                          "metric": "overall_velocity", "alert": 2.8, "danger": 7.1,
                                          "enabled": False}}


# Each entry: (class, reason or marker, request maker). A maker gets (world, side, rng) and returns
# keyword arguments for TestClient.request; ``side`` is the site whose ids a REFUSE probe names (site 2;
# site 1 for the control run). Path parameters are filled from IDS (with ``side``), not by the maker.
def q(**params):
    """Query parameters; a value "@point" is the side's point id (and so on)."""
    return lambda w, side, rng: {"params": {k: getattr(side, v[1:]) if str(v).startswith("@") else v
                                            for k, v in params.items()}}


def body(fn):
    return lambda w, side, rng: {"json": fn(w, side)}


SITE_RULES: dict[tuple[str, str], tuple] = {
    # no site data
    ("GET", "/healthz"): (NONE, "liveness and database reachability"),
    ("GET", "/readyz"): (NONE, "worker heartbeats"),
    ("GET", "/metrics"): (NONE, "process and queue counters; no plant data (README)"),
    ("GET", "/openapi.json"): (NONE, "the API schema"),
    ("GET", "/docs"): (NONE, "the API docs page"),
    ("GET", "/docs/assets/{name}"): (NONE, "files of the API docs page"),
    ("GET", "/login"): (NONE, "the login form"),
    ("GET", "/static/plotly.min.js"): (NONE, "a static file"),
    ("GET", "/static/{name:path}"): (NONE, "a static file"),
    ("POST", "/api/v1/session"): (NONE, "logging in"),
    ("DELETE", "/api/v1/session"): (NONE, "logging out"),
    ("GET", "/api/v1/me"): (NONE, "the caller itself"),
    # HTML shells: the page's data comes from the JSON routes below (each classified)
    ("GET", "/"): (NONE, "page shell"),
    ("GET", "/alarms"): (NONE, "page shell"),
    ("GET", "/routes"): (NONE, "page shell"),
    ("GET", "/settings"): (NONE, "page shell"),
    ("GET", "/assets/{asset_id}"): (NONE, "page shell (its data: /api/v1/dashboard/assets/{asset_id})"),
    ("GET", "/records/{record_id}"): (NONE, "page shell (its data: /api/v1/dashboard/records/{record_id})"),
    ("GET", "/points/{point_id}/window"): (NONE, "page shell (its data: the dashboard window route)"),
    # lists: site 1 shown, site 2 not
    ("GET", "/api/v1/tree"): (ROWS, "Riverside works", None),
    ("GET", "/api/v1/routes"): (ROWS, "Weekly CW walk", None),
    ("GET", "/api/v1/jobs"): (ROWS, ("record_id", "record"), q(state="done")),
    ("GET", "/api/v1/dashboard/overview"): (ROWS, "Riverside works", None),
    ("GET", "/api/v1/dashboard/sites"): (ROWS, "Riverside works", None),
    ("GET", "/api/v1/alarms"): (ROWS, ("point_id", "point"), q(view="all")),
    ("GET", "/api/v1/alarms/history"): (ROWS, ("point_id", "point"), None),
    ("GET", "/api/v1/alarms/incidents"): (ROWS, ("point_id", "point"), q(view="all")),
    ("GET", "/api/v1/alarms/history.csv"): (ROWS, ("point_id", "point"), None),
    ("GET", "/api/v1/alarms/data-quality"): (ROWS, ("point_id", "point"), None),
    ("GET", "/api/v1/alarms/subscriptions"): (ROWS, "s1planner@example.test", None),
    ("GET", "/api/v1/audit"): (ROWS, "s1planner@example.test", None),
    ("GET", "/api/v1/audit.csv"): (ROWS, "s1planner@example.test", None),
    ("GET", "/api/v1/apikeys"): (ROWS, "site-1 gateway", None),
    # reads of one site-2 object
    ("GET", "/api/v1/jobs/{job_id}"): (REFUSE, None),
    ("GET", "/api/v1/records/{record_id}"): (REFUSE, None),
    ("GET", "/api/v1/records/{record_id}/spectrum"): (REFUSE, None),
    ("GET", "/api/v1/records/{record_id}/waveform"): (REFUSE, None),
    ("GET", "/api/v1/points/{point_id}/records"): (REFUSE, None),
    ("GET", "/api/v1/points/{point_id}/trend"): (REFUSE, None),
    ("GET", "/api/v1/points/{point_id}/waterfall"): (REFUSE, None),
    ("GET", "/api/v1/dashboard/assets/{asset_id}"): (REFUSE, None),
    ("GET", "/api/v1/dashboard/points/{point_id}/series"): (REFUSE, None),
    ("GET", "/api/v1/dashboard/points/{point_id}/readings"): (REFUSE, None),
    ("GET", "/api/v1/dashboard/points/{point_id}/window"): (REFUSE, None),
    ("GET", "/api/v1/dashboard/records/{record_id}"): (REFUSE, None),
    ("GET", "/api/v1/dashboard/records/{record_id}/waterfall"): (REFUSE, None),
    ("GET", "/api/v1/alarms/rules"): (REFUSE, q(point_id="@point")),
    ("GET", "/api/v1/records/{record_id}/retention"): (REFUSE, None),
    ("PUT", "/api/v1/records/{record_id}/pin"): (REFUSE, body(lambda w, side: {"note": "evidence"})),
    ("DELETE", "/api/v1/records/{record_id}/pin"): (REFUSE, None),
    # measuring into site 2
    ("POST", "/api/v1/points/{point_id}/records"): (REFUSE, _record_raw),
    ("POST", "/api/v1/points/{point_id}/records/file"): (REFUSE, _record_file),
    ("POST", "/api/v1/routes/{route_id}/uploads"): (
        REFUSE, lambda w, side, rng: {"content": _zip(), "headers": {"Content-Type": "application/zip"}}),
    # changing site 2 (or moving its objects into site 1: the bodies name site-1 parents)
    ("PUT", "/api/v1/points/{point_id}"): (REFUSE, _point_body),
    ("PUT", "/api/v1/assets/{asset_id}"): (REFUSE, _asset_body),
    ("PUT", "/api/v1/routes/{route_id}"): (REFUSE, _route_body),
    ("POST", "/api/v1/sites"): (REFUSE, body(lambda w, side: {"name": f"New site {side.site}"})),
    ("POST", "/api/v1/areas"): (REFUSE, body(lambda w, side: {"site_id": side.site, "name": "Tank farm"})),
    ("POST", "/api/v1/assets"): (REFUSE, body(lambda w, side: {"area_id": side.area, "name": "Feed pump",
                                                                "nominal_speed_hz": 24.75})),
    ("POST", "/api/v1/points"): (REFUSE, body(lambda w, side: {"asset_id": side.asset, "name": "X-1"})),
    ("POST", "/api/v1/routes"): (REFUSE, body(lambda w, side: {"site_id": side.site, "name": "Night walk",
                                                                "stops": [{"point_id": side.point}]})),
    ("PUT", "/api/v1/alarms/rules"): (REFUSE, _rule_body("point_id"), _rule_body("asset_id")),
    ("POST", "/api/v1/alarms/{alarm_id}/acknowledge"): (REFUSE, body(lambda w, side: {"comment": "on it"})),
    ("POST", "/api/v1/alarms/{alarm_id}/shelve"): (REFUSE, body(lambda w, side: {
        "until": (dt.datetime.now(dt.UTC) + dt.timedelta(days=1)).isoformat(), "reason": "overhaul"})),
    ("POST", "/api/v1/alarms/{alarm_id}/unshelve"): (REFUSE, None),
    ("POST", "/api/v1/alarms/incidents/{asset_id}/acknowledge"): (REFUSE, body(lambda w, side: {
        "comment": "on it"})),
    ("POST", "/api/v1/alarms/incidents/{asset_id}/shelve"): (REFUSE, body(lambda w, side: {
        "until": (dt.datetime.now(dt.UTC) + dt.timedelta(days=1)).isoformat(), "reason": "overhaul"})),
    ("POST", "/api/v1/alarms/incidents/{asset_id}/unshelve"): (REFUSE, None),
    ("POST", "/api/v1/alarms/subscriptions"): (
        REFUSE, body(lambda w, side: {"email": "ops@example.test", "scope": "site", "scope_id": side.site}),
        body(lambda w, side: {"email": "ops@example.test", "scope": "asset", "scope_id": side.asset}),
        body(lambda w, side: {"email": "ops@example.test", "scope": "area", "scope_id": side.area})),
    ("DELETE", "/api/v1/alarms/subscriptions/{sub_id}"): (REFUSE, None),
    ("GET", "/api/v1/alarms/outbox"): (REFUSE, None),  # every site's recipients: not for a limited key
    # administration: keys of site 2 (or unlimited ones) and users (who see every site)
    ("POST", "/api/v1/apikeys"): (REFUSE, body(lambda w, side: {"name": "gw", "site_id": side.site})),
    ("DELETE", "/api/v1/apikeys/{key_id}"): (REFUSE, None),
    ("GET", "/api/v1/users"): (REFUSE, None),
    ("POST", "/api/v1/users"): (REFUSE, body(lambda w, side: {"username": "newbie", "password": "a long pass "
                                                                "phrase 9", "email": "n@example.test"})),
    ("PATCH", "/api/v1/users/{user_id}"): (REFUSE, body(lambda w, side: {"role": "admin"})),
}

# Requests that stay refused in the site-1 control run (they are refused for any site-limited key).
ALWAYS_REFUSED = {("POST", "/api/v1/sites"), ("GET", "/api/v1/alarms/outbox"), ("GET", "/api/v1/users"),
                  ("POST", "/api/v1/users"), ("PATCH", "/api/v1/users/{user_id}")}

IDS = {"point_id": "point", "asset_id": "asset", "record_id": "record", "route_id": "route", "job_id": "job",
       "alarm_id": "alarm", "sub_id": "sub", "key_id": "key"}

# "as it will be": site-1 objects moved under a site-2 parent
MOVES = [
    ("PUT", "/api/v1/points/{p1}", lambda w: {"asset_id": w.s2.asset, "name": "P1-DE-H"}),
    ("PUT", "/api/v1/assets/{a1}", lambda w: {"area_id": w.s2.area, "name": "CW pump 1",
                                               "nominal_speed_hz": 24.75}),
    ("PUT", "/api/v1/routes/{r1}", lambda w: {"site_id": w.s2.site, "name": "Weekly CW walk"}),
    ("PUT", "/api/v1/routes/{r1}", lambda w: {"site_id": w.s1.site, "name": "Weekly CW walk",
                                               "stops": [{"point_id": w.s2.point}]}),
]


def _url(path: str, w: World, side: Side) -> str:
    def fill(m):
        name = m.group(1)
        if name in ("name:path", "name"):
            return "app.js"
        if name == "user_id":
            return str(w.user)
        if name not in IDS:
            raise AssertionError(f"no site-2 object for path parameter {{{name}}}: add it to IDS")
        return str(getattr(side, IDS[name]))

    return re.sub(r"\{([^}]+)\}", fill, path)


# --- what an answer must not contain ------------------------------------------------------------------

def _walk(obj):
    if isinstance(obj, dict):
        yield obj
        for v in obj.values():
            yield from _walk(v)
    elif isinstance(obj, list):
        for v in obj:
            yield from _walk(v)


def _documents(r):
    ctype = r.headers.get("content-type", "")
    if ctype.startswith("application/json"):
        return list(_walk(r.json()))
    if ctype.startswith("text/csv"):
        return [{k: _num(v) for k, v in row.items()} for row in csv.DictReader(io.StringIO(r.text))]
    return []


def _num(v):
    return int(v) if isinstance(v, str) and v.isdigit() else v


def leaks(r, w: World) -> list[str]:
    if r.headers.get("content-type", "").startswith(("text/javascript", "application/javascript")):
        return []  # static scripts (plotly.js is large and holds no plant data)
    found = [name for name in SITE2_NAMES if name in r.text]
    marks = w.s2.marks()
    for d in _documents(r):
        found += [f"{k}={d[k]}" for k in ID_KEYS if k in d and d[k] == marks[k]]
    return found


def shows_site1(r, w: World, marker) -> bool:
    if isinstance(marker, str):
        return marker in r.text
    key, attr = marker
    return any(d.get(key) == getattr(w.s1, attr) for d in _documents(r))


# --- fixtures -----------------------------------------------------------------------------------------

@pytest.fixture
def world(app, rng):
    return build_world(app, rng)


@pytest.fixture(params=["api-key", "login"])
def key_client(request, app, world):
    """A caller limited to site 1: the site-1 admin API key, or a logged-in admin user limited to site 1
    (session cookie and its CSRF token, as the dashboard sends them)."""
    with TestClient(app, follow_redirects=False) as c:
        if request.param == "api-key":
            c.headers.update(world.headers)
        else:
            r = c.post("/api/v1/session", json={"username": "riverside-admin", "password": S1_USER_PASSWORD})
            assert r.status_code == 200, r.text
            c.headers["X-CSRF-Token"] = c.cookies["halfwatch_csrf"]
            c.headers["Origin"] = "http://testserver"
        yield c


def snapshot(db) -> dict:
    """Every row of every table, but liveness beats, sessions and when a key was last used."""
    from server.storage.all_tables import Base

    skip_tables = {"service_heartbeats", "user_sessions"}
    skip_columns = {"last_used_at"}
    out = {}
    with db.read_engine.connect() as conn:
        for name, table in sorted(Base.metadata.tables.items()):
            if name in skip_tables:
                continue
            cols = [c for c in table.columns if c.name not in skip_columns]
            out[name] = sorted(json.dumps([str(v) for v in row]) for row in conn.execute(select(*cols)).all())
    return out


def _refusal_requests(rule, w, side, rng):
    makers = [m for m in rule[1:] if m is not None] or [lambda *_: {}]
    return [m(w, side, rng) for m in makers]


# --- the tests ------------------------------------------------------------------------------------------

def test_every_route_is_classified_for_site_isolation(app):
    routes = app_routes(app)
    missing = sorted(routes - SITE_RULES.keys())
    assert not missing, ("routes with no site-isolation rule (classify each in SITE_RULES as REFUSE, ROWS or "
                         f"NONE with a reason): {missing}")
    assert not sorted(SITE_RULES.keys() - routes), "SITE_RULES lists routes the app no longer has"
    for key, rule in SITE_RULES.items():
        assert rule[0] in (REFUSE, ROWS, NONE), key
        if rule[0] == NONE:
            assert isinstance(rule[1], str) and rule[1], f"{key}: say why it carries no site data"


def test_a_site_limited_key_gets_nothing_of_another_site(app, world, key_client, rng):
    db = app.state.db
    before = snapshot(db)
    wrong = []
    last = ("DELETE", "/api/v1/session")  # logging out last
    for (method, path), rule in sorted(SITE_RULES.items(), key=lambda kv: kv[0] == last):
        url = _url(path, world, world.s2)
        for kwargs in (_refusal_requests(rule, world, world.s2, rng) if rule[0] == REFUSE
                       else [rule[2](world, world.s2, rng) if len(rule) > 2 and rule[2] else {}]):
            r = key_client.request(method, url, **kwargs)
            where = (method, url, r.status_code)
            assert r.status_code < 500 or path == "/readyz", (where, r.text[:300])  # 503: no worker beat
            if rule[0] == REFUSE and r.status_code != 403:
                wrong.append((*where, "not refused", r.text[:200]))
            if rule[0] == ROWS and (r.status_code != 200 or not shows_site1(r, world, rule[1])):
                wrong.append((*where, "site-1 rows missing", r.text[:200]))
            if found := leaks(r, world):
                wrong.append((*where, "site-2 data shown", found))
    assert not wrong, "\n".join(map(str, wrong))
    assert snapshot(db) == before, "a refused request changed the database"


def test_the_same_requests_on_site_1_are_not_refused(app, world, key_client, rng):
    """The control: each REFUSE probe with site-1 ids is a valid request that the key may make."""
    refused = []
    for (method, path), rule in sorted(SITE_RULES.items()):
        if rule[0] != REFUSE or (method, path) in ALWAYS_REFUSED:
            continue
        url = _url(path, world, world.s1)
        for kwargs in _refusal_requests(rule, world, world.s1, rng):
            r = key_client.request(method, url, **kwargs)
            assert r.status_code < 500, (method, url, r.text[:300])
            if r.status_code in (401, 403):
                refused.append((method, url, r.status_code, r.text[:200]))
    assert not refused, "\n".join(map(str, refused))


def test_job_counts_are_of_the_callers_site(world, key_client):
    r = key_client.get("/api/v1/jobs", params={"state": "done"})
    assert r.status_code == 200
    assert r.json()["counts"] == {"done": 1}, r.json()  # the site-1 record's job; not site 2's
    assert [j["record_id"] for j in r.json()["jobs"]] == [world.s1.record]


def test_site_limited_keys_cannot_widen_their_reach(world, key_client):
    r = key_client.post("/api/v1/apikeys", json={"name": "wider"})  # an unlimited key
    assert r.status_code == 403 and r.json()["error"]["field"] == "site_id", r.text
    for method, path in sorted(ALWAYS_REFUSED):
        for kwargs in _refusal_requests(SITE_RULES[method, path], world, world.s1, None):
            r = key_client.request(method, _url(path, world, world.s1), **kwargs)
            assert r.status_code == 403, (method, path, r.text)


def test_updates_check_the_site_as_it_will_be(app, world, key_client):
    db = app.state.db
    before = snapshot(db)
    for method, path, make in MOVES:
        url = path.format(p1=world.s1.point, a1=world.s1.asset, r1=world.s1.route)
        r = key_client.request(method, url, json=make(world))
        assert r.status_code == 403 and "outside the site" in r.json()["error"]["message"], (url, r.text)
    assert snapshot(db) == before


def test_a_move_between_sites_keeps_routes_on_one_site(app, world):
    """Even an unlimited caller cannot leave a route with a stop on another site."""
    from server.errors import AppError
    from server.services import assets
    from server.storage.tables import Point

    db = app.state.db
    with pytest.raises(AppError) as err:  # the point is a stop of the site-1 route
        assets.update(db, "point", world.s1.point, {"asset_id": world.s2.asset}, SETUP)
    assert err.value.status == 409 and err.value.field == "asset_id"
    with pytest.raises(AppError) as err:  # the route's stops stay on site 1
        assets.update(db, "route", world.s1.route, {"site_id": world.s2.site}, SETUP)
    assert err.value.status == 422 and err.value.field == "stops"
    # a point on no route may move, by a caller who may use both sites
    free = assets.create(db, "point", {"asset_id": world.s1.asset, "name": "spare"}, SETUP)["point"]["id"]
    assets.update(db, "point", free, {"asset_id": world.s2.asset}, SETUP)
    with db.read() as s:
        assert s.get(Point, free).asset_id == world.s2.asset


def test_the_isolation_test_can_fail(app, world, rng):
    """The checks see a leak: an unlimited key gets site-2 data and is not refused."""
    from server.services.users import create_api_key

    key, _ = create_api_key(app.state.db, name="unlimited", role="admin")
    with TestClient(app) as c:
        c.headers["Authorization"] = f"Bearer {key}"
        r = c.get("/api/v1/tree")
        assert leaks(r, world) and shows_site1(r, world, "Riverside works")
        r = c.get(_url("/api/v1/records/{record_id}", world, world.s2))
        assert r.status_code == 200 and leaks(r, world)
        r = c.get("/api/v1/alarms/history.csv")
        assert f"point_id={world.s2.point}" in leaks(r, world)
