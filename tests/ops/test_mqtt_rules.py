"""Topic rules, reply templates, point lookup and payload decoding (no broker needed).

Topic wildcards follow MQTT 3.1.1 §4.7 ('+' one level, '#' the rest); paho's ``topic_matches_sub``
is the reference matcher. Base64 is RFC 4648 (Python's ``base64`` is the reference) and samples are
IEEE 754 binary32 little-endian (numpy's ``<f4``).
"""

from __future__ import annotations

import base64
import datetime as dt
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from paho.mqtt.client import topic_matches_sub

from server.errors import AppError
from server.mqtt.payload import decode, derived_ref
from server.mqtt.topics import RuleError, TopicRule, resolve_point

MAX = 1 << 20
ROOT = Path(__file__).resolve().parents[2]


def test_rule_becomes_a_filter_and_matches_whole_levels():
    rule = TopicRule("halfwatch/{site}/{point_id}/records")
    assert rule.filter == "halfwatch/+/+/records"
    assert rule.match("halfwatch/Riverside works/12/records") == {"site": "Riverside works", "point_id": "12"}
    assert rule.match("halfwatch/a/12/records/extra") is None
    assert rule.match("halfwatch/a/records") is None
    deep = TopicRule("plant/+/{asset}/{point}/#")
    assert deep.filter == "plant/+/+/+/#"
    assert deep.match("plant/x/CW pump 1/P1-DE-H/raw/v2") == {"asset": "CW pump 1", "point": "P1-DE-H"}
    for topic in ("halfwatch/a/1/records", "halfwatch/a/1/records/reply", "other/a/1/records"):
        assert (rule.match(topic) is not None) == topic_matches_sub(rule.filter, topic)  # paho agrees


@pytest.mark.parametrize("template, words", [
    ("", "empty"),
    ("halfwatch/{site}/records", "names no point"),
    ("halfwatch/{nope}/{point_id}", "unknown placeholder"),
    ("halfwatch/p{point_id}", "whole level"),
    ("halfwatch/{point_id}/{point_id}", "twice"),
    ("halfwatch/#/{point_id}", "last level"),
    ("halfwatch/a+/{point_id}", "whole level"),
])
def test_bad_rules_say_why(template, words):
    with pytest.raises(RuleError, match=words):
        TopicRule(template)


def test_reply_templates_that_would_loop_or_use_unknown_names_are_refused():
    rule = TopicRule("halfwatch/{site}/{point_id}/records")
    rule.check_reply_template("{topic}/reply")
    rule.check_reply_template("halfwatch/{site}/replies")
    with pytest.raises(RuleError, match="own replies"):
        TopicRule("halfwatch/{site}/{point_id}/#").check_reply_template("{topic}/reply")
    with pytest.raises(RuleError, match="asset"):
        rule.check_reply_template("halfwatch/{asset}/reply")
    assert rule.reply_topic("halfwatch/{site}/replies", "halfwatch/S/1/records", {"site": "S"}) == \
        "halfwatch/S/replies"


def test_points_are_found_by_id_or_by_name_within_site_and_asset(migrated_db, plant):
    with migrated_db.read() as s:
        assert resolve_point(s, {"site": "Riverside works", "point_id": str(plant.point_id)}) == \
            (plant.point_id, plant.site_id)
        assert resolve_point(s, {"site": str(plant.site_id), "point": "P1-DE-H"}) == \
            (plant.point_id, plant.site_id)
        assert resolve_point(s, {"asset": "CW pump 1", "point": "P1-NDE-V"})[0] == plant.point_ids["P1-NDE-V"]
        with pytest.raises(AppError, match="does not exist in site") as e:
            resolve_point(s, {"site": "Riverside works", "point_id": str(plant.other_point_id)})
        assert e.value.status == 404 and e.value.field == "topic"
        with pytest.raises(AppError, match="not a point id"):
            resolve_point(s, {"point_id": "P1"})


