"""Input rules of issue 16: names without control characters, passwords, user emails, and friends.

The forbidden characters are Unicode's control characters (general category Cc: U+0000-U+001F and
U+007F-U+009F) and the bidirectional embedding/override/isolate formatting characters of UAX #9
(U+202A-U+202E, U+2066-U+2069). The checks compare against ``unicodedata`` (the Python standard
library's copy of the Unicode Character Database) as the outside reference.
"""

from __future__ import annotations

import unicodedata

import pytest

from server.names import NameRefused, check_name, header_safe, name_problem

HOSTILE = ["CW pump\r\nBcc: x@evil.example", "line\nbreak", "nul\x00", "tab\there", "c1\x85next",
           "bidi \u202eevil", "isolate \u2066x\u2069", "del\x7f"]
BIDI = {*range(0x202A, 0x202F), *range(0x2066, 0x206A)}


def test_the_rule_is_exactly_unicode_controls_and_bidi_marks():
    for cp in range(0x3000):  # the whole BMP start: Latin, Greek, Cyrillic, punctuation, bidi block
        ch = chr(cp)
        forbidden = unicodedata.category(ch) == "Cc" or cp in BIDI  # UCD general category; UAX #9 marks
        assert (name_problem(f"a{ch}b") is not None) == forbidden, hex(cp)
    assert name_problem("Pompe n° 3 – côté accouplement") is None  # ordinary non-ASCII text is fine


def _create(c, plant, kind: str, name: str):
    bodies = {
        "sites": {"name": name},
        "areas": {"site_id": plant.site_id, "name": name},
        "assets": {"area_id": plant.area_id, "name": name, "nominal_speed_hz": 24.75},
        "points": {"asset_id": plant.asset_ids["pump"], "name": name},
        "routes": {"site_id": plant.site_id, "name": name},
        "users": {"username": name, "password": "a long enough secret"},
        "apikeys": {"name": name},
    }
    return c.post(f"/api/v1/{kind}", json=bodies[kind])


@pytest.mark.parametrize("kind", ["sites", "areas", "assets", "points", "routes", "users", "apikeys"])
def test_every_name_refuses_control_characters_with_a_422_naming_the_field(users, plant, kind):
    c = users.login("admin")
    for name in HOSTILE:
        r = _create(c, plant, kind, name)
        assert r.status_code == 422, (kind, name, r.text)
        err = r.json()["error"]
        field = "username" if kind == "users" else "name"
        assert err["field"] == field, err
        assert "control character U+" in err["message"] and "remove control characters" in err["message"]
    assert _create(c, plant, kind, "Cooling tower fan 4" if kind != "users" else "ct.fan4").status_code == 201


def test_updates_refuse_them_too(users, plant):
    c = users.login("admin")
    r = c.put(f"/api/v1/assets/{plant.asset_ids['pump']}", json={"area_id": plant.area_id,
              "name": "CW pump 1\u202e", "nominal_speed_hz": 24.75})
    assert r.status_code == 422 and r.json()["error"]["field"] == "name"


def test_every_orm_write_of_a_name_is_guarded(migrated_db, hw_settings):
    """CLI, demo and services write through the ORM: the same rule refuses there (NameRefused, a 422)."""
    from server.services.users import add_user, create_api_key
    from server.storage.tables import Asset, Site

    with pytest.raises(NameRefused, match="U\\+000A"):
        Site(name="Riverside\nworks")
    site = Site(name="ok")
    with pytest.raises(NameRefused, match="U\\+202E"):
        site.name = "ok\u202e"
    with pytest.raises(NameRefused):
        Asset(name="pump\x00")
    with pytest.raises(NameRefused, match="username"):
        add_user(migrated_db, hw_settings, username="bad\rname", password="a long enough secret",
                 role="viewer")
    with pytest.raises(NameRefused):
        create_api_key(migrated_db, name="gateway\nB")
    assert check_name("Boiler feed pump", "name") == "Boiler feed pump"


def test_header_safe_gives_one_clean_line():
    assert header_safe("CW pump 1\r\nBcc: x@evil.example") == "CW pump 1 Bcc: x@evil.example"
    assert header_safe("a\u202eb\x85c") == "a b c"


def test_route_manifest_rows_naming_a_point_with_control_characters_are_refused(users, plant):
    import io
    import zipfile

    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        zf.writestr("manifest.csv", 'point,measured_at,file\n"P1-DE-H\u202e",2026-11-02T08:00:00Z,a.csv\n')
        zf.writestr("a.csv", "0.0\n" * 10)
    c = users.login("technician")
    r = c.post(f"/api/v1/routes/{plant.route_id}/uploads", content=buf.getvalue(),
               headers={"Content-Type": "application/zip"})
    assert r.status_code == 200, r.text
    [row] = r.json()["rows"]
    assert row["status"] == "rejected", row
    assert row["error"]["field"] == "point" and "U+202E" in row["error"]["message"], row


@pytest.mark.parametrize(("password", "rule"), [
    ("short1", "shorter than 8 characters"),
    ("aaaaaaaaaaaa", "one character repeated"),
    ("xx-planner9-xx", "contains the user name"),
    ("Password123", "one of the very common passwords"),
    ("qwertyuiop", "one of the very common passwords"),
])
def test_weak_passwords_are_refused_and_the_error_states_the_rule(users, password, rule):
    c = users.login("admin")
    r = c.post("/api/v1/users", json={"username": "planner9", "password": password})
    assert r.status_code == 422, r.text
    err = r.json()["error"]
    assert err["field"] == "password" and rule in err["message"], err
    assert "at least 8 characters, must not contain the user name" in err["message"]  # the whole rule
    assert c.post("/api/v1/users", json={"username": "planner9",
                                         "password": "valve train 73 hums"}).status_code == 201


