"""The dashboard's JSON helpers without a browser: bucketed chart series, plotly.js served from the package,
the overview's levels, and nothing loaded from another host."""

from __future__ import annotations

import datetime as dt
import json
import re
from pathlib import Path

import numpy as np
import pytest

WEB = Path(__file__).resolve().parents[2] / "web"


def _precursor_rates(n: int) -> np.ndarray:
    """γ− of the 0.5X precursor per row: every third row of the first half has one, the rest NaN (none)."""
    i = np.arange(n)
    return np.where((i < n // 2) & (i % 3 == 0), np.linspace(2.0, 0.2, n), np.nan)


def _precursor_ref(values: np.ndarray, k: np.ndarray) -> tuple[list, list]:
    """numpy reference of the bucket (max, mean) of a series with gaps: None where a bucket has no value."""
    out_max, out_mean = [], []
    for b in np.unique(k):
        v = values[k == b]
        v = v[~np.isnan(v)]
        out_max.append(float(v.max()) if v.size else None)
        out_mean.append(float(v.mean()) if v.size else None)
    return out_max, out_mean


def _insert_results(db, point_id: int, n: int, t0: dt.datetime) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    from server.storage.tables import Record, Result

    rng = np.random.default_rng(3)
    amp = rng.uniform(0.1, 2.0, n)
    one_x = rng.uniform(1.0, 5.0, n)
    gamma = _precursor_rates(n)
    ts = np.array([(t0 + dt.timedelta(hours=i)).timestamp() for i in range(n)])
    with db.unit_of_work() as s:
        for i in range(n):
            t = dt.datetime.fromtimestamp(ts[i], dt.UTC)
            rec = Record(point_id=point_id, measured_at=t, fs_hz=2560.0, n_samples=4096, units="m/s2",
                         origin="api", uploader="test", checksum="0" * 64)
            s.add(rec)
            s.flush()
            s.add(Result(record_id=rec.id, point_id=point_id, measured_ts=ts[i], analysis_version="t",
                         current=True, spectrum=b"", forcing_hz=24.75, sub_detected=True,
                         sub_accel_peak=float(amp[i]), sub_velocity_rms_mm_s=float(amp[i]) * 2,
                         one_x_accel_peak=float(one_x[i]), one_x_velocity_rms_mm_s=float(one_x[i]) * 3,
                         precursor_rate_per_s=None if np.isnan(gamma[i]) else float(gamma[i]),
                         data=json.dumps({"version": "2.0", "orders": {"1X": {"accel_peak":
                         float(one_x[i])}}})))
    return ts, amp, one_x


def test_series_buckets_match_numpy_on_the_same_rows(client, users, plant, migrated_db):
    t0 = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)
    n, max_points = 1000, 50
    ts, amp, one_x = _insert_results(migrated_db, plant.point_id, n, t0)
    c = users.login("viewer")
    start, end = t0, t0 + dt.timedelta(hours=n)
    r = c.get(f"/api/v1/dashboard/points/{plant.point_id}/series",
              params={"start": start.isoformat(), "end": end.isoformat(), "max_points": max_points})
    assert r.status_code == 200, r.text
    d = r.json()
    assert d["bucketed"] and d["n_source"] == n and len(d["t"]) <= max_points
    # reference: the same bucketing done with numpy (numpy is the outside reference here)
    width = (end.timestamp() - start.timestamp()) * (1 + 1e-9) / max_points
    k = ((ts - start.timestamp()) / width).astype(int)
    ratio = amp / one_x
    for name, values in (("half_order_velocity_rms_mm_s", amp * 2), ("half_order_to_1x_ratio", ratio),
                         ("one_x_velocity_rms_mm_s", one_x * 3)):
        ref_max = [values[k == b].max() for b in np.unique(k)]
        ref_mean = [values[k == b].mean() for b in np.unique(k)]
        assert d[name]["max"] == pytest.approx(ref_max), name
        assert d[name]["mean"] == pytest.approx(ref_mean), name
    assert sum(d["count"]) == n
    # the precursor's decay rate: buckets without any precursor are absent (null), not zero
    ref_max, ref_mean = _precursor_ref(_precursor_rates(n), k)
    assert d["precursor_rate_per_s"]["max"] == pytest.approx(ref_max)
    assert d["precursor_rate_per_s"]["mean"] == pytest.approx(ref_mean)
    assert None in ref_mean and ref_mean[0] is not None
    # the extremes survive the downsampling
    assert max(d["half_order_velocity_rms_mm_s"]["max"]) == pytest.approx(2 * amp.max())
    assert min(d["half_order_velocity_rms_mm_s"]["min"]) == pytest.approx(2 * amp.min())


def test_series_refuses_a_reversed_period_with_a_named_field(client, users, plant):
    c = users.login("viewer")
    r = c.get(f"/api/v1/dashboard/points/{plant.point_id}/series",
              params={"start": "2026-02-01T00:00:00Z", "end": "2026-01-01T00:00:00Z"})
    assert r.status_code == 400
    assert r.json()["error"]["field"] == "end"


def test_plotly_is_served_from_the_installed_package(client, users):
    import plotly

    c = users.login("viewer")
    r = c.get("/static/plotly.min.js")
    assert r.status_code == 200
    assert r.content == (Path(plotly.__file__).parent / "package_data" / "plotly.min.js").read_bytes()
    assert not (WEB / "static" / "plotly.min.js").exists()  # no copy in the repository


def test_web_files_load_nothing_from_another_host():
    pattern = re.compile(r"""(src|href)\s*=\s*["']?(https?:)?//""", re.I)
    for path in WEB.rglob("*"):
        if path.suffix in (".html", ".js", ".css"):
            text = path.read_text()
            assert not pattern.search(text), path
            assert "fetch(\"http" not in text and "fetch('http" not in text, path


def test_pages_redirect_to_login_and_static_paths_stay_json(client):
    r = client.get("/", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/login?next=/"
    r = client.get("/static/nothing-here.js")
    assert r.status_code == 404 and r.json()["ok"] is False
    assert client.get("/static/../server/settings.py").status_code == 404


def test_overview_for_an_api_key_is_limited_to_its_site(client, plant, plant_key_headers):
    r = client.get("/api/v1/dashboard/overview", headers=plant_key_headers)
    assert r.status_code == 200
    assert [s["id"] for s in r.json()["sites"]] == [plant.site_id]
    r = client.get(f"/api/v1/dashboard/points/{plant.other_point_id}/series", headers=plant_key_headers)
    assert r.status_code == 403


@pytest.mark.postgres
def test_series_and_window_on_postgres(pg_settings):
    """The same bucketing and typed-column reads on PostgreSQL."""
    from fastapi.testclient import TestClient
    from support.fixtures import PASSWORD
    from support.plant import make_plant

    from server.app import create_app
    from server.migrations import upgrade
    from server.services.users import add_user

    upgrade(pg_settings.database_url)
    app = create_app(pg_settings)
    plant = make_plant(app.state.db)
    add_user(app.state.db, pg_settings, username="viewer1", password=PASSWORD, role="viewer",
             hashing=app.state.passwords)
    t0 = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)
    ts, amp, one_x = _insert_results(app.state.db, plant.point_id, 300, t0)
    with TestClient(app) as c:
        login = c.post("/api/v1/session", json={"username": "viewer1", "password": PASSWORD})
        assert login.status_code == 200
        end = t0 + dt.timedelta(hours=300)
        d = c.get(f"/api/v1/dashboard/points/{plant.point_id}/series",
                  params={"start": t0.isoformat(), "end": end.isoformat(), "max_points": 30}).json()
        width = (end.timestamp() - t0.timestamp()) * (1 + 1e-9) / 30
        k = ((ts - t0.timestamp()) / width).astype(int)
        ref = [(one_x * 3)[k == b].max() for b in np.unique(k)]
        assert d["one_x_velocity_rms_mm_s"]["max"] == pytest.approx(ref)  # numpy as the reference
        ref_max, ref_mean = _precursor_ref(_precursor_rates(300), k)  # no precursor -> SQL NULL
        assert d["precursor_rate_per_s"]["mean"] == pytest.approx(ref_mean) and None in ref_mean
        w = c.get(f"/api/v1/dashboard/points/{plant.point_id}/window",
                  params={"start": t0.isoformat(), "end": end.isoformat()}).json()
        assert sorted(r["one_x_accel_peak"] for r in w["readings"]) == pytest.approx(sorted(one_x))
        over = c.get("/api/v1/dashboard/overview")  # results without a zone must not break it
        assert over.status_code == 200, over.text
        pump = next(a for s in over.json()["sites"] for ar in s["areas"] for a in ar["assets"]
                    if a["id"] == plant.asset_ids["pump"])
        assert pump["zone"] is None and pump["last_measured_at"].startswith("2026-01-13")


def test_trend_metric_names_say_their_measure_and_old_names_still_answer(client, users, plant, migrated_db):
    t0 = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)
    ts, amp, one_x = _insert_results(migrated_db, plant.point_id, 50, t0)
    c = users.login("viewer")
    q = {"start": t0.isoformat(), "end": (t0 + dt.timedelta(hours=60)).isoformat()}
    new = c.get(f"/api/v1/points/{plant.point_id}/trend", params={**q, "metric":
    "subharmonic.accel_peak"}).json()
    old = c.get(f"/api/v1/points/{plant.point_id}/trend", params={**q, "metric":
    "subharmonic.amplitude"}).json()
    assert new["value"] == pytest.approx(list(amp)) and old["value"] == new["value"]
    assert old["metric"] == "subharmonic.accel_peak"  # the answer names the measure
    default = c.get(f"/api/v1/points/{plant.point_id}/trend", params=q).json()
    assert default["metric"] == "subharmonic.velocity_rms_mm_s"
    assert default["value"] == pytest.approx(list(amp * 2))

