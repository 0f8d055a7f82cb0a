"""Alarm-area fixtures: a real aiosmtpd server on 127.0.0.1, settings with SMTP, result seeding."""

from __future__ import annotations

import pytest
from alarms.helpers import Feeder, SmtpServer
from support.fixtures import settings_for


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
