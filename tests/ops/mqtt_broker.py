"""Ops-area fixtures (shared by the MQTT and the reliability tests).

- ``broker`` / ``durable_broker``: a real mosquitto started per test on 127.0.0.1 (see Broker).
- ``backend``: (Database, Settings, Plant) on a migrated database, parametrised over SQLite and, when
  HALFWATCH_TEST_POSTGRES_URL is set, PostgreSQL (a fresh schema per test).
- ``procs``: an ``ops.helpers.Procs`` (server and worker child processes), killed by pid at the end.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time

import pytest
from ops.helpers import Procs
from support.fixtures import settings_for
from support.plant import make_plant
from support.servers import free_port


def mosquitto_bin() -> str | None:
    return os.environ.get("HALFWATCH_TEST_MOSQUITTO_BIN") or shutil.which("mosquitto") or (
        "/usr/sbin/mosquitto" if os.path.exists("/usr/sbin/mosquitto") else None)


class Broker:
    """mosquitto with a temp config; ``persistent`` keeps sessions and queued QoS 1 messages on disk."""

    def __init__(self, binary: str, workdir, *, persistent: bool):
        self.binary, self.dir, self.port = binary, workdir, free_port()
        self.dir.mkdir(parents=True, exist_ok=True)
        lines = [f"listener {self.port} 127.0.0.1", "allow_anonymous true", "log_dest stderr",
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


def _broker(tmp_path, name: str, persistent: bool):
    binary = mosquitto_bin()
    if binary is None:
        if os.environ.get("CI") == "true":
            pytest.fail("mosquitto is not installed; CI must provide it (apt-get install mosquitto)")
        pytest.skip("mosquitto not found (install it, or set HALFWATCH_TEST_MOSQUITTO_BIN)")
    broker = Broker(binary, tmp_path / name, persistent=persistent)
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


@pytest.fixture(params=["sqlite", "postgresql"])
def backend(request, tmp_path):
    from server.migrations import upgrade
    from server.storage import Database

    overrides = dict(retry_backoff_s=0.0, worker_poll_s=0.05)
    if request.param == "postgresql":
        settings = request.getfixturevalue("pg_settings").model_copy(update=overrides)
    else:
        settings = settings_for(tmp_path, **overrides)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    yield db, settings, make_plant(db)
    db.dispose()


@pytest.fixture
def procs(tmp_path):
    ps = Procs(tmp_path)
    yield ps
    ps.close()
