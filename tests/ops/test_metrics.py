"""``/metrics``, ``/readyz`` and the heartbeats they read.

The exposition is parsed with prometheus-client's own text parser (the reference implementation of
the Prometheus text format 0.0.4), and every figure is compared with a count taken straight from the
database or with what the test did.
"""

from __future__ import annotations

import base64
import datetime as dt
import threading

import pytest
from ops.mqtt_broker import Listener, Running, broker, mqtt_settings, record_payload, wait_until  # noqa: F401
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import func, select, update
from support.signals import tone_record

from server.alarms.tables import AlarmEvent, AlarmState, AlarmSubscription, OutboxMessage
from server.ops.tables import ServiceHeartbeat
from server.worker import run_forever

T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


def scrape(client, **headers) -> dict:
    """{(sample name, frozenset(labels)): value} from /metrics."""
    r = client.get("/metrics", headers=headers, follow_redirects=False)
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/plain; version=0.0.4")
    out = {}
    for fam in text_string_to_metric_families(r.text):
        for s in fam.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def value(samples: dict, name: str, **labels) -> float:
    return samples[(name, frozenset(labels.items()))]


def post_json(client, headers, point_id, x, when, ref):
    return client.post(f"/api/v1/points/{point_id}/records", headers=headers, json={
        "fs_hz": 2560.0, "units": "m/s2", "measured_at": when.isoformat(), "speed_hz": 24.75,
        "client_ref": ref, "samples_b64": base64.b64encode(x.astype("<f4").tobytes()).decode()})


@pytest.mark.slow
def test_metrics_after_ingest_over_http_and_mqtt_and_a_worker_run(
        client, plant, plant_key_headers, migrated_db, hw_settings, broker, rng):  # noqa: F811
    db = migrated_db
    with db.unit_of_work() as s:  # a planner subscribed to the site: alarms queue emails (no SMTP here)
        s.add(AlarmSubscription(email="planner@example.test", scope="site", scope_id=plant.site_id,
                                min_level="alert"))
    # zone C level (ISO 20816-3 group 2 rigid, 2.8-4.5 mm/s r.m.s.): 0.9 m/s2 at 24.75 Hz is 4.09 mm/s
    for i in range(2):
        r = post_json(client, plant_key_headers, plant.point_id, tone_record(rng, amp_1x=0.9, amp_half=0.2),
                      T0 + dt.timedelta(hours=i), f"h{i}")
        assert r.status_code == 201, r.text
    listen = Listener(broker.port)
    run = Running(db, mqtt_settings(hw_settings, broker))
    try:
        topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
        listen.publish(topic, record_payload(tone_record(rng, amp_1x=0.9, amp_half=0.2),
                                             T0 + dt.timedelta(hours=2), "m0", speed_hz=24.75))
        listen.publish(topic, b"not a record")
        assert wait_until(lambda: len(listen.replies) == 2)
    finally:
        run.stop()
        listen.close()

    before = scrape(client)
    assert value(before, "halfwatch_records_ingested_total", origin="api") == 2
    assert value(before, "halfwatch_records_ingested_total", origin="mqtt") == 1
    assert value(before, "halfwatch_records_ingested_total", origin="upload") == 0
    assert value(before, "halfwatch_jobs", state="queued") == 3
    assert value(before, "halfwatch_job_oldest_age_seconds") > 0
    assert value(before, "halfwatch_analysis_duration_seconds_count") == 0
    assert value(before, "halfwatch_mqtt_messages_total", outcome="stored") == 1
    assert value(before, "halfwatch_mqtt_messages_total", outcome="rejected") == 1
    assert value(before, "halfwatch_mqtt_rejects_total", code="invalid") == 1
    assert value(before, "halfwatch_mqtt_bridges_connected") == 0  # it stopped
    assert value(before, "halfwatch_database_up") == 1

    assert run_forever(db, hw_settings, max_jobs=3) == 3
    after = scrape(client)
    assert value(after, "halfwatch_jobs", state="queued") == 0
    assert value(after, "halfwatch_jobs", state="failed") == 0
    assert value(after, "halfwatch_job_oldest_age_seconds") == 0
    assert value(after, "halfwatch_analysis_duration_seconds_count") == 3
    assert value(after, "halfwatch_analysis_duration_seconds_bucket", le="+Inf") == 3
    assert value(after, "halfwatch_analysis_duration_seconds_sum") > 0
    assert value(after, "halfwatch_records_ingested_total", origin="api") == 2  # no double count
    with db.read() as s:
        levels = dict(s.execute(select(AlarmState.level, func.count()).group_by(AlarmState.level)).all())
        entered = dict(s.execute(select(AlarmEvent.to_level, func.count())
                                 .where(AlarmEvent.kind == "transition").group_by(AlarmEvent.to_level)).all())
        pending = s.scalar(select(func.count()).select_from(OutboxMessage)
                           .where(OutboxMessage.status == "pending"))
    assert levels.get("alert", 0) + levels.get("danger", 0) >= 1, levels  # the zone C record alarmed
    for level in ("normal", "alert", "danger"):
        assert value(after, "halfwatch_alarms", level=level) == levels.get(level, 0)
        assert value(after, "halfwatch_alarm_transitions_total", level=level) == entered.get(level, 0)
    assert pending >= 1
    assert value(after, "halfwatch_outbox_messages", status="pending") == pending
    assert value(after, "halfwatch_outbox_oldest_age_seconds") >= 0
    route = "/api/v1/points/{point_id}/records"
    assert value(after, "halfwatch_http_request_duration_seconds_count", method="POST", route=route,
                 status="201") == 2
    raw_paths = [k for k in after if ("route", f"/api/v1/points/{plant.point_id}/records") in k[1]]
    assert raw_paths == []  # labelled by template, never by the raw path

    # one more record: the incremental tally adds exactly one
    assert post_json(client, plant_key_headers, plant.point_id, tone_record(rng), T0 + dt.timedelta(hours=3),
                     "h3").status_code == 201
    assert value(scrape(client), "halfwatch_records_ingested_total", origin="api") == 3


