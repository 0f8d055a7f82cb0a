"""Routes and settings pages read as a person sees them (real Chromium, real uvicorn, a real SQLite file).

This module seeds its own small plant (tests/support/plant.py; invented names and signals): the CW pump's
drive-end point is read four times in the last day with a strong 1X (overall velocity in ISO zone D, so its
overall rule goes to danger); its non-drive-end point was last read 10 days ago on a weekly route; the
compressor, whose forcing is two strokes per revolution, has never been read.
"""

from __future__ import annotations

import datetime as dt
import math
import re

import numpy as np
import pytest
from sqlalchemy import select
from support.a11y import describe, violations
from support.servers import served_plant
from support.signals import tone_record

pytestmark = pytest.mark.browser
FS_HZ, N = 2560.0, 16384
LEVEL_RANK = {"normal": 0, "alert": 1, "danger": 2}  # common practice: normal < alert < danger


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """Overrides the package's site for this module (the conftest's ``login`` then logs in here)."""
    from server.services.ingest import ingest_record

    def seed(db, plant, now):
        rng = np.random.default_rng(5)

        def store(name, x, t):
            ingest_record(db, point_id=plant.point_ids[name], samples=x, fs_hz=FS_HZ, units="m/s2",
                          measured_at=t, speed_hz=24.75, speed_source="tachometer", origin="api",
                          uploader="test:seed")

        for i in range(4):  # 2 m/s2 peak at 24.75 Hz: 9.1 mm/s r.m.s., above C/D (4.5) for group 2 rigid
            store("P1-DE-H", tone_record(rng, fs_hz=FS_HZ, n=N, amp_1x=2.0),
                  now - dt.timedelta(hours=20 - 6 * i))
        store("P1-NDE-V", tone_record(rng, fs_hz=FS_HZ, n=N, amp_1x=0.1), now - dt.timedelta(days=10))

    with served_plant(tmp_path_factory.mktemp("routes"), seed, site_timezone="UTC") as served:
        yield served


def ready(page):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=20_000)


def machine_level(site, asset_id) -> str:
    from server.alarms.tables import AlarmState

    with site.db.read() as s:
        levels = s.scalars(select(AlarmState.level).where(AlarmState.asset_id == asset_id)).all()
    return max(levels, key=LEVEL_RANK.__getitem__, default="normal")


def test_routes_show_condition_and_days_overdue(login, site):
    from server.storage.tables import Record, Result, RouteStop

    page = login("technician", viewport=(1280, 900))
    page.goto(f"{site.base}/routes")
    ready(page)
    plant = site.plant
    de, nde, cyl = (plant.point_ids[k] for k in ("P1-DE-H", "P1-NDE-V", "C2-CYL-A"))
    assert machine_level(site, plant.asset_ids["pump"]) == "danger"
    stop = page.locator(f".stop[data-point-id='{de}']")
    state = " ".join(stop.locator(".stop-state").inner_text().split()).lower()  # badges are upper case
    with site.db.read() as s:
        zone = s.scalar(select(Result.zone).where(Result.point_id == de, Result.current)
                        .order_by(Result.measured_ts.desc()).limit(1))
        last = s.scalar(select(Record.measured_at).where(Record.point_id == nde))
        interval_h = s.scalar(select(RouteStop.due_interval_h).where(RouteStop.point_id == nde))
    assert zone == "D"
    assert "machine danger" in state and "last reading zone d" in state
    assert stop.locator(".condition").get_attribute("data-level") == "danger"
    assert "on schedule" in state and "up to date" not in page.locator("main").inner_text()
    last = last if last.tzinfo else last.replace(tzinfo=dt.UTC)
    days_late = math.floor((site.now - (last + dt.timedelta(hours=interval_h))).total_seconds() / 86400)
    assert days_late == 3
    late = page.locator(f".stop[data-point-id='{nde}'] .stop-state").inner_text()
    assert f"overdue by {days_late} days" in late
    assert "no reading yet: due now" in page.locator(f".stop[data-point-id='{cyl}'] .stop-state").inner_text()
    # what speed means where the forcing is not the shaft speed (two strokes per revolution)
    help_text = page.locator(f"#up-{cyl}-speed-help").inner_text()
    assert "speed = shaft speed" in help_text and "2 × shaft speed" in help_text
    assert page.locator(f"label[for=up-{cyl}-speed]").inner_text() == "Shaft speed (Hz)"
    assert not violations(page), describe(violations(page))


def test_an_uploaded_zone_d_reading_is_not_shown_in_a_green_box(login, site, tmp_path):
    import soundfile as sf

    page = login("technician", viewport=(1024, 768))
    page.goto(f"{site.base}/routes")
    ready(page)
    pid = site.plant.point_ids["P1-DE-H"]
    rng = np.random.default_rng(9)
    path = tmp_path / "de.wav"
    sf.write(str(path), tone_record(rng, fs_hz=FS_HZ, n=2 * N, amp_1x=2.0), int(FS_HZ), subtype="FLOAT")
    form = page.locator(f"form.stop-upload[data-point-id='{pid}']")
    form.locator("input[type=file]").set_input_files(str(path))
    form.locator("input[name=speed]").fill("24.75")
    when = form.locator("input[name=measured]")
    assert re.fullmatch(r"\d{4}-\d{2}-\d{2} \d{2}:\d{2}", when.input_value())  # ISO 8601, 24-hour
    when.fill("11/30/2026 2:15 PM")  # a locale form: refused with the field named
    form.locator("button[type=submit]").click()
    assert "YYYY-MM-DD HH:MM" in form.locator("xpath=..").locator(".stop-result").inner_text()
    when.fill("2026-11-30 14:15")
    form.locator("button[type=submit]").click()
    box = page.locator(f".stop[data-point-id='{pid}'] .result-ready")
    box.wait_for(timeout=90_000)
    assert "zone D" in box.inner_text()
    assert box.get_attribute("data-condition") == "danger"
    from server.storage.tables import Record

    with site.db.read() as s:
        at = s.get(Record, int(box.get_attribute("data-record-id"))).measured_at
    assert at.replace(tzinfo=None) == dt.datetime(2026, 11, 30, 14, 15)  # site zone UTC
    bg = box.evaluate("(e) => getComputedStyle(e).backgroundColor")
    r, g, b = (int(v) for v in bg[bg.index("(") + 1:bg.index(")")].split(",")[:3])
    assert r > g  # a red-tinted box, not a green one


