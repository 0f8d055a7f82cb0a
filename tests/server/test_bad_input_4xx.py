"""Input that once gave a 500 gets a 4xx naming the field: times past the UTC range, damaged ZIP members.

- Times: Python's datetime holds the years 1 to 9999 (the datetime module documentation, MINYEAR and
  MAXYEAR); ``0001-01-01T00:00:00+05:00`` is year 0 in UTC and cannot be stored or compared.
- ZIP members: a member's CRC-32, sizes and raw deflate data (RFC 1951) sit in its local header and the
  central directory as the PKWARE APPNOTE describes (offsets from memory: central CRC at 16, sizes at
  20 and 24; local CRC at 14, sizes at 18 and 22). Each damaged member is made by patching those bytes
  of a ZIP written by Python's zipfile; its row is rejected with the reason and the others are stored.
"""

from __future__ import annotations

import io
import struct
import zipfile

import pytest
from sqlalchemy import func, select
from support.signals import tone_record

from server.storage.tables import Record

EDGE_TIMES = ["0001-01-01T00:00:00+05:00", "9999-12-31T23:00:00-05:00"]


@pytest.mark.parametrize("value", EDGE_TIMES)
def test_a_time_outside_the_utc_range_is_a_422_naming_the_field(client, plant, plant_key_headers, value):
    r = client.get(f"/api/v1/points/{plant.point_id}/records", params={"before": value},
                   headers=plant_key_headers)
    assert r.status_code == 422, r.text
    assert r.json()["error"]["field"] == "before" and "UTC" in r.json()["error"]["message"]
    for path in ("/api/v1/points/{}/trend", "/api/v1/dashboard/points/{}/series",
                 "/api/v1/dashboard/points/{}/window"):
        for name in ("start", "end"):
            r = client.get(path.format(plant.point_id), params={name: value}, headers=plant_key_headers)
            assert r.status_code == 422 and r.json()["error"]["field"] == name, (path, r.text)


@pytest.mark.parametrize("value", EDGE_TIMES)
def test_a_record_measured_outside_the_utc_range_is_refused(client, plant, plant_key_headers, rng, value):
    r = client.post(f"/api/v1/points/{plant.point_id}/records",
                    params={"fs_hz": 2560, "units": "g", "measured_at": value},
                    content=tone_record(rng, n=4096).tobytes(),
                    headers={**plant_key_headers, "Content-Type": "application/octet-stream"})
    assert r.status_code == 422, r.text
    assert r.json()["error"]["field"] == "measured_at"


def _csv(x) -> bytes:
    fs = 2560.0
    return ("time_s,accel_g\n" + "\n".join(f"{i / fs:.9f},{v:.8g}" for i, v in enumerate(x))).encode()


def _patch(data: bytearray, name: str, *, crc: int | None = None, size: int | None = None,
           first_byte: int | None = None) -> None:
    """Change a member's CRC-32 or uncompressed size in both headers, or the first byte of its data."""
    zf = zipfile.ZipFile(io.BytesIO(bytes(data)))
    info = zf.getinfo(name)
    local = info.header_offset
    name_len, extra_len = struct.unpack("<HH", data[local + 26:local + 30])
    central = data.index(b"PK\x01\x02", zf.start_dir)
    while data[central + 46:central + 46 + len(name)] != name.encode():
        central = data.index(b"PK\x01\x02", central + 4)
    if crc is not None:
        struct.pack_into("<I", data, local + 14, crc)
        struct.pack_into("<I", data, central + 16, crc)
    if size is not None:
        struct.pack_into("<I", data, local + 22, size)
        struct.pack_into("<I", data, central + 24, size)
    if first_byte is not None:
        data[local + 30 + name_len + extra_len] = first_byte


def test_damaged_zip_members_reject_their_rows_and_the_rest_is_stored(client, plant, plant_key_headers, rng,
                                                                      migrated_db):
    names = ["good.csv", "bigger.csv", "crc.csv", "deflate.csv"]
    files = {n: _csv(tone_record(rng, n=4096) / 9.80665) for n in names}
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("manifest.csv", "point,measured_at,file,units\n" + "".join(
            f"P1-DE-H,2026-03-02T08:0{i}:00Z,{n},g\n" for i, n in enumerate(names)))
        for n, data in files.items():
            zf.writestr(n, data)
    data = bytearray(buf.getvalue())
    _patch(data, "bigger.csv", size=len(files["bigger.csv"]) // 2)  # inflates to twice what it claims
    _patch(data, "crc.csv", crc=(zipfile.crc32(files["crc.csv"]) ^ 0xFFFF) & 0xFFFFFFFF)
    _patch(data, "deflate.csv", first_byte=0xFF)  # BFINAL=1, BTYPE=11: a reserved block type (RFC 1951)
    r = client.post(f"/api/v1/routes/{plant.route_id}/uploads", content=bytes(data),
                    headers={**plant_key_headers, "Content-Type": "application/zip"})
    assert r.status_code == 201, r.text
    rows = {row["file"]: row for row in r.json()["rows"]}
    assert rows["good.csv"]["status"] == "accepted"
    for n, words in (("bigger.csv", "more than"), ("crc.csv", "CRC"), ("deflate.csv", "deflate")):
        err = rows[n].get("error") or {}
        assert rows[n]["status"] == "rejected" and err.get("field") == "file", rows[n]
        assert words in err["message"] and n in err["message"], err
    assert (r.json()["accepted"], r.json()["rejected"]) == (1, 3)
    with migrated_db.read() as s:
        assert s.scalar(select(func.count()).select_from(Record)) == 1


def test_a_stored_member_longer_than_its_header_is_rejected(client, plant, plant_key_headers, rng):
    body = _csv(tone_record(rng, n=4096) / 9.80665)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_STORED) as zf:
        zf.writestr("manifest.csv", "point,measured_at,file,units\nP1-DE-H,2026-03-02T08:00:00Z,a.csv,g\n")
        zf.writestr("a.csv", body)
    data = bytearray(buf.getvalue())
    _patch(data, "a.csv", size=100)
    r = client.post(f"/api/v1/routes/{plant.route_id}/uploads", content=bytes(data),
                    headers={**plant_key_headers, "Content-Type": "application/zip"})
    assert r.status_code == 200, r.text  # nothing accepted: 200 with the report
    row = r.json()["rows"][0]
    assert row["status"] == "rejected" and row["error"]["field"] == "file", row