def test_a_point_name_used_twice_is_ambiguous(migrated_db, plant):
    from server.storage.tables import Point

    with migrated_db.unit_of_work() as s:  # the same name on the compressor as on the pump
        s.add(Point(asset_id=plant.asset_ids["recip"], name="P1-DE-H", units="m/s2"))
    with migrated_db.read() as s, pytest.raises(AppError, match="not unique") as e:
        resolve_point(s, {"site": "Riverside works", "point": "P1-DE-H"})
    assert e.value.status == 409


def _meta(**extra):
    return {"fs_hz": 2560, "units": "m/s2", "measured_at": "2026-03-02T08:00:00Z", **extra}


def test_json_and_binary_forms_decode_to_the_same_float32_values(rng):
    x = rng.standard_normal(1000).astype("<f4")
    b64 = base64.b64encode(x.tobytes()).decode()  # RFC 4648 alphabet with padding
    j = decode(json.dumps(_meta(samples_b64=b64)).encode(), max_bytes=MAX)
    b = decode(json.dumps(_meta()).encode() + b"\x00" + x.tobytes(), max_bytes=MAX)
    assert j.form == "json" and b.form == "binary"
    for d in (j, b):
        assert d.samples.dtype == np.dtype("<f4")
        assert np.array_equal(d.samples.view(np.uint32), x.view(np.uint32))  # bit for bit
    x64 = rng.standard_normal(10)
    d = decode(json.dumps(_meta(dtype="float64")).encode() + b"\x00" + x64.astype("<f8").tobytes(),
               max_bytes=MAX)
    assert np.array_equal(d.samples, x64)
    assert d.meta.measured_at == dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


@pytest.mark.parametrize("payload, field", [
    (b"", "payload"),
    (b"[1,2,3]", "payload"),
    (json.dumps(_meta(samples=[1.0], samples_b64="AAAA")).encode(), "samples_b64"),
    (json.dumps(_meta(samples_b64="AAAAAAA=")).encode(), "samples_b64"),  # 5 bytes: no whole float32
    (json.dumps(_meta(extra_field=1, samples=[1.0])).encode(), "extra_field"),
    (b"{not json}\x00\x00\x00\x00\x00", "header"),
])
def test_bad_payloads_name_the_field(payload, field):
    with pytest.raises(AppError) as e:
        decode(payload, max_bytes=MAX)
    assert e.value.field == field, e.value.message
    assert e.value.status == 422


def test_oversized_payload_is_413():
    with pytest.raises(AppError) as e:
        decode(b"x" * 101, max_bytes=100)
    assert e.value.status == 413


def test_derived_reference_is_stable_and_tells_records_apart(rng):
    x = rng.standard_normal(256).astype("<f4")
    t = dt.datetime(2026, 3, 2, 8, tzinfo=dt.UTC)
    assert derived_ref(3, t, x) == derived_ref(3, t, x.copy())
    assert derived_ref(3, t, x) != derived_ref(4, t, x)
    assert derived_ref(3, t, x) != derived_ref(3, t + dt.timedelta(seconds=1), x)
    y = x.copy()
    y[0] = np.nextafter(y[0], np.float32(np.inf))  # one ulp
    assert derived_ref(3, t, x) != derived_ref(3, t, y)


def test_cli_refuses_a_bad_rule_with_exit_code_2(hw_settings, migrated_db, tmp_path):
    env = {"HALFWATCH_DATABASE_URL": hw_settings.database_url, "HALFWATCH_MQTT_TOPIC": "x/{site}",
           "PATH": "/usr/bin:/bin", "PYTHONPATH": str(ROOT)}
    r = subprocess.run([sys.executable, "-m", "server", "mqtt-bridge"], capture_output=True, text=True,
                       env=env, timeout=60, cwd=ROOT)
    assert r.returncode == 2, r.stderr
    assert "names no point" in r.stderr
    r = subprocess.run([sys.executable, "-m", "server", "mqtt-bridge", "--password-file",
                        str(tmp_path / "missing")], capture_output=True, text=True, env=env, timeout=60,
                       cwd=ROOT)
    assert r.returncode == 2 and "--password-file" in r.stderr
