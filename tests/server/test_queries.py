"""Dashboard queries: trend bucketing keeps extremes, waveform decimation, tree and waterfall."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pytest
from sqlalchemy import insert
from support.signals import tone_record

from server import worker
from server.services.ingest import ingest_record
from server.storage.tables import Record, Result

START = dt.datetime(2025, 1, 1, tzinfo=dt.UTC)
HOURS = 24 * 365


@pytest.fixture
def year_of_hourly(migrated_db, plant, rng):
    """One result per hour for a year on the plant's first point (rows inserted directly, in bulk)."""
    values = np.abs(rng.normal(1.0, 0.3, HOURS))
    values[1234] = 9.5  # a spike that a plain subsample would lose
    values[4321] = 0.001
    ts = START.timestamp() + 3600.0 * np.arange(HOURS)
    with migrated_db.unit_of_work() as s:
        s.execute(insert(Record), [
            {"id": i + 1, "point_id": plant.point_id, "measured_at": START + dt.timedelta(hours=i),
             "received_at": START, "fs_hz": 2560.0, "n_samples": 16384, "units": "g", "origin": "api",
             "uploader": "t", "checksum": "0" * 64} for i in range(HOURS)])
        s.execute(insert(Result), [
            {"record_id": i + 1, "point_id": plant.point_id, "measured_ts": float(ts[i]),
             "analysis_version": "t", "current": True, "spectrum": b"",
             "data": json.dumps({"version": "2.0", "orders": {"2X": {"accel_peak": float(values[i])}}}),
             "overall_velocity_rms_mm_s": float(values[i]), "sub_detected": False, "quality_ok": True}
            for i in range(HOURS)])
    return ts, values


def reference_buckets(ts, values, a, b, n):
    """numpy reference: the same equal-width time buckets, min/max with np.minimum/maximum.reduceat."""
    k = np.minimum(((ts - a) / ((b - a) * (1 + 1e-9) / n)).astype(int), n - 1)
    starts = np.flatnonzero(np.r_[True, k[1:] != k[:-1]])
    return np.minimum.reduceat(values, starts), np.maximum.reduceat(values, starts)


@pytest.mark.parametrize("metric", ["overall.velocity_rms_mm_s", "orders.2X.accel_peak"])
def test_trend_of_a_year_keeps_every_bucket_extreme(client, plant, plant_key_headers, year_of_hourly, metric):
    ts, values = year_of_hourly
    a, b = START, START + dt.timedelta(days=365)
    r = client.get(f"/api/v1/points/{plant.point_id}/trend", headers=plant_key_headers,
                   params={"metric": metric, "start": a.isoformat(), "end": b.isoformat(), "max_points": 500})
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["bucketed"] and body["n_source"] == HOURS and len(body["min"]) <= 500
    ref_min, ref_max = reference_buckets(ts, values, a.timestamp(), b.timestamp(), 500)
    np.testing.assert_allclose(body["min"], ref_min, rtol=1e-12)
    np.testing.assert_allclose(body["max"], ref_max, rtol=1e-12)
    assert max(body["max"]) == pytest.approx(9.5) and min(body["min"]) == pytest.approx(0.001)
    assert sum(body["count"]) == HOURS


def test_short_trend_is_returned_raw(client, plant, plant_key_headers, year_of_hourly):
    ts, values = year_of_hourly
    a, b = START, START + dt.timedelta(hours=9.5)
    r = client.get(f"/api/v1/points/{plant.point_id}/trend", headers=plant_key_headers,
                   params={"metric": "overall.velocity_rms_mm_s", "start": a.isoformat(),
                           "end": b.isoformat()})
    body = r.json()
    assert body["bucketed"] is False and len(body["value"]) == 10
    np.testing.assert_allclose(body["value"], values[:10])
    assert body["t"][0] == "2025-01-01T00:00:00Z"


def test_trend_bad_arguments(client, plant, plant_key_headers):
    url = f"/api/v1/points/{plant.point_id}/trend"
    r = client.get(url, headers=plant_key_headers, params={"start": "2025-02-01T00:00:00Z",
                                                          "end": "2025-01-01T00:00:00Z"})
    assert r.status_code == 400 and r.json()["error"]["field"] == "end"
    r = client.get(url, headers=plant_key_headers, params={"metric": "x;drop table"})
    assert r.status_code == 400 and r.json()["error"]["field"] == "metric"
    r = client.get(url, headers=plant_key_headers, params={"max_points": 1})
    assert r.status_code == 422 and r.json()["error"]["field"] == "max_points"


def test_waveform_decimation_keeps_extremes_and_result_endpoints(app, client, plant, plant_key_headers, rng):
    x = tone_record(rng, n=16384, amp_half=0.3)
    x[5000] = 25.0  # an impact
    out = ingest_record(app.state.db, point_id=plant.point_id, samples=x, fs_hz=2560.0, units="m/s2",
                        measured_at=START, origin="api", uploader="t")
    pending = client.get(f"/api/v1/records/{out.record_id}", headers=plant_key_headers).json()
    assert pending["result"] is None and pending["job"]["state"] == "queued"
    early = client.get(f"/api/v1/records/{out.record_id}/spectrum", headers=plant_key_headers)
    assert early.status_code == 404
    worker.run_once(app.state.db, app.state.settings, "t")

    w = client.get(f"/api/v1/records/{out.record_id}/waveform", headers=plant_key_headers,
                   params={"max_points": 1000}).json()
    assert w["decimated"] and len(w["value"]) <= 1000
    assert max(w["value"]) == pytest.approx(25.0) and min(w["value"]) == pytest.approx(float(x.min()))
    assert w["t_s"][w["value"].index(max(w["value"]))] == pytest.approx(5000 / 2560)

    detail = client.get(f"/api/v1/records/{out.record_id}", headers=plant_key_headers).json()
    assert detail["job"]["state"] == "done" and detail["result"]["subharmonic"]["detected"] is True
    spec = client.get(f"/api/v1/records/{out.record_id}/spectrum", headers=plant_key_headers).json()
    f, amp = np.array(spec["freqs_hz"]), np.array(spec["amplitude"])
    assert len(f) <= 2048 and spec["units"] == "m/s2"
    assert spec["amplitude_measure"] == "acceleration peak of a sine, record units"  # the answer names it
    # the 0.5X line of our own 0.3 m/s2 tone at 12.375 Hz is the largest line below 20 Hz
    low = f < 20
    assert f[low][np.argmax(amp[low])] == pytest.approx(12.375, abs=0.2)

    tree = client.get("/api/v1/tree", headers=plant_key_headers).json()
    pts = {p["id"]: p for ar in tree["sites"][0]["areas"] for a in ar["assets"] for p in a["points"]}
    assert pts[plant.point_id]["state"] == "subharmonic"
    assert pts[plant.point_id]["latest"]["record_id"] == out.record_id
    assert pts[plant.point_ids["P1-NDE-V"]]["state"] == "no-data"

    wf = client.get(f"/api/v1/points/{plant.point_id}/waterfall", headers=plant_key_headers,
                    params={"n": 5}).json()
    assert [s["record_id"] for s in wf["spectra"]] == [out.record_id]
