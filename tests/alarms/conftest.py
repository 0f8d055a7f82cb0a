"""Alarm-area fixtures: a real aiosmtpd server on 127.0.0.1, settings with SMTP, result seeding."""

from __future__ import annotations

import asyncio
import threading

import pytest
from aiosmtpd.controller import Controller
from alarms.helpers import Feeder
from support.fixtures import settings_for
from support.servers import free_port


class RecordingHandler:
    """Keeps every message; ``hold`` makes RCPT wait (a server that stalls mid-exchange)."""

    def __init__(self):
        self.messages: list[dict] = []
        self.hold = threading.Event()
        self.rcpt_seen = threading.Event()
        self.lock = threading.Lock()

    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        self.rcpt_seen.set()
        while self.hold.is_set():
            await asyncio.sleep(0.02)
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        from email import message_from_bytes, policy

        msg = message_from_bytes(envelope.content, policy=policy.default)
        with self.lock:
            self.messages.append({"to": list(envelope.rcpt_tos), "msg": msg})
        return "250 Message accepted for delivery"


class SmtpServer:
    def __init__(self):
        self.port = free_port()
        self.handler = RecordingHandler()
        self.controller = None

    def start(self):
        self.controller = Controller(self.handler, hostname="127.0.0.1", port=self.port, ready_timeout=10)
        self.controller.start()

    def stop(self):
        if self.controller is not None:
            self.controller.stop()
            self.controller = None

    @property
    def messages(self):
        return self.handler.messages


@pytest.fixture
def smtp():
    server = SmtpServer()
    server.start()
    yield server
    server.stop()


@pytest.fixture
def mail_settings(tmp_path, smtp):
    return settings_for(tmp_path, smtp_host="127.0.0.1", smtp_port=smtp.port, smtp_timeout_s=5,
                        mail_backoff_s=0.2, mail_backoff_max_s=1.0, mail_lease_s=1.0,
                        smtp_from="halfwatch@example.test", public_base_url="https://cm.example.test")


@pytest.fixture
def feeder(migrated_db, hw_settings):
    return Feeder(migrated_db, hw_settings)
