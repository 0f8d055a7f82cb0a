"""Retention keeps the evidence and deletes the rest past the horizon (SQLite and PostgreSQL).

The expected keep set is computed here from first principles (the times and indices the test wrote),
not by the retention module: alarm neighbourhoods, pins, daily firsts, the newest route walk, pending
analyses and readings without a result. Readings are written straight into the tables
(server.retention.generate), so the test needs no analysis.
"""

from __future__ import annotations

import datetime as dt
import os
import random
import signal
import subprocess
import sys
import time

import pytest
from sqlalchemy import func, select, update

from server.alarms.tables import AlarmEvent
from server.audit.tables import ConfigChange
from server.retention import pins
from server.retention.apply import run
from server.retention.generate import add_readings, tiny_template
from server.retention.tables import RecordPin, WaveformRemoval
from server.services.jobs import requeue_report
from server.storage import Database, SchemaNotReady
from server.storage.tables import Job, Record, Result, Waveform

T0 = dt.datetime(2026, 3, 1, 0, 30, tzinfo=dt.UTC)
NOW = T0 + dt.timedelta(days=10, hours=1)
DAYS, N = 3.0, 2  # horizon and neighbours of this test
HORIZON = NOW - dt.timedelta(days=DAYS)
TRANSITIONS = (50, 120, 121)


@pytest.fixture
def settings(hw_settings):
    return hw_settings.model_copy(update={"retention_waveform_days": DAYS, "retention_alarm_neighbours": N,
                                          "retention_batch": 7})


def _hourly(start, hours):
    return [start + dt.timedelta(hours=h) for h in range(hours)]


@pytest.fixture
def scene(migrated_db, plant, settings):
    """Point A: hourly online readings with alarm transitions and a pin. Point B: hourly readings plus
    three route walks. A reading with a queued re-analysis and one whose analysis failed (no result)."""
    db, tpl = migrated_db, tiny_template()
    a, b = plant.point_ids["P1-DE-H"], plant.point_ids["P1-NDE-V"]
    times_a = _hourly(T0, 240)
    ids_a = add_readings(db, a, times_a, tpl, transitions=TRANSITIONS)
    times_b = _hourly(T0, 240)
    ids_b = add_readings(db, b, times_b, tpl)
    walks = {d: _hourly(T0 + dt.timedelta(days=d, hours=9, minutes=10), 3) for d in (0, 2, 4)}
    walk_ids = {d: add_readings(db, b, t, tpl, origin="route") for d, t in walks.items()}
    pinned = ids_a[70]
    pins.pin(db, pinned, actor="engineer1", note="bearing noise, keep for the vendor")
    pending, failed = ids_a[80], ids_a[90]
    with db.unit_of_work() as s:
        s.add(Job(record_id=pending, state="queued", reason="reanalyze"))
        s.execute(update(Result).where(Result.record_id == failed).values(current=False))
    rows = [(i, t, "api", a) for i, t in zip(ids_a, times_a, strict=True)]
    rows += [(i, t, "api", b) for i, t in zip(ids_b, times_b, strict=True)]
    rows += [(i, t, "route", b) for d in walks for i, t in zip(walk_ids[d], walks[d], strict=True)]
    return dict(a=a, b=b, ids_a=ids_a, ids_b=ids_b, walk_ids=walk_ids, pinned=pinned, pending=pending,
                failed=failed, rows=rows, blob=len(tpl.waveform))


def expected_kept(scene) -> set[int]:
    kept = {i for i, t, _o, _p in scene["rows"] if t >= HORIZON}
    ids_a = scene["ids_a"]
    for k in TRANSITIONS:  # the reading itself and N either side, in point A's own order
        kept.update(ids_a[max(0, k - N):k + N + 1])
    kept |= {scene["pinned"], scene["pending"], scene["failed"]}
    firsts: dict = {}
    for i, t, _o, p in sorted(scene["rows"], key=lambda r: (r[1], r[0])):
        firsts.setdefault((p, t.date()), i)  # site zone UTC (the default)
    kept.update(firsts.values())
    kept.update(scene["walk_ids"][4])  # the newest walk of point B; walks of days 0 and 2 are superseded
    return kept


def _waveform_ids(db) -> set[int]:
    with db.read() as s:
        return set(s.scalars(select(Waveform.record_id)))


