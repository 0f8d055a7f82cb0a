"""Route uploads: ZIP + manifest.csv, a report per row, and the guards (traversal, bombs, sizes)."""

from __future__ import annotations

import io
import zipfile

import numpy as np
import pytest
from sqlalchemy import func, select
from support.fixtures import migrate, settings_for
from support.signals import tone_record

from server.storage.tables import Job, Record, Waveform


def csv_bytes(x: np.ndarray, fs: float = 2560.0) -> bytes:
    return ("time_s,accel_g\n" + "\n".join(f"{i / fs:.9f},{v:.8g}" for i, v in enumerate(x))).encode()


def make_zip(files: dict[str, bytes], manifest: str | None, *, method=zipfile.ZIP_DEFLATED) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", method) as zf:
        if manifest is not None:
            zf.writestr("manifest.csv", manifest)
        for name, data in files.items():
            zf.writestr(name, data)
    return buf.getvalue()


def post_zip(client, route_id, data, headers, multipart=False):
    if multipart:
        return client.post(f"/api/v1/routes/{route_id}/uploads", headers=headers,
                           files={"file": ("walk.zip", data, "application/zip")})
    return client.post(f"/api/v1/routes/{route_id}/uploads", content=data,
                       headers={**headers, "Content-Type": "application/zip"})


def count(db, table):
    with db.read() as s:
        return s.scalar(select(func.count()).select_from(table))


def test_each_row_is_accepted_or_rejected_on_its_own(client, plant, plant_key_headers, rng, migrated_db):
    good1, good2 = tone_record(rng, n=4096), tone_record(rng, n=4096)
    bad = tone_record(rng, n=4096)
    bad[7] = np.nan
    manifest = (
        "point,measured_at,file,units,speed_hz\n"
        "P1-DE-H,2026-03-02T08:00:00Z,readings/p1-de-h.csv,g,24.7\n"
        "P1-NDE-V,2026-03-02T08:03:00+00:00,readings/p1-nde-v.csv,g,\n"
        "C2-CYL-A,2026-03-02T08:09:00Z,readings/c2.csv,g,\n"          # NaN inside: rejected
        "P9-XX,2026-03-02T08:12:00Z,readings/p1-de-h.csv,g,\n"       # not on the route
        "P1-DE-H,2026-03-02T08:15:00,readings/p1-de-h.csv,g,\n"      # no time zone
        "P1-DE-H,2026-03-02T08:18:00Z,readings/missing.csv,g,\n"     # not in the ZIP
        "P1-DE-H,2026-03-02T08:21:00Z,../../etc/passwd,g,\n"         # traversal
    )
    data = make_zip({"readings/p1-de-h.csv": csv_bytes(good1), "readings/p1-nde-v.csv": csv_bytes(good2),
                     "readings/c2.csv": csv_bytes(bad)}, manifest)
    r = post_zip(client, plant.route_id, data, plant_key_headers, multipart=True)
    assert r.status_code == 201, r.text
    rep = r.json()
    assert (rep["accepted"], rep["duplicate"], rep["rejected"]) == (2, 0, 5)
    status = [(row["row"], row["status"], (row.get("error") or {}).get("field")) for row in rep["rows"]]
    assert status == [(2, "accepted", None), (3, "accepted", None), (4, "rejected", "samples"),
                      (5, "rejected", "point"), (6, "rejected", "measured_at"), (7, "rejected", "file"),
                      (8, "rejected", "file")]
    assert count(migrated_db, Record) == count(migrated_db, Waveform) == count(migrated_db, Job) == 2
    with migrated_db.read() as s:
        rec = s.get(Record, rep["rows"][0]["record_id"])
    assert rec.origin == "route" and rec.speed_hz == pytest.approx(24.7) and rec.units == "g"

    again = post_zip(client, plant.route_id, data, plant_key_headers)  # a re-upload stores nothing new
    assert again.status_code == 200
    assert (again.json()["accepted"], again.json()["duplicate"]) == (0, 2)
    assert count(migrated_db, Record) == 2


