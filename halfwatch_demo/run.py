"""``halfwatch demo``: set up the invented plant once, backfill its history, then run it live on 127.0.0.1.

Everything lives in one data folder (default ``./demo-data``): the SQLite database, ``demo-state.json``
(the anchor time, the generated demo passwords, the sensors' API key and the session secret; readable
by the owner only) and ``mail/`` with every alert email as an .eml file. A second run reuses all of it.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import os
import secrets
import threading
from dataclasses import asdict, dataclass, field
from pathlib import Path

from sqlalchemy import select

from halfwatch_demo import plant as demo_plant

log = logging.getLogger("halfwatch.demo")

STATE_FILE = "demo-state.json"
ROLES = ("viewer", "technician", "engineer", "admin")
DEMO_USERS = {"viewer": "vera", "technician": "tomas", "engineer": "erin", "admin": "ada"}
SUBSCRIBERS = (  # invented addresses on a reserved example domain
    {"email": "planner@sallowmere.example", "scope": "site", "min_level": "alert", "mode": "immediate"},
    {"email": "intake.engineer@sallowmere.example", "scope": "area", "area": "Raw water intake",
     "min_level": "danger", "mode": "immediate"},
    {"email": "reliability.lead@sallowmere.example", "scope": "site", "min_level": "alert", "mode": "digest"},
)
GAP_FILL_DAYS = 3.0  # on a later run, online points are filled in for at most this many missed days


@dataclass
class DemoState:
    anchor: str
    secret_key: str
    passwords: dict = field(default_factory=dict)
    api_key: str = ""

    @property
    def anchor_time(self) -> dt.datetime:
        return dt.datetime.fromisoformat(self.anchor)


def load_state(folder: Path) -> DemoState:
    path = folder / STATE_FILE
    if path.exists():
        return DemoState(**json.loads(path.read_text()))
    now = dt.datetime.now(dt.UTC).replace(minute=0, second=0, microsecond=0)
    state = DemoState(anchor=now.isoformat(), secret_key=secrets.token_urlsafe(32),
                      passwords={r: _demo_password(DEMO_USERS[r]) for r in ROLES})
    save_state(folder, state)
    return state


def save_state(folder: Path, state: DemoState) -> None:
    path = folder / STATE_FILE
    tmp = path.with_suffix(".tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w") as fh:
        json.dump(asdict(state), fh, indent=2)
    os.replace(tmp, path)


def demo_settings(folder: Path, state: DemoState, *, port: int, smtp_port: int):
    from server.settings import Settings

    return Settings(data_dir=folder, database_url=f"sqlite:///{(folder / 'halfwatch.db').as_posix()}",
                    secret_key=state.secret_key, simulated_data=True, embedded_worker=True,
                    host="127.0.0.1", port=port, public_base_url=f"http://127.0.0.1:{port}",
                    smtp_host="127.0.0.1", smtp_port=smtp_port, smtp_security="none",
                    smtp_from="halfwatch-demo@sallowmere.example", mail_poll_s=2.0, worker_poll_s=0.2)


def _demo_password(username: str) -> str:
    """A random password that the password rule accepts (it may not contain the user name)."""
    from server.services.users import password_problem

    while password_problem(pw := secrets.token_urlsafe(9), username) is not None:
        pass
    return pw


def ensure_people(db, settings, state: DemoState, folder: Path) -> None:
    """One login per role, the sensors' API key and the planners' subscriptions (each only once)."""
    from server.alarms.service import create_subscription, list_subscriptions
    from server.services import users
    from server.storage.tables import ApiKey, User

    with db.read() as s:
        names = set(s.scalars(select(User.username)))
    for role, name in DEMO_USERS.items():
        if name not in names:
            users.add_user(db, settings, username=name, password=state.passwords[role], role=role,
                           email=f"{name}@sallowmere.example")
    key_ok = False
    if state.api_key:
        from server.security import token_hash

        with db.read() as s:
            row = s.scalar(select(ApiKey).where(ApiKey.key_hash == token_hash(state.api_key)))
            key_ok = row is not None and row.revoked_at is None
    if not key_ok:
            with db.read() as s:
                key_ok = any(state.api_key.startswith(k.prefix) and k.revoked_at is None
                             for k in s.scalars(select(ApiKey)))
    if not key_ok:
        state.api_key, _ = users.create_api_key(db, name="demo live sensors", role="technician",
                                                site=demo_plant.SITE_NAME, created_by="demo")
        save_state(folder, state)
    ids = demo_plant.site_ids(db)
    have = {(s["email"], s["mode"]) for s in list_subscriptions(db)}
    for sub in SUBSCRIBERS:
        if (sub["email"], sub["mode"]) in have:
            continue
        body = {"email": sub["email"], "scope": sub["scope"], "min_level": sub["min_level"],
                "mode": sub["mode"],
                "scope_id": ids[sub.get("area", "site")] if sub["scope"] == "area" else ids["site"],
                "timezone": "UTC", "digest_time": "07:00"}
        create_subscription(db, body, actor="demo")


def prepare(folder: Path, *, days: float, port: int, smtp_port: int, jobs: int | None, say=print):
    """Migrate, create the plant and people, backfill; returns (settings, state, db, point ids, report)."""
    from halfwatch_demo.backfill import run_backfill
    from server.migrations import upgrade
    from server.storage import Database

    folder.mkdir(parents=True, exist_ok=True)
    state = load_state(folder)
    settings = demo_settings(folder, state, port=port, smtp_port=smtp_port)
    upgrade(settings.database_url)
    db = Database.from_settings(settings)
    point_ids = demo_plant.ensure_plant(db)
    ensure_people(db, settings, state, folder)
    now = dt.datetime.now(dt.UTC)
    anchor = state.anchor_time
    gap_from = max(anchor, now - dt.timedelta(days=GAP_FILL_DAYS))
    report = run_backfill(db, settings, point_ids, anchor=anchor, days=days, gap=(gap_from, now), jobs=jobs,
                          say=say)
    return settings, state, db, point_ids, report


def send_mail_now(db, settings) -> int:
    from server.alarms import run_mailer_once

    return run_mailer_once(db, settings)


def banner(settings, state: DemoState, mail_dir: Path) -> str:
    from halfwatch_demo.mailsink import shown

    base = settings.public_base_url
    logins = "\n".join(f"    {role:<11} {DEMO_USERS[role]:<6} password {state.passwords[role]}"
                       for role in ROLES)
    return (
        f"\nhalfwatch demo: {demo_plant.SITE_NAME} (an invented plant; every reading is simulated)\n"
        f"  dashboard      {base}/\n"
        f"  outgoing mail  {base}/demo/mail   (.eml files in {shown(mail_dir)})\n"
        f"  API docs       {base}/docs\n"
        f"  logins (one per role):\n{logins}\n"
        f"  live sensors post a reading every few seconds with an API key (kept in {STATE_FILE}).\n"
        "  Condition monitoring only: not a protection or trip system. Press Ctrl-C to stop.\n"
    )


def serve(settings, state: DemoState, db, point_ids: dict[str, int], mail_dir: Path, *,
          interval_s: float, say=print) -> None:
    """Run the API with its worker (which also sends the alert emails) and the live sensors until Ctrl-C."""
    import uvicorn

    from halfwatch_demo.live import LiveSensors
    from halfwatch_demo.mailpage import mail_router
    from server.app import create_app

    app = create_app(settings)
    app.include_router(mail_router(mail_dir))
    server = uvicorn.Server(uvicorn.Config(app, host=settings.host, port=settings.port, log_level="warning"))
    stop = threading.Event()
    sensors = LiveSensors(settings.public_base_url, state.api_key, point_ids, state.anchor_time,
                          interval_s=interval_s, stop=stop)

    def announce():
        while not server.started and not stop.is_set():
            stop.wait(0.1)
        if server.started:
            say(banner(settings, state, mail_dir))
            sensors.start()

    threading.Thread(target=announce, name="halfwatch-demo-announce", daemon=True).start()
    try:
        server.run()  # handles Ctrl-C (SIGINT) and SIGTERM: finishes requests, then shuts down
    except KeyboardInterrupt:  # uvicorn re-raises the captured Ctrl-C after its clean shutdown
        pass
    finally:
        stop.set()
        if sensors.is_alive():
            sensors.join(timeout=20)
        from halfwatch_demo.mailsink import shown

        say(f"halfwatch demo stopped ({sensors.sent} live readings sent this run); the data stay in "
            f"{shown(settings.data_dir)}")
