"""The MQTT bridge against a real mosquitto broker: round trip, rejects, restarts, redelivery.

Delivery semantics checked here are those of MQTT 3.1.1 (OASIS Standard, 2014): QoS 1 is "at least
once" (§4.3.2), a session with CleanSession=0 keeps subscriptions and queued QoS 1 messages while
the client is away (§3.1.2.4), and unacknowledged messages are sent again on reconnect (§4.4).
The bridge must turn "at least once" into "exactly once" in the store.
"""

from __future__ import annotations

import base64
import datetime as dt
import json
import threading
from pathlib import Path

import numpy as np
import pytest
from ops.mqtt_broker import (  # noqa: F401 (fixtures)
    Listener,
    Running,
    broker,
    durable_broker,
    gateway,
    mqtt_settings,
    record_payload,
    wait_until,
)
from sqlalchemy import func, select
from support.fixtures import settings_for
from support.plant import make_plant
from support.signals import tone_record

from server.mqtt.bridge import Bridge
from server.storage.tables import Job, Record, Result

ROOT = Path(__file__).resolve().parents[2]
T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


def count(db, model) -> int:
    with db.read() as s:
        return s.scalar(select(func.count()).select_from(model))


def test_json_and_binary_forms_store_the_same_samples(migrated_db, plant, hw_settings, broker, rng):  # noqa: F811
    x = tone_record(rng, amp_half=0.2)
    listen = Listener(broker.port)
    run = Running(migrated_db, mqtt_settings(hw_settings, broker))
    try:
        topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
        listen.publish(topic, gateway.payload(x, {"fs_hz": 2560, "units": "m/s2", "measured_at":
                                                  T0.isoformat(), "client_ref": "j1"}, binary=False))
        listen.publish(topic, gateway.payload(x, {"fs_hz": 2560, "units": "m/s2", "measured_at":
                                                  T0.isoformat(), "client_ref": "b1"}, binary=True))
        assert wait_until(lambda: len(listen.replies) == 2)
    finally:
        run.stop()
        listen.close()
    assert all(r["ok"] and r["created"] for r in listen.replies), listen.replies
    from server.storage import blobs
    from server.storage.tables import Waveform

    with migrated_db.read() as s:
        rows = s.execute(select(Record.client_ref, Record.origin, Waveform.codec, Waveform.data)
                         .join(Waveform, Waveform.record_id == Record.id).order_by(Record.id)).all()
    assert [r.client_ref for r in rows] == ["j1", "b1"]
    assert {r.origin for r in rows} == {"mqtt"}
    for r in rows:  # IEEE 754 binary32 little-endian, bit for bit (numpy's '<f4' is the reference)
        stored = blobs.decode_waveform(r.codec, r.data)
        assert np.array_equal(stored.view(np.uint32), x.astype("<f4").view(np.uint32))


def _rows(db):
    from server.alarms.tables import AlarmEvent, AlarmState

    with db.read() as s:
        recs = [(r.measured_at, r.fs_hz, r.n_samples, r.units, r.speed_hz, r.checksum, r.client_ref)
                for r in s.scalars(select(Record).order_by(Record.measured_at))]
        results = [json.loads(r.data) for r in s.scalars(select(Result).order_by(Result.measured_ts))]
        states = sorted((a.metric, a.level, a.last_value) for a in s.scalars(select(AlarmState)))
        events = [(e.kind, e.metric, e.from_level, e.to_level, e.value)
                  for e in s.scalars(select(AlarmEvent).order_by(AlarmEvent.id))]
    return recs, results, states, events