def test_routes_show_due_and_overdue_points(client, plant, plant_key_headers, rng):
    before = client.get("/api/v1/routes", headers=plant_key_headers).json()["routes"][0]
    assert before["counts"] == {"ok": 0, "due": 3, "overdue": 0}  # never read: due
    import datetime as dt

    now = dt.datetime.now(dt.UTC)
    recent = (now - dt.timedelta(hours=1)).isoformat()
    old = (now - dt.timedelta(hours=48)).isoformat()  # C2 has a 24 h interval: 48 h ago is overdue
    manifest = f"point,measured_at,file\nP1-DE-H,{recent},a.csv\nC2-CYL-A,{old},a.csv\n"
    x = tone_record(rng, n=4096)
    assert post_zip(client, plant.route_id, make_zip({"a.csv": csv_bytes(x)}, manifest),
                    plant_key_headers).json()["accepted"] == 2
    route = client.get("/api/v1/routes", headers=plant_key_headers).json()["routes"][0]
    by_point = {s["point"]: s["status"] for s in route["stops"]}
    assert by_point == {"P1-DE-H": "ok", "P1-NDE-V": "due", "C2-CYL-A": "overdue"}


def test_zip_bomb_is_refused_before_unpacking(client, plant, plant_key_headers, migrated_db):
    manifest = "point,measured_at,file\nP1-DE-H,2026-03-02T08:00:00Z,a.csv\n"
    bomb = make_zip({"a.csv": b"0" * (20 * 1024 * 1024)}, manifest)
    assert len(bomb) < 100_000
    r = post_zip(client, plant.route_id, bomb, plant_key_headers)
    assert r.status_code == 413 and "bomb" in r.json()["error"]["message"]
    assert count(migrated_db, Record) == 0


def test_total_unpacked_size_and_manifest_rows_are_limited(tmp_path, migrated_template, rng):
    from fastapi.testclient import TestClient
    from support.plant import make_plant

    from server.app import create_app
    from server.services.users import create_api_key

    settings = settings_for(tmp_path, max_upload_bytes=200_000, max_manifest_rows=3)
    migrate(settings, migrated_template)
    app = create_app(settings)
    plant = make_plant(app.state.db)
    key, _ = create_api_key(app.state.db, name="k")
    h = {"X-API-Key": key}
    with TestClient(app) as c:
        big = make_zip({"a.bin": rng.bytes(300_000)}, "point,measured_at,file\n", method=zipfile.ZIP_STORED)
        r = post_zip(c, plant.route_id, big, h)
        assert r.status_code == 413 and r.json()["error"]["field"] in ("file", "body")
        rows = "point,measured_at,file\n" + "P1-DE-H,2026-03-02T08:00:00Z,a.csv\n" * 4
        r = post_zip(c, plant.route_id, make_zip({"a.csv": b"1\n"}, rows), h)
        assert r.status_code == 413 and r.json()["error"]["field"] == "manifest"


@pytest.mark.parametrize("data, field", [
    (b"not a zip at all", "file"),
    (None, "manifest"),  # ZIP without manifest.csv
])
def test_unusable_upload_is_a_clear_400(client, plant, plant_key_headers, data, field):
    data = data if data is not None else make_zip({"a.csv": b"1\n"}, None)
    r = post_zip(client, plant.route_id, data, plant_key_headers)
    assert r.status_code == 400 and r.json()["error"]["field"] == field


def test_manifest_without_required_columns(client, plant, plant_key_headers):
    r = post_zip(client, plant.route_id, make_zip({"a.csv": b"1\n"}, "point,file\nP1-DE-H,a.csv\n"),
                 plant_key_headers)
    assert r.status_code == 400 and "measured_at" in r.json()["error"]["message"]


def test_unknown_route_and_other_site(client, plant, plant_key_headers):
    data = make_zip({}, "point,measured_at,file\n")
    assert post_zip(client, 999, data, plant_key_headers).status_code == 404


def test_safe_name_rejects_traversal():
    from server.services.route_upload import safe_name

    for bad in ("../x.csv", "a/../../x.csv", "/etc/passwd", "C:/x.csv", "a\\..\\x.csv", ""):
        assert safe_name(bad) is None, bad
    assert safe_name("readings/./a.csv") == "readings/a.csv"