def test_the_common_password_list_ships_with_the_package():
    from server.services.users import common_passwords

    words = common_passwords()
    assert "password" in words and "12345678" in words and len(words) > 100


@pytest.mark.parametrize("email", ["not-an-address", "a@b", "x@example.com\r\nBcc: y@evil.example",
                                   "two@example.com three@example.com"])
def test_user_emails_are_validated(users, email):
    c = users.login("admin")
    r = c.post("/api/v1/users", json={"username": "planner8", "password": "valve train 73 hums",
                                      "email": email})
    assert r.status_code == 422 and r.json()["error"]["field"] == "email", r.text
    ok = c.post("/api/v1/users", json={"username": "planner8", "password": "valve train 73 hums",
                                       "email": "planner8@example.com"})
    assert ok.status_code == 201 and ok.json()["user"]["email"] == "planner8@example.com"


def test_session_cookies_are_signed_with_the_secret_key(app, users, hw_settings):
    """HALFWATCH_SECRET_KEY signs the session cookie (HMAC-SHA256, RFC 2104): a cookie without the right
    signature is refused without a lookup, another process with the same key accepts it, and a new key
    ends every session."""
    from fastapi.testclient import TestClient

    from server.app import create_app

    c = users.login("viewer")
    value = c.cookies.get("halfwatch_session")
    token, _, sig = value.rpartition(".")
    assert token and sig
    assert c.get("/api/v1/me").status_code == 200
    for forged in (token, f"{token}.{sig[::-1]}", f"{token}x.{sig}"):
        with TestClient(app) as other:
            other.cookies.set("halfwatch_session", forged)
            assert other.get("/api/v1/me").status_code == 401, forged
    for secret, expected in (("test-secret", 200), ("a-new-secret", 401)):
        twin = create_app(hw_settings.model_copy(update={"secret_key": secret}))
        with TestClient(twin) as t:
            t.cookies.set("halfwatch_session", value)
            assert t.get("/api/v1/me").status_code == expected, secret


def test_api_answers_are_not_cached(users, plant):
    c = users.login("viewer")
    for path in ("/api/v1/me", "/api/v1/tree", f"/api/v1/points/{plant.point_id}/records", "/api/v1/nope"):
        assert c.get(path).headers.get("cache-control") == "no-store", path


@pytest.mark.parametrize("value", ["1767225600", "1767225600.5", " 1.7e9 "])
def test_measured_at_as_a_bare_number_is_refused(users, plant, value):
    import numpy as np

    c = users.login("technician")
    body = np.zeros(4096, "<f4").tobytes()
    r = c.post(f"/api/v1/points/{plant.point_id}/records",
               params={"fs_hz": 2560, "units": "m/s2", "measured_at": value}, content=body,
               headers={"Content-Type": "application/octet-stream"})
    assert r.status_code == 422 and r.json()["error"]["field"] == "measured_at", r.text
    assert "bare number" in r.json()["error"]["message"] and "ISO 8601" in r.json()["error"]["message"]
    r = c.post(f"/api/v1/points/{plant.point_id}/records",
               json={"fs_hz": 2560, "units": "m/s2", "measured_at": float(value), "samples": [0.0] * 300})
    assert r.status_code == 422 and r.json()["error"]["field"] == "measured_at", r.text


def test_a_wav_whose_header_claims_more_data_than_the_file_holds_is_refused(users, plant):
    import io

    import numpy as np
    from scipy.io import wavfile  # scipy writes the reference WAV

    from analysis.errors import SignalError
    from analysis.record.io import read_wav

    buf = io.BytesIO()
    wavfile.write(buf, 2560, (np.sin(np.arange(25600) * 0.3) * 8000).astype(np.int16))
    whole = buf.getvalue()
    assert read_wav(whole).samples.size == 25600
    cut = whole[: len(whole) // 10]
    with pytest.raises(SignalError, match="says its data holds 51200 bytes but the file has only"):
        read_wav(cut)
    c = users.login("technician")
    r = c.post(f"/api/v1/points/{plant.point_id}/records/file", files={"file": ("cut.wav", cut)},
               data={"measured_at": "2026-11-02T08:00:00Z", "units": "m/s2"})
    assert r.status_code == 422 and r.json()["error"]["field"] == "file", r.text


def test_the_alarm_history_csv_says_where_in_words(users, plant, migrated_db, hw_settings):
    import csv
    import io

    from alarms.helpers import Feeder, make_result

    feeder = Feeder(migrated_db, hw_settings)
    for v in (0.2, 0.3, 1.5, 1.6):  # the 4th raises the half-order alert (as tests/alarms/test_mail.py)
        feeder.feed(plant.point_id, make_result(half_v=v))
    c = users.login("viewer")
    text = c.get("/api/v1/alarms/history.csv").text
    rows = list(csv.DictReader(io.StringIO(text)))
    assert rows and rows[0]["where"] == "Riverside works / Cooling water / CW pump 1 / P1-DE-H", rows[0]


def test_a_record_just_short_of_the_minimum_is_told_the_exact_minimum(rng):
    import math

    from analysis import analyze_record
    from analysis.errors import SignalError

    fs, f1 = 2560.0, 24.75
    need = math.ceil(fs * 16.0 / f1)  # 16 periods of 1X: the shortest reading analysed (one segment)
    with pytest.raises(SignalError, match=f"send at least {need} samples"):
        analyze_record(rng.standard_normal(need - 3), fs, units="m/s2", forcing_hz=f1)
    # the stated minimum is enough for that check
    try:
        analyze_record(rng.standard_normal(max(need, 256)), fs, units="m/s2", forcing_hz=f1)
    except SignalError as exc:
        assert "too short" not in str(exc)