def test_openmetrics_on_request_and_no_redirect(client):
    r = client.get("/metrics", headers={"Accept": "application/openmetrics-text; version=1.0.0"},
                   follow_redirects=False)
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("application/openmetrics-text")
    assert r.text.endswith("# EOF\n")  # OpenMetrics 1.0: the exposition ends with an EOF marker


def test_metrics_token(tmp_path, migrated_db):
    from fastapi.testclient import TestClient
    from support.fixtures import settings_for

    from server.app import create_app

    settings = settings_for(tmp_path, metrics_token="s3cret-scrape")
    with TestClient(create_app(settings)) as c:
        r = c.get("/metrics")
        assert r.status_code == 401 and r.json()["error"]["field"] == "authorization"
        assert c.get("/metrics", headers={"Authorization": "Bearer wrong"}).status_code == 401
        assert scrape(c, Authorization="Bearer s3cret-scrape")[("halfwatch_database_up", frozenset())] == 1


def test_a_database_without_schema_reports_down_instead_of_failing(tmp_path, hw_settings):
    from server.metrics import Metrics
    from server.storage import Database

    db = Database(f"sqlite:///{tmp_path / 'empty.db'}")
    try:
        body, _ = Metrics(db, hw_settings).render(None)
    finally:
        db.dispose()
    samples = {s.name: s.value for fam in text_string_to_metric_families(body.decode()) for s in fam.samples}
    assert samples["halfwatch_database_up"] == 0
    assert "halfwatch_jobs" not in samples