@pytest.mark.slow
def test_gateway_records_are_analysed_and_alarmed_exactly_as_over_http(
        client, plant, plant_key_headers, migrated_db, hw_settings, broker, rng, tmp_path):  # noqa: F811
    from server.storage import Database
    from server.worker import run_forever

    # zone C overall level (ISO 20816-3, group 2, rigid: 2.8-4.5 mm/s r.m.s.) from a 1X tone of
    # 0.9 m/s2 at 24.75 Hz: 0.9 / (2*pi*24.75) / sqrt(2) = 4.09 mm/s r.m.s. (worked by hand), plus 0.5X.
    records = [tone_record(rng, amp_1x=0.9, amp_half=0.15 + 0.05 * i) for i in range(3)]
    files = []
    for i, x in enumerate(records):
        path = tmp_path / f"rec{i}.f32"
        x.astype("<f4").tofile(path)
        files.append(path)
        when = (T0 + dt.timedelta(hours=i)).isoformat().replace("+00:00", "Z")
        r = client.post(f"/api/v1/points/{plant.point_id}/records", headers=plant_key_headers, json={
            "fs_hz": 2560.0, "units": "m/s2", "measured_at": when, "speed_hz": 24.75,
            "client_ref": f"gw-rec{i}.f32-{when}",
            "samples_b64": base64.b64encode(x.astype("<f4").tobytes()).decode()})
        assert r.status_code == 201, r.text

    other = settings_for(tmp_path / "mqtt-side")
    from server.migrations import upgrade

    upgrade(other.database_url)
    db2 = Database(other.database_url)
    try:
        plant2 = make_plant(db2)
        assert plant2.point_id == plant.point_id
        run = Running(db2, mqtt_settings(other, broker))
        try:
            code = gateway.main(["--port", str(broker.port), "--topic",
                                 f"halfwatch/Riverside works/{plant2.point_id}/records", "--fs-hz", "2560",
                                 "--speed-hz", "24.75", "--measured-at", T0.isoformat(),
                                 "--spacing-s", "3600", "--timeout-s", "30", *map(str, files)])
            assert code == 0
        finally:
            run.stop()
        assert run_forever(migrated_db, hw_settings, max_jobs=3) == 3
        assert run_forever(db2, other, max_jobs=3) == 3
        http_side, mqtt_side = _rows(migrated_db), _rows(db2)
    finally:
        db2.dispose()
    assert http_side[0] == mqtt_side[0]  # same records: times, rates, units, checksums, references
    assert len(mqtt_side[1]) == 3
    assert http_side[1] == mqtt_side[1]  # same analysis output, key by key
    assert http_side[2] == mqtt_side[2]  # same alarm states
    assert http_side[3] == mqtt_side[3]  # same audit trail of transitions
    assert any(level != "normal" for _, level, _ in mqtt_side[2]), mqtt_side[2]
    for res in mqtt_side[1]:  # 0.5X of the 24.75 Hz forcing (common practice: the meaning of 0.5X)
        assert res["subharmonic"]["detected"]
        assert res["subharmonic"]["frequency_hz"] == pytest.approx(24.75 / 2, abs=0.1)


BAD = [  # (why, topic suffix or None for the plant's point, payload, expected field, expected status)
    ("not JSON", None, b"hello gateway", "payload", 422),
    ("missing rate", None, json.dumps({"units": "g", "measured_at": "2026-03-02T08:00:00Z",
                                       "samples": [0.0] * 300}).encode(), "fs_hz", 422),
    ("bad base64", None, json.dumps({"fs_hz": 2560, "units": "g", "measured_at": "2026-03-02T08:00:00Z",
                                     "samples_b64": "***"}).encode(), "samples_b64", 422),
    ("no zone", None, json.dumps({"fs_hz": 2560, "units": "g", "measured_at": "2026-03-02T08:00:00",
                                  "samples": [0.0] * 300}).encode(), "measured_at", 422),
    ("unknown units", None, json.dumps({"fs_hz": 2560, "units": "furlongs",
                                        "measured_at": "2026-03-02T08:00:00Z",
                                        "samples": [0.1] * 300}).encode(), "units", 422),
    ("too short", None, json.dumps({"fs_hz": 2560, "units": "g", "measured_at": "2026-03-02T08:00:00Z",
                                    "samples": [0.1] * 10}).encode(), "samples", 422),
    ("odd binary", None, b'{"fs_hz":2560,"units":"g","measured_at":"2026-03-02T08:00:00Z"}\x00abcde',
     "binary samples", 422),
    ("samples twice", None, b'{"fs_hz":2560,"units":"g","measured_at":"2026-03-02T08:00:00Z",'
                            b'"samples":[1,2]}\x00abcd', "samples_b64", 422),
    ("unknown point", "halfwatch/Riverside works/99999/records", b"{}", "topic", 404),
    ("not an id", "halfwatch/Riverside works/P1-DE-H/records", b"{}", "topic", 422),
    ("unknown site", "halfwatch/Nowhere/1/records", b"{}", "topic", 404),
]


