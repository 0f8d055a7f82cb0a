"""Ingestion API on a real SQLite file: raw, JSON, idempotency, limits and the error shape."""

from __future__ import annotations

import base64
import hashlib

import numpy as np
import pytest
from sqlalchemy import func, select
from support.signals import tone_record

from server.storage import blobs
from server.storage.tables import Job, Record, Waveform

T0 = "2026-03-02T08:00:00Z"


def post_raw(client, point_id, x, headers, **params):
    q = {"fs_hz": 2560, "units": "m/s2", "measured_at": T0, **params}
    return client.post(f"/api/v1/points/{point_id}/records", params=q, content=np.asarray(x, "<f4").tobytes(),
                       headers={**headers, "Content-Type": "application/octet-stream"})


def assert_error_shape(r, status, field=None):
    body = r.json()
    assert r.status_code == status, r.text
    assert body["ok"] is False and body["status"] == status
    assert set(body["error"]) == {"code", "message", "field"}
    assert body["error"]["message"]
    if field is not None:
        assert body["error"]["field"] == field, body
    return body["error"]


def test_raw_record_is_stored_exactly_with_its_job(client, plant, plant_key_headers, rng, migrated_db):
    x = tone_record(rng)
    r = post_raw(client, plant.point_id, x, plant_key_headers, speed_hz=24.8, client_ref="gw-1")
    assert r.status_code == 201, r.text
    rid = r.json()["record_id"]
    with migrated_db.read() as s:
        rec = s.get(Record, rid)
        wf = s.get(Waveform, rid)
        jobs = s.scalars(select(Job).where(Job.record_id == rid)).all()
    stored = blobs.decode_waveform(wf.codec, wf.data)
    # bit-exact round trip of the float32 samples; checksum is hashlib's sha256 of the same bytes
    assert np.array_equal(stored.view(np.uint32), x.view(np.uint32))
    assert rec.checksum == hashlib.sha256(x.astype("<f4").tobytes()).hexdigest()
    assert rec.n_samples == x.size and rec.units == "m/s2" and rec.speed_hz == pytest.approx(24.8)
    assert rec.measured_at.isoformat() == "2026-03-02T08:00:00+00:00"
    assert rec.uploader.startswith("apikey:") and rec.origin == "api"
    assert [j.state for j in jobs] == ["queued"]
    # the worker compacts the stored samples in the transaction that stores the result, bit-exactly
    from server import worker

    assert worker.run_once(migrated_db, client.app.state.settings, "t")
    with migrated_db.read() as s:
        wf = s.get(Waveform, rid)
    assert wf.codec == blobs.CODEC and len(wf.data) < x.nbytes
    assert np.array_equal(blobs.decode_waveform(wf.codec, wf.data).view(np.uint32), x.view(np.uint32))


def test_waveform_codecs_round_trip_bit_exactly(rng):
    specials = np.array([0.0, -0.0, 1e-45, -1e-45, 3.4e38, -3.4e38, 1.0, np.pi], dtype="<f4")
    x = np.concatenate([specials, rng.standard_normal(5000).astype("<f4")])
    for codec, data in (blobs.encode_waveform(x), blobs.encode_raw(x)):
        assert np.array_equal(blobs.decode_waveform(codec, data).view(np.uint32), x.view(np.uint32))
    with pytest.raises(ValueError):
        blobs.decode_waveform("nope", b"")


def test_retry_with_same_client_ref_returns_first_record(client, plant, plant_key_headers, rng, migrated_db):
    x = tone_record(rng)
    first = post_raw(client, plant.point_id, x, plant_key_headers, client_ref="batch-7/001")
    again = post_raw(client, plant.point_id, x, plant_key_headers, client_ref="batch-7/001")
    assert first.status_code == 201 and again.status_code == 200
    assert again.json()["record_id"] == first.json()["record_id"]
    assert again.json()["created"] is False
    with migrated_db.read() as s:
        assert s.scalar(select(func.count()).select_from(Record)) == 1
        assert s.scalar(select(func.count()).select_from(Job)) == 1
    other = post_raw(client, plant.point_id, x * 2, plant_key_headers, client_ref="batch-7/001")
    assert_error_shape(other, 409, "client_ref")


def test_json_base64_and_list_forms(client, plant, plant_key_headers, rng):
    x = tone_record(rng, n=4096)
    doc = {"fs_hz": 2560, "units": "g", "measured_at": "2026-03-02T09:00:00+01:00",
           "samples_b64": base64.b64encode(x.astype("<f4").tobytes()).decode()}
    r = client.post(f"/api/v1/points/{plant.point_id}/records", json=doc, headers=plant_key_headers)
    assert r.status_code == 201, r.text
    doc2 = {"fs_hz": 2560, "units": "m/s2", "measured_at": T0, "samples": [float(v) for v in x[:1024]]}
    r2 = client.post(f"/api/v1/points/{plant.point_id}/records", json=doc2, headers=plant_key_headers)
    assert r2.status_code == 201, r2.text
    rec = client.get(f"/api/v1/records/{r.json()['record_id']}", headers=plant_key_headers).json()
    assert rec["record"]["measured_at"] == "2026-03-02T08:00:00Z"  # +01:00 normalised to UTC


