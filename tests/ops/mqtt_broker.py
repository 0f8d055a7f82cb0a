"""MQTT test helpers: a real mosquitto broker per test on 127.0.0.1 (stopped by its own pid), a bridge
running in this process, a plain paho listener/publisher, and the example gateway script as a module.

Import ``broker`` / ``durable_broker`` into a test module to use them as fixtures.
"""

from __future__ import annotations

import datetime as dt
import importlib.util
import json
import os
import shutil
import socket
import subprocess
import threading
import time
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from support.servers import free_port

from server.mqtt.bridge import Bridge

ROOT = Path(__file__).resolve().parents[2]


def mosquitto_bin() -> str | None:
    return os.environ.get("HALFWATCH_TEST_MOSQUITTO_BIN") or shutil.which("mosquitto") or (
        "/usr/sbin/mosquitto" if os.path.exists("/usr/sbin/mosquitto") else None)


class Broker:
    """mosquitto with a temp config; ``persistent`` keeps sessions and queued QoS 1 messages on disk."""

    def __init__(self, binary: str, workdir, *, persistent: bool, listener: list[str] | None = None):
        self.binary, self.dir, self.port = binary, workdir, free_port()
        self.dir.mkdir(parents=True, exist_ok=True)
        listener = listener or ["allow_anonymous true"]  # or TLS and password lines (test_mqtt_tls.py)
        lines = [f"listener {self.port} 127.0.0.1", *listener, "log_dest stderr",
                 "log_type error", "log_type warning", "log_type notice", "max_queued_messages 10000",
                 "max_inflight_messages 4"]  # so a stalled bridge leaves messages queued at the broker
        if os.geteuid() == 0:  # started as root, mosquitto would drop to its own user and then could
            lines.append("user root")  # not write into (or even reach) the test's private temp dir
        if persistent:  # save after every change: a SIGKILL then loses at most the last moment's
            lines += ["persistence true", f"persistence_location {self.dir}/",  # messages
                      "autosave_on_changes true", "autosave_interval 1"]
        else:
            lines.append("persistence false")
        self.conf = self.dir / "mosquitto.conf"
        self.conf.write_text("\n".join(lines) + "\n")
        self.log = self.dir / "mosquitto.log"
        self.proc = None

    def start(self, timeout_s: float = 10.0) -> None:
        with open(self.log, "ab") as log:
            self.proc = subprocess.Popen([self.binary, "-c", str(self.conf)], stdout=log,
                                         stderr=subprocess.STDOUT)
        t0 = time.monotonic()
        while time.monotonic() - t0 < timeout_s:
            if self.proc.poll() is not None:
                raise RuntimeError(f"mosquitto exited: {self.log.read_text()[-2000:]}")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError("mosquitto did not open its port")

    def kill(self) -> None:
        """SIGKILL: no clean shutdown, no final save."""
        if self.proc and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)


def require(tool: str | None, what: str) -> str:
    """The tool's path; skip locally when it is missing, fail under CI=true."""
    if tool is None:
        if os.environ.get("CI") == "true":
            pytest.fail(f"{what} is not installed; CI must provide it (apt-get install mosquitto openssl)")
        pytest.skip(f"{what} not found (install it, or set HALFWATCH_TEST_MOSQUITTO_BIN)")
    return tool


def _broker(tmp_path, name: str, persistent: bool, listener: list[str] | None = None):
    binary = require(mosquitto_bin(), "mosquitto")
    broker = Broker(binary, tmp_path / name, persistent=persistent, listener=listener)
    broker.start()
    return broker


@pytest.fixture
def broker(tmp_path):
    b = _broker(tmp_path, "broker", persistent=False)
    yield b
    b.stop()


@pytest.fixture
def durable_broker(tmp_path):
    b = _broker(tmp_path, "durable-broker", persistent=True)
    yield b
    b.stop()


def wait_until(predicate, timeout_s: float = 20.0, step_s: float = 0.05) -> bool:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout_s:
        if predicate():
            return True
        time.sleep(step_s)
    return bool(predicate())


def load_gateway():
    spec = importlib.util.spec_from_file_location("gateway_publish", ROOT / "examples" / "gateway_publish.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


gateway = load_gateway()


def mqtt_settings(settings, b, **extra):
    return settings.model_copy(update={"mqtt_host": "127.0.0.1", "mqtt_port": b.port, "heartbeat_s": 0.2,
                                       "mqtt_client_id": "hw-test-bridge", "mqtt_reconnect_max_s": 2.0,
                                       **extra})


class Running:
    """A bridge started in this process; ``stop()`` is a clean stop."""

    def __init__(self, db, settings, cls=Bridge):
        self.bridge = cls(db, settings)
        self.bridge.start()
        assert self.bridge.subscribed.wait(15), "bridge did not subscribe"

    def stop(self):
        self.bridge.stop()


class Listener:
    """A plain paho client that collects replies (and can publish raw payloads)."""

    def __init__(self, port: int, topic: str = "halfwatch/#"):
        self.replies: list[dict] = []
        self.ready = threading.Event()
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="")
        self.c.on_connect = lambda c, u, f, rc, p: c.subscribe(topic, qos=1)
        self.c.on_subscribe = lambda *a: self.ready.set()
        self.acked: set[int] = set()
        self.c.on_publish = lambda c, u, mid, rc, p: self.acked.add(mid)
        self.c.reconnect_delay_set(1, 2)
        self.c.on_message = self._on_message
        self.c.connect("127.0.0.1", port, keepalive=30)
        self.c.loop_start()
        assert self.ready.wait(10)

    def _on_message(self, client, userdata, m):
        if m.topic.endswith("/reply"):
            self.replies.append({"reply_topic": m.topic, **json.loads(m.payload)})

    def publish(self, topic: str, payload: bytes):
        self.c.publish(topic, payload, qos=1).wait_for_publish(10)

    def send(self, topic: str, payload: bytes) -> int:
        """Publish without waiting; works while the broker is down (paho queues and re-sends)."""
        return self.c.publish(topic, payload, qos=1).mid

    def close(self):
        self.c.disconnect()
        self.c.loop_stop()


def record_payload(x, when: dt.datetime, ref: str | None, **extra) -> bytes:
    meta = {"fs_hz": 2560.0, "units": "m/s2", "measured_at": when.isoformat(), **extra}
    if ref:
        meta["client_ref"] = ref
    return gateway.payload(x, meta, binary=False)
