"""``halfwatch email-test`` and ``halfwatch mailer --once`` as a user runs them (subprocesses, real SMTP)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from alarms.helpers import make_result

from server.alarms import service

ROOT = Path(__file__).resolve().parents[2]


def run(args, env_extra):
    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    env.update(env_extra, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "server", *args], env=env, cwd=ROOT, capture_output=True,
                          text=True, timeout=60)


def test_email_test_sends_through_the_configured_server(smtp, tmp_path):
    env = {"HALFWATCH_SMTP_HOST": "127.0.0.1", "HALFWATCH_SMTP_PORT": str(smtp.port),
           "HALFWATCH_SMTP_FROM": "cm@example.test", "HALFWATCH_DATA_DIR": str(tmp_path)}
    out = run(["email-test", "--to", "planner@example.test"], env)
    assert out.returncode == 0, out.stderr
    [got] = smtp.messages
    assert got["to"] == ["planner@example.test"] and got["msg"]["From"] == "cm@example.test"
    assert "SMTP settings work" in got["msg"].get_body(preferencelist=("plain",)).get_content()
    assert "lockout" in got["msg"].get_body(preferencelist=("plain",)).get_content()


def test_email_test_errors(smtp, tmp_path):
    env = {"HALFWATCH_SMTP_HOST": "127.0.0.1", "HALFWATCH_SMTP_PORT": str(smtp.port),
           "HALFWATCH_DATA_DIR": str(tmp_path)}
    bad = run(["email-test", "--to", "not-an-address"], env)
    assert bad.returncode == 2 and "--to" in bad.stderr
    unset = run(["email-test", "--to", "a@example.test"], {"HALFWATCH_DATA_DIR": str(tmp_path)})
    assert unset.returncode == 2 and "HALFWATCH_SMTP_HOST" in unset.stderr
    smtp.stop()
    down = run(["email-test", "--to", "a@example.test"], env)
    assert down.returncode == 1 and "failed" in down.stderr


def test_mailer_once_sends_the_outbox(feeder, plant, migrated_db, smtp, mail_settings):
    service.create_subscription(migrated_db, {"email": "planner@example.test", "scope": "site",
                                              "scope_id": plant.site_id}, actor="admin1")
    for v in (0.2, 0.3, 1.5, 1.6):
        feeder.feed(plant.point_id, make_result(half_v=v))
    env = {"HALFWATCH_DATABASE_URL": mail_settings.database_url, "HALFWATCH_SMTP_HOST": "127.0.0.1",
           "HALFWATCH_SMTP_PORT": str(smtp.port)}
    out = run(["mailer", "--once"], env)
    assert out.returncode == 0, out.stderr
    assert "sent 1 email(s)" in out.stdout and len(smtp.messages) == 1