@pytest.mark.parametrize("params, field, status", [
    ({"fs_hz": 5}, "fs_hz", 400),
    ({"fs_hz": 10_000_000}, "fs_hz", 400),
    ({"units": "furlongs"}, "units", 422),
    ({"units": "mm/s"}, "units", 422),
    ({"measured_at": "2099-01-01T00:00:00Z"}, "measured_at", 400),
    ({"measured_at": "2026-03-02T08:00:00"}, "measured_at", 422),
    ({"measured_at": "yesterday"}, "measured_at", 422),
    ({"speed_hz": -3}, "speed_hz", 400),
])
def test_bad_metadata_is_a_clear_4xx(client, plant, plant_key_headers, rng, params, field, status,
                                     migrated_db):
    r = post_raw(client, plant.point_id, tone_record(rng, n=2048), plant_key_headers, **params)
    err = assert_error_shape(r, status, field)
    assert field.split("_")[0] in err["message"].lower() or field in err["message"]
    with migrated_db.read() as s:
        assert s.scalar(select(func.count()).select_from(Record)) == 0


def test_bad_samples(client, plant, plant_key_headers, rng):
    x = tone_record(rng, n=2048)
    x[100] = np.nan
    assert "non-finite" in assert_error_shape(post_raw(client, plant.point_id, x, plant_key_headers), 422,
                                              "samples")["message"]
    assert_error_shape(post_raw(client, plant.point_id, x[:100], plant_key_headers), 422, "samples")
    r = client.post(f"/api/v1/points/{plant.point_id}/records", content=b"\x00" * 4097,
                    params={"fs_hz": 2560, "units": "g", "measured_at": T0},
                    headers={**plant_key_headers, "Content-Type": "application/octet-stream"})
    assert_error_shape(r, 400, "body")


def test_unknown_point_and_other_site(client, plant, plant_key_headers, rng):
    x = tone_record(rng, n=2048)
    assert_error_shape(post_raw(client, 99999, x, plant_key_headers), 404, "point_id")
    # the key is limited to the plant's site; the fan point is on the other site
    assert_error_shape(post_raw(client, plant.other_point_id, x, plant_key_headers), 403, "point_id")


def test_limits_from_settings(tmp_path, rng):
    from fastapi.testclient import TestClient
    from support.fixtures import settings_for
    from support.plant import make_plant

    from server.app import create_app
    from server.migrations import upgrade
    from server.services.users import create_api_key

    settings = settings_for(tmp_path, max_body_bytes=40_000, max_samples=8000)
    upgrade(settings.database_url)
    app = create_app(settings)
    plant = make_plant(app.state.db)
    key, _ = create_api_key(app.state.db, name="k")
    h = {"X-API-Key": key}
    with TestClient(app) as c:
        assert_error_shape(post_raw(c, plant.point_id, tone_record(rng, n=9000), h), 413, "samples")
        assert_error_shape(post_raw(c, plant.point_id, tone_record(rng, n=12000), h), 413, "body")
        assert post_raw(c, plant.point_id, tone_record(rng, n=8000), h).status_code == 201


def test_unsupported_content_type_and_missing_query(client, plant, plant_key_headers):
    r = client.post(f"/api/v1/points/{plant.point_id}/records", content=b"a,b", headers={
        **plant_key_headers, "Content-Type": "text/csv"})
    assert_error_shape(r, 415, "content-type")
    r = client.post(f"/api/v1/points/{plant.point_id}/records", content=b"\x00" * 4096,
                    headers={**plant_key_headers, "Content-Type": "application/octet-stream"})
    assert_error_shape(r, 422, "fs_hz")
    r = client.post(f"/api/v1/points/{plant.point_id}/records", content=b"{not json",
                    headers={**plant_key_headers, "Content-Type": "application/json"})
    assert_error_shape(r, 422)


def test_unknown_path_and_healthz(client):
    assert_error_shape(client.get("/api/v1/nothing-here"), 404)
    assert client.get("/healthz").json() == {"ok": True, "database": client.app.state.db.dialect}


def test_locked_database_is_a_503_with_retry_after_and_nothing_lost(tmp_path, migrated_template, rng):
    import sqlite3

    from fastapi.testclient import TestClient
    from support.fixtures import migrate, settings_for
    from support.plant import make_plant

    from server.app import create_app
    from server.services.users import create_api_key

    settings = settings_for(tmp_path, db_busy_timeout_ms=100)
    migrate(settings, migrated_template)
    app = create_app(settings)
    plant = make_plant(app.state.db)
    key, _ = create_api_key(app.state.db, name="k")
    x = tone_record(rng, n=2048)
    blocker = sqlite3.connect(settings.data_dir / "halfwatch.db", isolation_level=None)
    with TestClient(app) as c:
        c.get("/api/v1/tree", headers={"X-API-Key": key})  # key's last-used time written before the lock
        blocker.execute("BEGIN IMMEDIATE")  # another writer holds the lock
        r = post_raw(c, plant.point_id, x, {"X-API-Key": key}, client_ref="r1")
        assert_error_shape(r, 503)
        assert r.headers["Retry-After"].isdigit()
        blocker.execute("ROLLBACK")
        retry = post_raw(c, plant.point_id, x, {"X-API-Key": key}, client_ref="r1")
        assert retry.status_code == 201  # the retry stores it once
    blocker.close()


@pytest.mark.parametrize("path", ["/api/v1/records/99999999999", "/api/v1/jobs/99999999999",
                                  "/api/v1/points/99999999999/trend", "/api/v1/records/-1/spectrum"])
def test_absurd_ids_are_a_4xx_never_a_500(client, plant_key_headers, path):
    r = client.get(path, headers=plant_key_headers)
    assert 400 <= r.status_code < 500, r.text
    assert r.json()["ok"] is False
