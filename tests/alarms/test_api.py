"""The alarm API with real sessions and roles: list, acknowledge, shelve, history, subscriptions."""

from __future__ import annotations

from alarms.helpers import make_result

ONSET = [0.2, 0.3, 1.5, 1.6]
SUBS = "/api/v1/alarms/subscriptions"


def _raise_alert(feeder, plant):
    for v in ONSET:
        feeder.feed(plant.point_id, make_result(half_v=v))


def assert_error(resp, status, field=None):
    assert resp.status_code == status, resp.text
    body = resp.json()
    assert body["ok"] is False and body["status"] == status
    if field:
        assert body["error"]["field"] == field, body


def test_engineer_acknowledges_through_the_api(app, users, plant, feeder):
    _raise_alert(feeder, plant)
    viewer, engineer = users.login("viewer"), users.login("engineer")
    r = viewer.get("/api/v1/alarms", params={"site_id": plant.site_id, "level": "alert"})
    assert r.status_code == 200
    [alarm] = [a for a in r.json()["alarms"] if a["metric"] == "half_order_velocity"]
    assert alarm["asset"] == "CW pump 1" and alarm["point"] == "P1-DE-H" and alarm["value"] == 1.6
    assert_error(viewer.post(f"/api/v1/alarms/{alarm['id']}/acknowledge", json={"comment": "seen"}), 403)
    assert_error(engineer.post(f"/api/v1/alarms/{alarm['id']}/acknowledge", json={}), 422, "comment")
    assert_error(engineer.post("/api/v1/alarms/99999/acknowledge", json={"comment": "x"}), 404)
    r = engineer.post(f"/api/v1/alarms/{alarm['id']}/acknowledge", json={"comment": "oil sample taken"})
    assert r.status_code == 200 and r.json()["event"]["kind"] == "acknowledged"
    acked = viewer.get("/api/v1/alarms", params={"view": "acknowledged"}).json()["alarms"]
    assert [a["ack_comment"] for a in acked if a["id"] == alarm["id"]] == ["oil sample taken"]
    assert alarm["id"] not in [a["id"] for a in viewer.get("/api/v1/alarms").json()["alarms"]]
    params = {"asset_id": plant.asset_ids["pump"]}
    trail = viewer.get("/api/v1/alarms/history", params=params).json()["events"]
    assert trail[0]["kind"] == "acknowledged" and trail[0]["actor"] == "engineer1"


def test_shelve_validation_and_listing(app, users, plant, feeder):
    _raise_alert(feeder, plant)
    engineer = users.login("engineer")
    alarm = engineer.get("/api/v1/alarms").json()["alarms"][0]
    url = f"/api/v1/alarms/{alarm['id']}/shelve"
    assert_error(engineer.post(url, json={"until": "2020-01-01T00:00:00Z", "reason": "x"}), 422, "until")
    assert_error(engineer.post(url, json={"until": "2099-01-01T00:00:00", "reason": "x"}), 422, "until")
    assert_error(engineer.post(url, json={"until": "not a date", "reason": "x"}), 422, "until")
    import datetime as dt

    until = (dt.datetime.now(dt.UTC) + dt.timedelta(days=3)).isoformat()
    r = engineer.post(url, json={"until": until, "reason": "sensor replaced on Monday"})
    assert r.status_code == 200
    shelved = engineer.get("/api/v1/alarms", params={"view": "shelved"}).json()["alarms"]
    assert [a["shelve_reason"] for a in shelved] == ["sensor replaced on Monday"]
    assert engineer.post(f"/api/v1/alarms/{alarm['id']}/unshelve").status_code == 200
    assert engineer.get("/api/v1/alarms", params={"view": "shelved"}).json()["alarms"] == []


def test_data_quality_events_are_for_engineers(app, users, plant, feeder):
    feeder.feed(plant.point_id, make_result(half_v=4.0, flags=("clipping",), ok=False))
    viewer, engineer = users.login("viewer"), users.login("engineer")
    assert viewer.get("/api/v1/alarms/history").json()["events"] == []
    assert_error(viewer.get("/api/v1/alarms/data-quality"), 403)
    [dq] = engineer.get("/api/v1/alarms/data-quality").json()["points"]
    assert dq["point"] == "P1-DE-H" and "clipping" in dq["reason"]
    assert [e["kind"] for e in engineer.get("/api/v1/alarms/history").json()["events"]] == ["data-quality"]


def test_subscriptions_api(app, users, plant):
    tech, engineer = users.login("technician"), users.login("engineer")
    r = tech.post("/api/v1/alarms/subscriptions", json={"scope": "area", "scope_id": plant.area_id,
                                                        "mode": "digest", "digest_time": "06:45",
                                                        "timezone": "America/Chicago"})
    assert r.status_code == 201, r.text
    mine = r.json()["subscription"]
    assert mine["email"] == "technician1@example.test"
    site = {"scope": "site", "scope_id": plant.site_id}
    assert_error(tech.post(SUBS, json={"email": "boss@example.test", **site}), 403, "email")
    other = {"email": "planner@example.test"}
    assert_error(engineer.post(SUBS, json={**other, "scope": "site", "scope_id": 999}), 422, "scope_id")
    assert_error(engineer.post(SUBS, json={**other, **site, "timezone": "Mars/Olympus"}), 422, "timezone")
    assert_error(engineer.post(SUBS, json={**other, **site, "digest_time": "25:00"}), 422, "digest_time")
    r = engineer.post("/api/v1/alarms/subscriptions", json={"email": "Planner@Example.test", "scope": "site",
                                                            "scope_id": plant.site_id, "min_level": "danger"})
    assert r.status_code == 201 and r.json()["subscription"]["email"] == "planner@example.test"
    assert [s["id"] for s in tech.get("/api/v1/alarms/subscriptions").json()["subscriptions"]] == [mine["id"]]
    assert len(engineer.get("/api/v1/alarms/subscriptions").json()["subscriptions"]) == 2
    assert_error(tech.delete(f"/api/v1/alarms/subscriptions/{r.json()['subscription']['id']}"), 403)
    assert tech.delete(f"/api/v1/alarms/subscriptions/{mine['id']}").status_code == 200
    assert tech.get("/api/v1/alarms/subscriptions").json()["subscriptions"] == []


def test_rules_api(app, users, plant):
    viewer, engineer = users.login("viewer"), users.login("engineer")
    rules = viewer.get("/api/v1/alarms/rules", params={"point_id": plant.point_id}).json()["rules"]
    assert {r["metric"] for r in rules} >= {"half_order_velocity", "overall_velocity", "threshold_margin"}
    assert_error(engineer.put("/api/v1/alarms/rules", json={"point_id": plant.point_id,
                                                            "metric": "half_order_velocity",
                                                            "alert": 3.0, "danger": 2.0}), 422, "danger")
    body = {"asset_id": plant.asset_ids["pump"], "metric": "half_order_velocity", "alert": 1.0, "danger": 2.0}
    r = engineer.put("/api/v1/alarms/rules", json=body)
    assert r.status_code == 200, r.text
    rules = viewer.get("/api/v1/alarms/rules", params={"point_id": plant.point_id}).json()["rules"]
    [half] = [r for r in rules if r["metric"] == "half_order_velocity"]
    assert half["asset_id"] == plant.asset_ids["pump"] and half["alert"] == 1.0  # asset rule over default
