"""``halfwatch demo`` on a small scale: backfill, alarms, emails in the sink, a second run, live serving.

The demo's data are invented (halfwatch_demo); what is checked against outside facts is how the
analysis and the alarm rules judge them: the ISO 20816-3 zone boundaries for group 2 on a flexible
support (A/B 2.3, B/C 4.5 mm/s r.m.s., from memory, as in server/alarms/rules.py), whirl at 0.40-0.48X
(common practice), a half-order family at 1.5X (common practice), and the weekly route timing.
"""

from __future__ import annotations

import datetime as dt
import email
import email.policy
import json
import os
import re
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
from support.servers import free_port

ROOT = Path(__file__).resolve().parents[2]
DAYS = "2"


def run_demo(folder: Path, *args: str, timeout: float = 240.0) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    env["PYTHONPATH"] = str(ROOT)
    return subprocess.run([sys.executable, "-m", "server", "demo", "--data-dir", str(folder), "--days", DAYS,
                           "--jobs", "1", *args], cwd=ROOT, env=env, capture_output=True, text=True,
                          timeout=timeout)


def query(folder: Path, sql: str, *params) -> list[tuple]:
    con = sqlite3.connect(folder / "halfwatch.db")
    try:
        return con.execute(sql, params).fetchall()
    finally:
        con.close()


def messages(folder: Path) -> list[email.message.EmailMessage]:
    out = []
    for path in sorted((folder / "mail").glob("*.eml")):
        with path.open("rb") as fh:
            out.append(email.message_from_binary_file(fh, policy=email.policy.default))
    return out


@pytest.fixture(scope="module")
def demo_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo") / "demo-data"
    first = run_demo(folder, "--no-serve")
    assert first.returncode == 0, first.stderr[-3000:]
    return folder, first


def test_backfill_stores_readings_raises_alarms_and_writes_emails(demo_folder):
    folder, first = demo_folder
    assert "alert emails are written as .eml files to" in first.stdout
    # 4 online points hourly for 2 days, plus whatever walks fell inside the window
    n_records = query(folder, "select count(*) from records")[0][0]
    assert 4 * 47 <= n_records <= 4 * 49 + 60
    assert query(folder, "select count(*) from jobs where state != 'done'")[0][0] == 0
    # the feed pump whirls: its half-order rule is in alarm, found as sub-synchronous
    rows = query(folder, """select r.sub_class, r.sub_frequency_hz / r.forcing_hz from results r
                            join points p on p.id = r.point_id where p.name = 'BFP-2 pump drive end H'""")
    classes = [c for c, _ in rows]
    assert classes.count("sub-synchronous") >= 0.9 * len(rows)
    assert all(0.40 <= ratio <= 0.48 for c, ratio in rows if c == "sub-synchronous")  # common practice
    levels = dict(query(folder, """select s.metric, s.level from alarm_states s join points p
                                   on p.id = s.point_id where p.name = 'BFP-2 pump drive end H'"""))
    assert levels["half_order_velocity"] == "alert"
    # VP-102 is 32+ days past its speed change: half-order beyond the danger level (B/C, flexible)
    levels = dict(query(folder, """select s.metric, s.level from alarm_states s join points p
                                   on p.id = s.point_id where p.name = 'VP-102 motor top H'"""))
    assert levels["half_order_velocity"] == "danger"
    # the whirl's alarm came from a reading of the backfilled past, in time order with its records
    first_alert = query(folder, """select min(r.measured_at) from alarm_events e join records r
                                   on r.id = e.record_id join points p on p.id = e.point_id
                                   where p.name = 'BFP-2 pump drive end H' and e.to_level = 'alert'""")[0][0]
    assert dt.datetime.fromisoformat(first_alert) < dt.datetime.now() - dt.timedelta(hours=24)
    # the rules ran at each reading's own time: every event is dated by its record, not by the backfill
    late = query(folder, """select count(*) from alarm_events e join records r on r.id = e.record_id
                            where abs(julianday(e.created_at) - julianday(r.measured_at)) > 1e-5""")[0][0]
    assert late == 0
    # the emails went through the real mailer to the sink and read like alerts with the cautions
    mails = messages(folder)
    assert mails
    subjects = [m["Subject"] for m in mails]
    assert any("DANGER" in s and "VP-102" in s for s in subjects)
    assert any("BFP-2" in s for s in subjects)
    body = mails[0].get_body(preferencelist=("plain",)).get_content()
    assert "Cautions" in body
    sent = int(re.search(r"(\d+) alert email\(s\) sent", first.stdout).group(1))
    assert sent == len(mails)