def test_readyz_follows_the_worker_heartbeat(client, migrated_db, hw_settings):
    r = client.get("/readyz")
    assert r.status_code == 503 and "has ever run" in r.json()["reason"]
    settings = hw_settings.model_copy(update={"heartbeat_s": 0.1})
    stop = threading.Event()
    t = threading.Thread(target=run_forever, args=(migrated_db, settings), kwargs={"stop": stop})
    t.start()
    try:
        assert wait_until(lambda: client.get("/readyz").status_code == 200, timeout_s=10)
        body = client.get("/readyz").json()
        assert body["ok"] and body["workers_live"] == 1 and body["worker_heartbeat_age_s"] < 5
        assert value(scrape(client), "halfwatch_services_live", kind="worker") == 1
    finally:
        stop.set()
        t.join(10)
    r = client.get("/readyz")  # the worker said it stopped
    assert r.status_code == 503 and "stopped" in r.json()["reason"]
    with migrated_db.unit_of_work() as s:  # a worker that died without a word: only its age tells
        s.execute(update(ServiceHeartbeat).values(status="running",
                                                  beat_at=dt.datetime.now(dt.UTC) - dt.timedelta(minutes=5)))
    r = client.get("/readyz")
    assert r.status_code == 503 and "no analysis worker beat" in r.json()["reason"]
    assert client.get("/healthz").status_code == 200  # alive, though not ready


def test_bridge_worker_and_scrape_on_each_backend(backend, broker, rng):  # noqa: F811
    """The same path on SQLite and on PostgreSQL (when HALFWATCH_TEST_POSTGRES_URL is set)."""
    from prometheus_client.parser import text_string_to_metric_families as parse

    from server.metrics import Metrics

    db, settings, plant = backend
    settings = mqtt_settings(settings, broker)
    listen = Listener(broker.port)
    run = Running(db, settings)
    try:
        topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
        xs = [tone_record(rng) for _ in range(3)]
        for i, x in enumerate(xs):
            listen.publish(topic, record_payload(x, T0 + dt.timedelta(hours=i), None))
        listen.publish(topic, record_payload(xs[0], T0, None))  # a repeat: the derived reference matches
        assert wait_until(lambda: len(listen.replies) == 4)
    finally:
        run.stop()
        listen.close()
    assert [r["created"] for r in listen.replies] == [True, True, True, False]
    assert run_forever(db, settings, max_jobs=3) == 3
    metrics = Metrics(db, settings)
    for _ in range(2):  # the second scrape reads incrementally and must not count twice
        body, _ = metrics.render(None)
        got = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for f in parse(body.decode()) for s in f.samples}
        assert got[("halfwatch_records_ingested_total", (("origin", "mqtt"),))] == 3
        assert got[("halfwatch_mqtt_messages_total", (("outcome", "duplicate"),))] == 1
        assert got[("halfwatch_analysis_duration_seconds_count", ())] == 3
        assert got[("halfwatch_jobs", (("state", "queued"),))] == 0
        assert got[("halfwatch_database_up", ())] == 1


def test_records_committed_out_of_id_order_are_counted_once(migrated_db, plant, hw_settings):
    """A transaction that got a lower id but commits later (possible on PostgreSQL) is not missed."""
    from server.metrics import Metrics
    from server.storage.tables import Record

    def add(rid: int, age_s: float, origin: str = "api"):
        when = dt.datetime.now(dt.UTC) - dt.timedelta(seconds=age_s)
        with migrated_db.unit_of_work() as s:
            s.add(Record(id=rid, point_id=plant.point_id, measured_at=T0, received_at=when, fs_hz=2560.0,
                         n_samples=4096, units="m/s2", origin=origin, uploader="t", checksum=f"{rid:064x}"))

    metrics = Metrics(migrated_db, hw_settings)

    def ingested(origin="api") -> float:
        body, _ = metrics.render(None)
        samples = [s for f in text_string_to_metric_families(body.decode()) for s in f.samples]
        return {(s.name, s.labels.get("origin")): s.value for s in samples}[
            ("halfwatch_records_ingested_total", origin)]

    for rid in (1, 2, 3):
        add(rid, age_s=3600)  # settled history
    add(10, age_s=1)
    assert ingested() == 4
    add(7, age_s=2, origin="mqtt")  # lower id, committed after the scrape above
    assert ingested() == 4 and ingested("mqtt") == 1
    assert ingested() == 4 and ingested("mqtt") == 1  # recounting the young rows never doubles them