def _consistent(db) -> tuple[set[int], set[int]]:
    """Every reading has exactly one of (waveform, removal marker); every marker is in the audit batch
    it names, and each batch's audited bytes equal its markers' bytes. Returns (kept, removed)."""
    with db.read() as s:
        records = set(s.scalars(select(Record.id)))
        wf = set(s.scalars(select(Waveform.record_id)))
        marks = {m.record_id: m for m in s.scalars(select(WaveformRemoval))}
        audits = {c.id: c for c in s.scalars(select(ConfigChange).where(ConfigChange.target == "waveform"))}
        results = s.scalar(select(func.count()).select_from(Result))
    assert wf.isdisjoint(marks) and wf | set(marks) == records
    by_batch: dict[int, list] = {}
    for m in marks.values():
        by_batch.setdefault(m.audit_id, []).append(m)
    assert set(by_batch) == set(audits)
    for aid, ms in by_batch.items():
        assert sorted(audits[aid].details["record_ids"]) == sorted(m.record_id for m in ms)
        assert audits[aid].details["bytes"] == sum(m.removed_bytes for m in ms)
        assert audits[aid].action == "delete"
    assert results == len(records)  # results are never deleted
    return wf, set(marks)


def test_keeps_every_protected_reading_and_deletes_the_rest(migrated_db, settings, scene):
    db = migrated_db
    want_kept = expected_kept(scene)
    everything = {r[0] for r in scene["rows"]}
    dry = run(db, settings, now=NOW, dry_run=True)
    assert {rid for rid, _ in dry.plan.delete} == everything - want_kept
    assert dry.plan.delete_bytes == scene["blob"] * len(everything - want_kept)
    assert _waveform_ids(db) == everything  # a dry run deletes nothing
    assert dry.plan.not_candidates == {"analysis pending": 1, "no result": 1}
    assert dry.plan.kept["pinned"] == 1

    out = run(db, settings, now=NOW)
    assert out.deleted == len(everything - want_kept) and out.freed_bytes == dry.plan.delete_bytes
    assert out.batches == -(-out.deleted // settings.retention_batch)
    kept, removed = _consistent(db)
    assert kept == want_kept and removed == everything - want_kept

    again = run(db, settings, now=NOW)  # idempotent
    assert again.deleted == 0 and again.plan.delete == [] and _waveform_ids(db) == want_kept


def test_a_reading_without_its_waveform_still_opens(migrated_db, settings, scene, app, users):
    run(migrated_db, settings, now=NOW)
    gone = scene["ids_a"][10]
    kept = scene["ids_a"][-1]
    viewer = users.login("viewer")
    assert viewer.get(f"/api/v1/records/{gone}").status_code == 200
    assert viewer.get(f"/api/v1/records/{gone}/spectrum").json()["amplitude"]
    r = viewer.get(f"/api/v1/records/{gone}/waveform")
    assert r.status_code == 410
    err = r.json()["error"]
    assert err["field"] == "record_id" and "removed by retention" in err["message"]
    state = viewer.get(f"/api/v1/records/{gone}/retention").json()
    assert state["waveform"]["kept"] is False and state["waveform"]["removed_bytes"] == scene["blob"]
    assert viewer.get(f"/api/v1/records/{kept}/waveform").status_code == 200
    near = viewer.get(f"/api/v1/records/{scene['ids_a'][TRANSITIONS[0] - 1]}/retention").json()
    assert near["waveform"]["kept"] is True and "alarm" in near["kept_by"]


def test_pinning_is_for_engineers_audited_and_keeps_the_waveform(migrated_db, settings, scene, app, users):
    target = scene["ids_a"][11]  # would be deleted
    assert users.login("viewer").put(f"/api/v1/records/{target}/pin", json={"note": "x"}).status_code == 403
    eng = users.login("engineer")
    assert eng.put(f"/api/v1/records/{target}/pin", json={"note": "bad\nnote"}).status_code == 422
    r = eng.put(f"/api/v1/records/{target}/pin", json={"note": "oil whirl episode"})
    assert r.status_code == 200, r.text
    assert eng.put(f"/api/v1/records/{target}/pin", json={}).status_code == 409
    run(migrated_db, settings, now=NOW)
    assert target in _waveform_ids(migrated_db)
    assert eng.get(f"/api/v1/records/{target}/retention").json()["kept_by"] == ["pinned"]
    assert eng.delete(f"/api/v1/records/{target}/pin").status_code == 200
    run(migrated_db, settings, now=NOW)
    assert target not in _waveform_ids(migrated_db)
    assert eng.put(f"/api/v1/records/{target}/pin", json={}).status_code == 409  # nothing left to keep
    with migrated_db.read() as s:
        acts = [(c.action, c.actor) for c in s.scalars(select(ConfigChange).where(
            ConfigChange.target == "record", ConfigChange.target_id == target).order_by(ConfigChange.id))]
        assert s.get(RecordPin, target) is None
    assert acts == [("pin", "engineer1"), ("unpin", "engineer1")]


def test_reanalysis_skips_readings_without_a_waveform(migrated_db, settings, scene):
    run(migrated_db, settings, now=NOW)
    kept = _waveform_ids(migrated_db)
    with migrated_db.read() as s:
        pending = set(s.scalars(select(Job.record_id).where(Job.state.in_(("queued", "running")))))
        total = s.scalar(select(func.count()).select_from(Record))
    queued, skipped = requeue_report(migrated_db, T0 - dt.timedelta(days=1))
    assert queued == len(kept - pending) and skipped == total - len(kept)


def test_a_new_transition_protects_its_neighbours_in_the_next_run(migrated_db, settings, scene):
    """Alarm events are read at run time: an event added later keeps readings the first run left."""
    ids_a = scene["ids_a"]
    with migrated_db.unit_of_work() as s:
        s.add(AlarmEvent(kind="transition", point_id=scene["a"], asset_id=0, record_id=ids_a[30],
                         summary="late", details={}))
    run(migrated_db, settings, now=NOW)
    assert set(ids_a[30 - N:30 + N + 1]) <= _waveform_ids(migrated_db)


def test_refuses_a_database_at_an_older_schema(tmp_path, settings):
    from contextlib import nullcontext

    from support.fixtures import pg_schema

    from server.migrations import upgrade

    place = (nullcontext(f"sqlite:///{(tmp_path / 'old.db').as_posix()}") if settings.is_sqlite
             else pg_schema())
    with place as url:
        upgrade(url, "0005")
        db = Database(url)
        try:
            with pytest.raises(SchemaNotReady, match="db upgrade"):
                run(db, settings.model_copy(update={"database_url": url}), dry_run=True)
        finally:
            db.dispose()
        p = subprocess.run([sys.executable, "-m", "server", "retention", "--dry-run"], capture_output=True,
                           text=True, env={**os.environ, "HALFWATCH_DATABASE_URL": url}, timeout=60)
        assert p.returncode == 2 and "refusing to apply retention" in p.stderr and "0005" in p.stderr


def test_survives_sigkill_mid_batch(migrated_db, settings, plant, tmp_path):
    """A real ``halfwatch retention`` process is killed with SIGKILL while it deletes; after each kill
    every reading has its waveform or its marker (never neither, never both), and a final run finishes."""
    import numpy as np

    from server.retention.generate import Template
    from server.storage.blobs import encode_waveform

    rng = np.random.default_rng(3)
    codec, blob = encode_waveform(rng.standard_normal(16384).astype("<f4"))  # ~50 KB, so batches take time
    tpl = tiny_template()
    tpl = Template(codec, blob, tpl.data, tpl.spectrum)
    old = T0 - dt.timedelta(days=400)
    ids = add_readings(migrated_db, plant.point_id, [old + dt.timedelta(minutes=m) for m in range(600)], tpl)
    env = {**os.environ, "HALFWATCH_DATABASE_URL": settings.database_url, "HALFWATCH_RETENTION_BATCH": "20",
           "HALFWATCH_RETENTION_WAVEFORM_DAYS": "30", "HALFWATCH_RETENTION_ALARM_NEIGHBOURS": "0"}
    kills, rng_kill = 0, random.Random(5)
    for _ in range(4):
        proc = subprocess.Popen([sys.executable, "-m", "server", "retention"], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True, env=env)
        line = proc.stdout.readline()  # the first batch is committed: the process is deleting now
        if not line.startswith("batch"):
            proc.wait(30)
            break
        time.sleep(rng_kill.uniform(0.0, 0.05))
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            kills += 1
        proc.wait(30)
        _consistent(migrated_db)
    assert kills >= 1
    final = subprocess.run([sys.executable, "-m", "server", "retention"], capture_output=True, text=True,
                           env=env, timeout=120)
    assert final.returncode == 0, final.stderr
    kept, removed = _consistent(migrated_db)
    assert kept == {ids[0]} and removed == set(ids[1:])  # one day, one daily first


def test_the_worker_applies_retention_on_its_schedule(migrated_db, settings, scene):
    import threading

    from server.worker import run_forever

    s = settings.model_copy(update={"retention_interval_h": 0.3 / 3600, "worker_alarm_background": False})
    stop = threading.Event()
    t = threading.Thread(target=run_forever, args=(migrated_db, s), kwargs={"stop": stop}, daemon=True)
    t.start()
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline and len(_waveform_ids(migrated_db)) == len(scene["rows"]):
        time.sleep(0.2)
    stop.set()
    t.join(30)
    kept, removed = _consistent(migrated_db)
    assert removed and scene["pinned"] in kept