def test_settings_use_names_units_and_words(login, site):
    from server.alarms.service import create_subscription

    plant = site.plant
    create_subscription(site.db, {"email": "planner@example.test", "scope": "area", "scope_id": plant.area_id,
                                  "min_level": "alert", "mode": "immediate", "digest_time": "07:00",
                                  "timezone": "UTC", "include_data_quality": False}, actor="test")
    page = login("engineer", viewport=(1440, 900))
    page.goto(f"{site.base}/settings")
    ready(page)
    row = page.locator(f"#plant-list tr[data-asset-id='{plant.asset_ids['recip']}']").inner_text()
    assert "reciprocating compressor" in row and "reciprocating_compressor" not in row
    assert "the forcing (1X, piston strokes) is 2 × shaft speed" in row and "12.5 Hz (750 r/min)" in row
    subs = page.locator("#subs-table").inner_text()
    assert "area Cooling water (Riverside works)" in subs and "area: area" not in subs
    page.select_option("#rule-point", str(plant.point_ids["C2-CYL-A"]))
    page.wait_for_selector(f"#rules-table tbody[data-point-id='{plant.point_ids['C2-CYL-A']}']")
    rule = page.locator("#rules-table tr[data-metric='half_order_velocity']")
    assert rule.locator("td").nth(1).inner_text().strip() == "mm/s r.m.s."  # the unit beside the input
    zone_rule = page.locator("#rules-table tr[data-metric='overall_velocity']").inner_text()
    # ISO 20816-3 Annex A, group 2 on flexible support: B/C 4.5, C/D 7.1 mm/s r.m.s. (values from memory)
    assert "alert from the B/C boundary 4.5 mm/s r.m.s." in zone_rule
    assert "danger from the C/D boundary 7.1 mm/s r.m.s." in zone_rule
    margin = page.locator("#rules-table tr[data-metric='threshold_margin']").inner_text()
    assert "as a fraction (0.2 = 20 %)" in margin  # the margin's level is a fraction, shown as a percentage
    assert not violations(page), describe(violations(page))


def test_engineer_changes_a_machine_with_the_audit_trail(login, site):
    from server.storage.tables import Asset

    aid = site.plant.asset_ids["recip"]
    page = login("engineer", viewport=(1440, 900))
    page.goto(f"{site.base}/settings")
    ready(page)
    page.locator(f"details[data-asset-id='{aid}'] > summary").click()
    page.fill(f"#edit-{aid}-name", "Air compressor 2\u202e")  # a bidi override: refused by the server
    page.click(f"#edit-{aid}-form button[type=submit]")
    err = page.locator("#settings-error")
    err.wait_for(state="visible")
    assert "name" in err.inner_text()
    with site.db.read() as s:
        assert s.get(Asset, aid).name == "Air compressor 2"
    page.fill(f"#edit-{aid}-name", "Air compressor 2")
    page.fill(f"#edit-{aid}-nominal_speed_hz", "13.25")
    page.select_option(f"#edit-{aid}-foundation", "rigid")
    page.fill(f"#edit-{aid}-forcing_multiplier", "1")
    page.click(f"#edit-{aid}-form button[type=submit]")
    page.wait_for_selector("#settings-done:has-text('saved')")
    with site.db.read() as s:
        a = s.get(Asset, aid)
        assert (a.nominal_speed_hz, a.foundation, a.forcing_multiplier) == (13.25, "rigid", 1.0)
    trail = page.locator(f"#edit-{aid}-audit")
    trail.locator("td").first.wait_for()
    text = trail.inner_text()
    assert "nominal speed hz: 12.5 → 13.25" in text and "foundation: flexible → rigid" in text
    assert "engineer1" in text


def test_a_viewer_subscribes_themselves(login, site):
    from server.alarms.tables import AlarmSubscription

    page = login("viewer", viewport=(1280, 900))
    assert page.locator("header nav a", has_text="Settings").count() == 1
    page.goto(f"{site.base}/settings")
    ready(page)
    assert page.locator("#sec-subs h2").inner_text() == "My email alerts"
    assert page.locator("#sec-plant, #sec-rules, #sec-users").count() == 0
    assert page.locator("#sub-email").count() == 0  # a viewer's alerts go to their own address
    page.select_option("#sub-scope", f"asset:{site.plant.asset_ids['pump']}")
    page.click("#sub-form button[type=submit]")
    page.wait_for_selector("#settings-done:has-text('Subscribed you')")
    with site.db.read() as s:
        mine = s.scalars(select(AlarmSubscription)
                         .where(AlarmSubscription.email == "viewer1@example.test")).all()
    assert [(m.scope, m.scope_id) for m in mine] == [("asset", site.plant.asset_ids["pump"])]
    assert "machine CW pump 1" in page.locator("#subs-table").inner_text()
    assert page.evaluate("fetch('/api/v1/users').then(r => r.status)") == 403
    assert not violations(page), describe(violations(page))