def test_malformed_payloads_are_rejected_on_the_reply_topic_and_nothing_is_stored(
        migrated_db, plant, hw_settings, broker):  # noqa: F811
    listen = Listener(broker.port)
    run = Running(migrated_db, mqtt_settings(hw_settings, broker))
    good_topic = f"halfwatch/Riverside works/{plant.point_id}/records"
    other_site_topic = f"halfwatch/Riverside works/{plant.other_point_id}/records"  # point of another site
    cases = [*BAD, ("other site's point", other_site_topic, b"{}", "topic", 404)]
    try:
        for _, topic, payload, _, _ in cases:
            listen.publish(topic or good_topic, payload)
        assert wait_until(lambda: len(listen.replies) == len(cases))
    finally:
        run.stop()
        listen.close()
    assert count(migrated_db, Record) == 0 and count(migrated_db, Job) == 0
    for (why, topic, _, field, status), reply in zip(cases, listen.replies, strict=True):
        assert reply["topic"] == (topic or good_topic), why
        assert reply["reply_topic"] == (topic or good_topic) + "/reply", why
        assert reply["ok"] is False and reply["status"] == status, (why, reply)
        assert reply["error"]["field"] == field, (why, reply)
        assert reply["error"]["message"], why


def test_reused_client_ref_with_other_samples_is_a_conflict(migrated_db, plant, hw_settings, broker, rng):  # noqa: F811
    listen = Listener(broker.port)
    run = Running(migrated_db, mqtt_settings(hw_settings, broker))
    topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
    try:
        listen.publish(topic, record_payload(tone_record(rng), T0, "same"))
        listen.publish(topic, record_payload(tone_record(rng), T0, "same"))
        assert wait_until(lambda: len(listen.replies) == 2)
    finally:
        run.stop()
        listen.close()
    first, second = listen.replies
    assert first["ok"] and first["created"]
    assert second["status"] == 409 and second["error"]["field"] == "client_ref"
    assert count(migrated_db, Record) == 1


class DiesAfterCommit(Bridge):
    """Commits the record, then stops before replying or acknowledging (as if the process died)."""

    def _finish(self, item, handled):
        self._stop.set()


def test_bridge_dying_between_commit_and_ack_gets_the_redelivery_and_stores_once(
        migrated_db, plant, hw_settings, broker, rng):  # noqa: F811
    settings = mqtt_settings(hw_settings, broker)
    listen = Listener(broker.port)
    topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
    try:
        dying = Running(migrated_db, settings, DiesAfterCommit)
        listen.publish(topic, record_payload(tone_record(rng), T0, None))  # no client_ref: derived one
        assert wait_until(lambda: count(migrated_db, Record) == 1)
        dying.stop()
        assert listen.replies == []
        run = Running(migrated_db, settings)  # same client id: the broker redelivers the unacked message
        try:
            assert wait_until(lambda: len(listen.replies) == 1)
        finally:
            run.stop()
        run = Running(migrated_db, settings)  # and it was acknowledged this time: nothing comes again
        try:
            assert not wait_until(lambda: len(listen.replies) > 1, timeout_s=1.5)
        finally:
            run.stop()
    finally:
        listen.close()
    (reply,) = listen.replies
    assert reply["ok"] and reply["created"] is False and reply["client_ref"].startswith("mqtt:")
    assert count(migrated_db, Record) == 1 and count(migrated_db, Job) == 1


def test_records_published_while_the_bridge_is_down_are_stored_when_it_returns(
        migrated_db, plant, hw_settings, broker, rng):  # noqa: F811
    settings = mqtt_settings(hw_settings, broker)
    Running(migrated_db, settings).stop()  # the persistent session now exists at the broker
    listen = Listener(broker.port)
    topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
    try:
        for i in range(5):
            listen.publish(topic, record_payload(tone_record(rng), T0 + dt.timedelta(minutes=i), f"off{i}"))
        assert count(migrated_db, Record) == 0
        run = Running(migrated_db, settings)
        try:
            assert wait_until(lambda: len(listen.replies) == 5)
        finally:
            run.stop()
    finally:
        listen.close()
    with migrated_db.read() as s:
        refs = list(s.scalars(select(Record.client_ref).order_by(Record.id)))
    assert refs == [f"off{i}" for i in range(5)]  # in publication order (MQTT 3.1.1 §4.6)


class RecordsLock:
    """Another connection that holds the records table, so the bridge's insert waits (both backends)."""

    def __init__(self, db):
        self.db, self.conn, self.tx = db, None, None

    def hold(self):
        if self.db.dialect == "sqlite":
            import sqlite3

            self.conn = sqlite3.connect(self.db.url.split("///", 1)[1], isolation_level=None, timeout=10)
            self.conn.execute("BEGIN IMMEDIATE")
        else:
            from sqlalchemy import text

            self.conn = self.db.write_engine.connect()
            self.tx = self.conn.begin()
            self.conn.execute(text("LOCK TABLE records IN EXCLUSIVE MODE"))  # reads still pass

    def release(self):
        if self.conn is None:
            return
        if self.tx is not None:
            self.tx.commit()
        else:
            self.conn.execute("COMMIT")
        self.conn.close()
        self.conn = self.tx = None