def test_a_second_run_reuses_the_data(demo_folder):
    folder, _ = demo_folder
    state = json.loads((folder / "demo-state.json").read_text())
    anchor = dt.datetime.fromisoformat(state["anchor"]).strftime("%Y-%m-%d %H:%M:%S.999999")
    history = "select count(*) from records where client_ref like 'demo:%' and measured_at <= ?"
    before = query(folder, history, anchor)[0][0]
    n_mail = len(messages(folder))
    again = run_demo(folder, "--no-serve")
    assert again.returncode == 0, again.stderr[-3000:]
    assert "0 alert email(s) sent" in again.stdout or len(messages(folder)) >= n_mail
    assert query(folder, history, anchor)[0][0] == before  # nothing stored twice (later hours may be new)
    assert json.loads((folder / "demo-state.json").read_text()) == state
    assert query(folder, "select count(*) from users")[0][0] == 4
    assert query(folder, "select count(*) from api_keys where revoked_at is null")[0][0] == 1
    assert (folder / "demo-state.json").stat().st_mode & 0o077 == 0  # passwords: owner only


def test_serve_posts_live_readings_through_the_api_and_stops_on_ctrl_c(demo_folder):
    folder, _ = demo_folder
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    env.update(PYTHONPATH=str(ROOT), PYTHONUNBUFFERED="1")
    log = open(folder.parent / "serve.log", "w+")  # noqa: SIM115 - read while the child runs
    p = subprocess.Popen([sys.executable, "-m", "server", "demo", "--data-dir", str(folder), "--days", DAYS,
                          "--port", str(port), "--interval", "0.5"], cwd=ROOT, env=env, stdout=log,
                         stderr=subprocess.STDOUT, text=True)
    try:
        base = f"http://127.0.0.1:{port}"
        out = ""
        deadline = time.monotonic() + 180
        while "Press Ctrl-C" not in out:
            assert p.poll() is None, out[-3000:]
            assert time.monotonic() < deadline, out[-3000:]
            time.sleep(0.3)
            out = Path(log.name).read_text()
        viewer = re.search(r"viewer\s+(\S+)\s+password (\S+)", out)
        assert f"{base}/" in out and viewer
        live_before = query(folder, "select count(*) from records where client_ref like 'live:%'")[0][0]
        with httpx.Client(base_url=base, timeout=10) as c:
            r = c.post("/api/v1/session", json={"username": viewer.group(1), "password": viewer.group(2)})
            assert r.status_code == 200, r.text
            assert 'id="simulated-label"' in c.get("/").text  # the UI says the data are simulated
            mail_page = c.get("/demo/mail")
            assert mail_page.status_code == 200 and "VP-102" in mail_page.text
            deadline = time.monotonic() + 60
            while query(folder, "select count(*) from records r join jobs j on j.record_id = r.id "
                                "where r.client_ref like 'live:%' and j.state = 'done'")[0][0] <= live_before:
                assert time.monotonic() < deadline, Path(log.name).read_text()[-3000:]
                time.sleep(0.5)
        p.send_signal(signal.SIGINT)
        assert p.wait(timeout=60) == 0
        assert "halfwatch demo stopped" in Path(log.name).read_text()
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
        log.close()
