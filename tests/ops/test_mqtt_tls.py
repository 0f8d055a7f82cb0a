"""The bridge over TLS with a broker login, against a real mosquitto with a certificate made by openssl.

Python's ``ssl`` module (the reference TLS client) checks the broker's certificate against the test CA
and the address 127.0.0.1 in its subjectAltName (RFC 6125 identity check); the login is checked by
mosquitto's own password file made with ``mosquitto_passwd``.
"""

from __future__ import annotations

import datetime as dt
import shutil
import subprocess

import paho.mqtt.client as mqtt
import pytest
from ops.mqtt_broker import _broker, record_payload, require, wait_until
from paho.mqtt.enums import CallbackAPIVersion
from sqlalchemy import func, select
from support.signals import tone_record

from server.mqtt.bridge import Bridge
from server.storage.tables import Record

T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


def _run(*cmd, cwd):
    subprocess.run(cmd, cwd=cwd, check=True, capture_output=True, timeout=60)


@pytest.fixture
def tls_broker(tmp_path):
    openssl = require(shutil.which("openssl"), "openssl")
    passwd = require(shutil.which("mosquitto_passwd"), "mosquitto_passwd")
    d = tmp_path / "pki"
    d.mkdir()
    _run(openssl, "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", "ca.key", "-out", "ca.pem",
         "-days", "2", "-subj", "/CN=halfwatch test CA", cwd=d)
    _run(openssl, "req", "-newkey", "rsa:2048", "-nodes", "-keyout", "server.key", "-out", "server.csr",
         "-subj", "/CN=127.0.0.1", cwd=d)
    (d / "san.ext").write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n")
    _run(openssl, "x509", "-req", "-in", "server.csr", "-CA", "ca.pem", "-CAkey", "ca.key", "-CAcreateserial",
         "-out", "server.pem", "-days", "2", "-extfile", "san.ext", cwd=d)
    _run(passwd, "-b", "-c", str(d / "passwords"), "bridge", "s3cret bridge pass", cwd=d)
    b = _broker(tmp_path, "tls-broker", False, [
        f"cafile {d / 'ca.pem'}", f"certfile {d / 'server.pem'}", f"keyfile {d / 'server.key'}",
        "allow_anonymous false", f"password_file {d / 'passwords'}"])
    b.ca = d / "ca.pem"
    yield b
    b.stop()


def _settings(hw_settings, b, **extra):
    return hw_settings.model_copy(update={
        "mqtt_port": b.port, "mqtt_client_id": "hw-tls-bridge", "mqtt_tls": True, "mqtt_ca_file": str(b.ca),
        "mqtt_username": "bridge", "mqtt_reconnect_max_s": 2.0, "heartbeat_s": 0.2, **extra})


def test_tls_and_login_round_trip_and_a_wrong_password_is_refused(
        migrated_db, plant, hw_settings, tls_broker, rng):
    from pydantic import SecretStr

    wrong = Bridge(migrated_db, _settings(hw_settings, tls_broker, mqtt_password=SecretStr("guess")))
    wrong.start()
    try:
        assert wait_until(lambda: wrong.heartbeat.snapshot()["counters"].get("connect_refused", 0) >= 1,
                          timeout_s=15)
        assert not wrong.subscribed.is_set()
    finally:
        wrong.stop()

    untrusted = Bridge(migrated_db, _settings(hw_settings, tls_broker, mqtt_ca_file="",
                                              mqtt_password=SecretStr("s3cret bridge pass")))
    untrusted.start()  # the system CAs do not know the test CA: the handshake fails, no session
    try:
        assert not untrusted.subscribed.wait(3)
    finally:
        untrusted.stop()

    bridge = Bridge(migrated_db, _settings(hw_settings, tls_broker,
                                           mqtt_password=SecretStr("s3cret bridge pass")))
    bridge.start()
    try:
        assert bridge.subscribed.wait(15), tls_broker.log.read_text()[-2000:]
        _publish(tls_broker, f"halfwatch/{plant.site_id}/{plant.point_id}/records",
                 record_payload(tone_record(rng), T0, "tls-1"))

        def stored():
            with migrated_db.read() as s:
                return s.scalar(select(func.count()).select_from(Record).where(Record.client_ref == "tls-1"))

        assert wait_until(lambda: stored() == 1, timeout_s=15)
    finally:
        bridge.stop()


def _publish(b, topic, payload):
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="hw-tls-gw")
    c.tls_set(ca_certs=str(b.ca))
    c.username_pw_set("bridge", "s3cret bridge pass")
    c.connect("127.0.0.1", b.port)
    c.loop_start()
    try:
        c.publish(topic, payload, qos=1).wait_for_publish(10)
    finally:
        c.disconnect()
        c.loop_stop()
