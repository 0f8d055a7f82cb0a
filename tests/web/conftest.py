"""Browser tests: a real uvicorn on 127.0.0.1 serving a seeded database, driven by headless Chromium.

Chromium is the system's (``/usr/bin/chromium``; Playwright never downloads a browser). Without it the
tests skip with a message, except under ``CI=true``, where a missing browser is a failure. Launch flags
include the host-resolver rule that keeps Chromium from looking up any name off this machine, and the
tests only ever navigate to 127.0.0.1.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
from support.fixtures import PASSWORD, ROLES, settings_for
from support.plant import Plant, make_plant
from support.servers import serve_in_thread
from support.signals import tone_record

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--no-first-run", "--disable-quic",
    "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1, EXCLUDE localhost",
]
# --- the seeded plant: the shared test plant plus readings analysed by the real worker. The drive-end
# point of the pump gets a half-order line growing from reading to reading (detected, alarmed, trended);
# the other points stay healthy. Signals are made with numpy (support.signals), invented for the test.
FS_HZ = 2560.0
N = 16384
PUMP_HZ = 24.75
WINDOW_READINGS = 30
FAN_HZ = 16.5
PRECURSOR_RATIOS = (0.4, 0.6, 0.8)


@dataclass
class Seeded:
    plant: Plant
    record_ids: dict[str, list[int]] = field(default_factory=dict)

    @property
    def growing_point(self) -> int:
        return self.plant.point_ids["P1-DE-H"]

    @property
    def last_growing_record(self) -> int:
        return self.record_ids["P1-DE-H"][-1]

    @property
    def precursor_point(self) -> int:
        return self.plant.other_point_id


def seed(db, settings, *, days: int = 12, now: dt.datetime | None = None) -> Seeded:
    from analysis.sim.simulate import simulate
    from server.services.ingest import ingest_record
    from server.worker import run_once

    plant = make_plant(db)
    now = now or dt.datetime.now(dt.UTC)
    rng = np.random.default_rng(20261201)
    out = Seeded(plant)
    def store(name, x, fs, units, t, speed):
        o = ingest_record(db, point_id=plant.point_ids[name], samples=x, fs_hz=fs, units=units, measured_at=t,
                          speed_hz=speed, speed_source="tachometer", origin="api", uploader="test:seed")
        out.record_ids.setdefault(name, []).append(o.record_id)

    for day in range(days):
        t = now - dt.timedelta(days=days - day, hours=-2)
        half = 0.008 * 1.3 ** day  # m/s2; grows 30 % a day (invented for the test)
        store("P1-DE-H", tone_record(rng, fs_hz=FS_HZ, n=2 * N, forcing_hz=PUMP_HZ, amp_1x=0.3,
                                     amp_half=half, growth_per_s=0.03), FS_HZ, "m/s2", t, PUMP_HZ)
        x = tone_record(rng, fs_hz=FS_HZ, n=N, forcing_hz=PUMP_HZ, amp_1x=0.25) / 9.80665  # in g
        store("P1-NDE-V", x, FS_HZ, "g", t, PUMP_HZ)
    # The compressor runs at varied speeds and 1X levels; a half-order line appears inside an invented
    # instability tongue (f0 12.5 Hz, zeta 0.03, k 0.24 per m/s2), so the operating window has both labels.
    for i in range(WINDOW_READINGS):
        t = now - dt.timedelta(hours=(WINDOW_READINGS - i) * 9.5)
        speed = 11.0 + 3.0 * ((i * 7) % WINDOW_READINGS) / (WINDOW_READINGS - 1)
        forcing = 2.0 * speed
        a1 = 0.4 + 0.8 * ((i * 11) % 13) / 12
        inside = a1 > 2.0 * np.sqrt(((forcing - 25.0) / 12.5) ** 2 + 4 * 0.03**2) / 0.24
        x = tone_record(rng, fs_hz=FS_HZ * 2, n=N, forcing_hz=forcing, amp_1x=a1,
                        amp_half=0.15 if inside else 0.0)
        store("C2-CYL-A", x, FS_HZ * 2, "m/s2", t, speed)
    # The ID fan's point: three below-threshold readings from the parametric simulator (analysis.simulate,
    # invented data) at h/h_c 0.4, 0.6, 0.8, so the 0.5X precursor bump narrows from reading to reading.
    for i, ratio in enumerate(PRECURSOR_RATIOS):
        rec = simulate("parametric", seed=7, fs_hz=320.0, duration_s=300.0, forcing_hz=FAN_HZ, ratio=ratio,
                       amp_1x_g=0.01, amp_2x_g=0.004, amp_3x_g=0.002)  # a smooth fan: ISO zone A or B
        x = (rec.samples * 9.80665).astype(np.float32)  # g -> m/s2 (standard gravity)
        o = ingest_record(db, point_id=plant.other_point_id, samples=x, fs_hz=rec.fs_hz, units="m/s2",
                          measured_at=now - dt.timedelta(days=3 - i, hours=5),
                          speed_hz=FAN_HZ, speed_source="tachometer", origin="api", uploader="test:seed")
        out.record_ids.setdefault("F-DE-H", []).append(o.record_id)
    while run_once(db, settings):
        pass
    return out


ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts" / "screenshots"


def chromium_path() -> str | None:
    if Path(CHROMIUM).exists():
        return CHROMIUM
    return shutil.which("chromium")


@pytest.fixture(scope="session")
def browser():
    path = chromium_path()
    if path is None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"CI=true but no Chromium at {CHROMIUM}: install the system package 'chromium'")
        pytest.skip(f"no Chromium found at {CHROMIUM}; install the 'chromium' package to run browser tests")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=path, headless=True, args=CHROMIUM_ARGS, timeout=30_000)
        yield b
        b.close()


@pytest.fixture(scope="package")
def site(tmp_path_factory):
    """A migrated database with the seeded plant and users, served by uvicorn with the worker inside."""
    from server.app import create_app
    from server.migrations import upgrade
    from server.services.users import add_user
    from server.storage import Database

    tmp = tmp_path_factory.mktemp("web")
    settings = settings_for(tmp, embedded_worker=True, site_timezone="Europe/Berlin", simulated_data=True,
                            site_timezones={"Hilltop annex": "America/Chicago"})
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    seeded = seed(db, settings)
    db.dispose()
    app = create_app(settings)
    for role in ROLES:
        add_user(app.state.db, settings, username=f"{role}1", password=PASSWORD, role=role,
                 email=f"{role}1@example.test", hashing=app.state.passwords)
    with serve_in_thread(app) as base:
        yield Site(base, app, seeded, settings)


class Site:
    def __init__(self, base, app, seeded, settings):
        self.base, self.app, self.seeded, self.settings = base, app, seeded, settings

    @property
    def db(self):
        return self.app.state.db


@pytest.fixture
def login(browser, site):
    """login(role) -> a Playwright page logged in as that role (through the login form)."""
    contexts = []

    def _login(role: str, *, viewport=(1280, 900)):
        ctx = browser.new_context(viewport={"width": viewport[0], "height": viewport[1]},
                                  timezone_id="UTC", locale="en-GB")
        contexts.append(ctx)
        page = ctx.new_page()
        errors = []
        page.on("pageerror", lambda e: errors.append(str(e)))
        page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
        page.js_errors = errors
        page.goto(f"{site.base}/login")
        page.fill("#username", f"{role}1")
        page.fill("#password", PASSWORD)
        page.click("button[type=submit]")
        page.wait_for_url(f"{site.base}/")
        return page

    yield _login
    for ctx in contexts:
        ctx.close()


@pytest.fixture(scope="session")
def screenshot():
    """screenshot(page, name): full-page and first-screen PNGs in test-artifacts/screenshots/."""
    return _shot


def _shot(page, name: str) -> Path:
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    path = ARTIFACTS / f"{name}.png"
    page.screenshot(path=str(path), full_page=True)
    page.screenshot(path=str(ARTIFACTS / f"{name}-top.png"))  # the first screen, for the README
    return path