@pytest.mark.slow
def test_broker_killed_and_restarted_mid_stream_loses_and_doubles_nothing(
        migrated_db, plant, hw_settings, durable_broker, rng, tmp_path):  # noqa: F811
    """SIGKILL of the broker while the bridge holds unacknowledged messages (its database is locked)
    and the broker holds queued ones; the gateway keeps publishing through the outage."""
    n = 30
    settings = mqtt_settings(hw_settings, durable_broker)
    topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
    payloads = [record_payload(tone_record(rng, n=4096), T0 + dt.timedelta(minutes=i),
                               f"s{i}" if i % 2 else None) for i in range(n)]  # half without client_ref
    run = Running(migrated_db, settings)
    gw = Listener(durable_broker.port)
    lock = RecordsLock(migrated_db)
    try:
        mids = [gw.send(topic, p) for p in payloads[:10]]
        assert wait_until(lambda: count(migrated_db, Record) >= 3)
        lock.hold()  # the bridge blocks inside its insert, holding its acks back
        mids += [gw.send(topic, p) for p in payloads[10:20]]
        assert wait_until(lambda: set(mids) <= gw.acked)  # the broker has taken all twenty
        threading.Event().wait(0.5)  # ... and saved them (autosave_on_changes)
        durable_broker.kill()
        mids += [gw.send(topic, p) for p in payloads[20:]]  # published while the broker is down
        durable_broker.start()
        threading.Event().wait(0.5)
        lock.release()
        assert wait_until(lambda: set(mids) <= gw.acked, timeout_s=30)
        assert wait_until(lambda: count(migrated_db, Record) == n, timeout_s=30), count(migrated_db, Record)
        assert not wait_until(lambda: count(migrated_db, Record) > n, timeout_s=1.0)
        stats = run.bridge.heartbeat.snapshot()["counters"]
    finally:
        lock.release()
        run.stop()
        gw.close()
    # the message held in the locked commit was stored, then delivered again by the restarted broker
    assert stats.get("messages|outcome=duplicate", 0) >= 1, stats
    assert stats["messages|outcome=stored"] == n
    with migrated_db.read() as s:
        times = list(s.scalars(select(Record.measured_at).order_by(Record.measured_at)))
    assert times == [T0 + dt.timedelta(minutes=i) for i in range(n)]  # each record once
    assert count(migrated_db, Job) == n


def _bridge_process(settings, log_path):
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    env.update({"HALFWATCH_DATABASE_URL": settings.database_url,
                "HALFWATCH_MQTT_PORT": str(settings.mqtt_port),
                "HALFWATCH_MQTT_CLIENT_ID": settings.mqtt_client_id, "HALFWATCH_HEARTBEAT_S": "0.2",
                "HALFWATCH_MQTT_RECONNECT_MAX_S": "2", "PYTHONPATH": str(ROOT), "PYTHONUNBUFFERED": "1"})
    with open(log_path, "ab") as log:
        return subprocess.Popen([sys.executable, "-m", "server", "mqtt-bridge"], env=env, cwd=ROOT,
                                stdout=log, stderr=subprocess.STDOUT)


def connected(db) -> bool:
    from server.ops.tables import ServiceHeartbeat

    with db.read() as s:
        return s.scalar(select(func.count()).select_from(ServiceHeartbeat)
                        .where(ServiceHeartbeat.status == "connected")) > 0


@pytest.mark.slow
def test_bridge_process_killed_mid_stream_then_restarted_stores_each_record_once(
        migrated_db, plant, hw_settings, broker, rng, tmp_path):  # noqa: F811
    """`halfwatch mqtt-bridge` as its own process: SIGKILL while records stream in, start it again."""
    from server.ops.tables import ServiceHeartbeat

    settings = mqtt_settings(hw_settings, broker, mqtt_client_id="hw-proc-bridge")
    log = tmp_path / "bridge.log"
    n = 24
    topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
    gw = Listener(broker.port)
    proc = _bridge_process(settings, log)
    try:
        assert wait_until(lambda: connected(migrated_db), timeout_s=30), log.read_text()  # subscribed
        payloads = [record_payload(tone_record(rng, n=4096), T0 + dt.timedelta(minutes=i), f"p{i}")
                    for i in range(n)]
        mids = [gw.send(topic, p) for p in payloads[:8]]
        assert wait_until(lambda: count(migrated_db, Record) >= 4, timeout_s=30), log.read_text()
        proc.kill()  # SIGKILL: no clean shutdown, whatever was in hand is not acknowledged
        proc.wait(10)
        at_kill = count(migrated_db, Record)
        mids += [gw.send(topic, p) for p in payloads[8:]]  # queued by the broker for the session
        proc = _bridge_process(settings, log)
        assert wait_until(lambda: log.read_text().count("connected to") == 2, timeout_s=30), log.read_text()
        assert wait_until(lambda: set(mids) <= gw.acked, timeout_s=30)
        assert wait_until(lambda: count(migrated_db, Record) == n, timeout_s=30), log.read_text()[-3000:]
        assert not wait_until(lambda: count(migrated_db, Record) > n, timeout_s=1.0)
        proc.terminate()  # SIGTERM: a clean stop
        assert proc.wait(20) == 0, log.read_text()[-3000:]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        gw.close()
    assert at_kill < n, "the bridge was killed too late to test anything"
    with migrated_db.read() as s:
        refs = list(s.scalars(select(Record.client_ref).order_by(Record.measured_at)))
        stopped = s.scalar(select(func.count()).select_from(ServiceHeartbeat)
                           .where(ServiceHeartbeat.status == "stopped"))
    assert refs == [f"p{i}" for i in range(n)]
    assert count(migrated_db, Job) == n
    assert stopped == 1  # the killed one never said goodbye; the terminated one did


def test_gateway_script_runs_standalone_in_demo_mode_and_reports_rejects(
        migrated_db, plant, hw_settings, broker):  # noqa: F811
    import subprocess
    import sys

    run = Running(migrated_db, mqtt_settings(hw_settings, broker))
    script = str(ROOT / "examples" / "gateway_publish.py")
    base = [sys.executable, script, "--port", str(broker.port), "--timeout-s", "30"]
    try:
        ok = subprocess.run([*base, "--topic", f"halfwatch/{plant.site_id}/{plant.point_id}/records",
                             "--demo", "2", "--binary", "--measured-at", T0.isoformat()],
                            capture_output=True, text=True, timeout=90, cwd="/")  # run from elsewhere
        bad = subprocess.run([*base, "--topic", f"halfwatch/{plant.site_id}/{plant.point_id}/records",
                              "--demo", "1", "--fs-hz", "5", "--measured-at", T0.isoformat()],
                             capture_output=True, text=True, timeout=90, cwd="/")
    finally:
        run.stop()
    assert ok.returncode == 0, ok.stderr
    assert ok.stdout.count("stored as record") == 2
    assert bad.returncode == 1 and "rejected (fs_hz)" in bad.stderr
    assert count(migrated_db, Record) == 2


def test_tach_pulses_in_a_gateway_message_are_stored_or_refused(migrated_db, plant, hw_settings, broker):  # noqa: F811
    # the same RecordJson fields as over HTTP (docs/tach.md): pulses stored with the record; a missed pulse
    # (an interval +100 % against the revolution before) refused on the reply topic, nothing stored
    from server.tach.tables import RecordTach

    x = tone_record(np.random.default_rng(3), n=8192)  # 3.2 s at 2560 Hz
    pulses = np.arange(1, 79) / 24.75  # 24.75 rev/s, one pulse per revolution (invented)
    listen = Listener(broker.port)
    run = Running(migrated_db, mqtt_settings(hw_settings, broker))
    try:
        topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
        for ref, times in (("t1", pulses), ("t2", np.delete(pulses, 30))):
            listen.publish(topic, gateway.payload(x, {"fs_hz": 2560, "units": "m/s2", "measured_at":
                                                      T0.isoformat(), "client_ref": ref,
                                                      "tach_pulses_s": times.tolist()}, binary=False))
        assert wait_until(lambda: len(listen.replies) == 2)
    finally:
        run.stop()
        listen.close()
    good, bad = listen.replies
    assert good["ok"] and good["created"], good
    assert bad["ok"] is False and bad["error"]["field"] == "tach_pulses_s"
    assert "irregular" in bad["error"]["message"]
    with migrated_db.read() as s:
        row = s.get(RecordTach, good["record_id"])
        rec = s.get(Record, good["record_id"])
    assert np.array_equal(np.frombuffer(row.pulses, "<f8"), pulses)
    assert rec.speed_source == "tach" and rec.speed_hz == pytest.approx(24.75, rel=1e-9)
    assert count(migrated_db, Record) == 1
