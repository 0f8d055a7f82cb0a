"""The machine page read as a person sees it (real Chromium, real uvicorn, a real SQLite file).

This module seeds its own small plant (the package's seeded site has no speed change): the CW pump's
drive-end point is read once a day for 45 days; its drive's speed is raised from 24.0 to 25.4 Hz 34 days
ago (outside the old default of 30 days), and a half-order line grows over the last days until it alarms.
All of it is invented for the test (numpy tones, tests/support/signals.py).
"""

from __future__ import annotations

import datetime as dt
import re
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from sqlalchemy import select
from support.a11y import describe, violations
from support.fixtures import PASSWORD
from support.servers import served_plant
from support.signals import tone_record

pytestmark = pytest.mark.browser
TZ = "Europe/Berlin"
DAYS = 45
RAISE_DAYS_AGO = 34
SPEED_BEFORE, SPEED_AFTER = 24.0, 25.4  # Hz, invented
FS_HZ, N = 2560.0, 16384
CHARTS = ("chart-half", "chart-overall", "chart-onex", "chart-ratio", "chart-growth", "chart-precursor",
          "chart-speed")


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """Overrides the package's site for this module (the conftest's ``login`` then logs in here)."""
    from server.services.ingest import ingest_record

    def seed(db, plant, now):
        rng = np.random.default_rng(20261203)
        for day in range(DAYS):
            ago = DAYS - day
            speed = SPEED_BEFORE if ago > RAISE_DAYS_AGO else SPEED_AFTER
            late = max(0, 8 - ago)  # the line appears 8 days ago and grows 60 % a day
            half = 0.01 * 1.6 ** late if late else 0.0
            x = tone_record(rng, fs_hz=FS_HZ, n=N, forcing_hz=speed, amp_1x=0.3, amp_half=half)
            ingest_record(db, point_id=plant.point_ids["P1-DE-H"], samples=x, fs_hz=FS_HZ, units="m/s2",
                          measured_at=now - dt.timedelta(days=ago, hours=-3), speed_hz=speed,
                          speed_source="tachometer", origin="api", uploader="test:seed")

    with served_plant(tmp_path_factory.mktemp("machine"), seed, site_timezone=TZ) as served:
        yield served


def ready(page):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=20_000)


def open_pump(login, site, query="", locale_page=None):
    page = locale_page or login("engineer", viewport=(1440, 900))
    page.goto(f"{site.base}/assets/{site.plant.asset_ids['pump']}{query}")
    ready(page)
    return page


def records(site):
    from server.storage.tables import Record, Result

    with site.db.read() as s:
        return s.execute(select(Record.id, Record.measured_at, Record.speed_hz, Result.sub_detected,
                                Result.sub_velocity_rms_mm_s, Result.sub_class, Result.zone,
                                Result.growth_rate_per_s, Result.overall_velocity_rms_mm_s,
                                Result.measured_ts)
                         .join(Result, Result.record_id == Record.id)
                         .where(Record.point_id == site.plant.point_ids["P1-DE-H"], Result.current)
                         .order_by(Record.measured_at)).all()


def aware(t):
    return t if t.tzinfo else t.replace(tzinfo=dt.UTC)


def first_after_raise(site):
    # the speed step, found here from the stored speeds (first reading more than 2 % above the old speed)
    return next(aware(r.measured_at) for r in records(site) if r.speed_hz > SPEED_BEFORE * 1.02)


def test_default_period_shows_the_speed_change_and_every_chart_marks_it(login, site):
    page = open_pump(login, site)
    change = first_after_raise(site)
    age_days = (site.now - change).total_seconds() / 86400.0
    assert age_days > 30  # the old 30-day default would have hidden it
    days = int(page.locator("#period").input_value())
    assert days * 86400.0 > (site.now - change).total_seconds() and days in (90, 365)
    assert days == 90  # the shortest choice on the page that shows it
    note = page.locator("#period-note").inner_text()
    assert "speed change" in note and "24.00 → 25.40 Hz" in note
    wall = change.astimezone(ZoneInfo(TZ)).strftime("%Y-%m-%d %H:%M:%S")  # plotly draws wall-clock times
    for chart in CHARTS:
        xs = page.evaluate("""(id) => (document.getElementById(id).layout.shapes || [])
            .filter((s) => s.line && s.line.dash === 'dashdot').map((s) => s.x0)""", chart)
        assert xs == [wall], chart
    label = page.evaluate("""() => document.getElementById('chart-speed').layout.shapes
        .filter((s) => s.label && s.label.text && s.label.text.startsWith('speed '))
        .map((s) => s.label.text)""")
    assert label == [f"speed {SPEED_BEFORE:g} → {SPEED_AFTER:g} Hz"]
    # the x axis of the half-order chart spans the change
    rng = page.evaluate("() => document.getElementById('chart-half')._fullLayout.xaxis.range")
    assert rng[0] <= wall <= rng[1]


def test_bucketed_readings_still_draw_detected_markers(login, site):
    page = open_pump(login, site, "?days=90&max_points=10")
    d = page.evaluate("""() => { const tr = document.getElementById('chart-half').data
        .find((t) => t.name && t.name.startsWith('half-order velocity r.m.s. ('));
        return { mode: tr.mode, symbols: tr.marker.symbol, n: tr.y.length }; }""")
    assert "markers" in d["mode"]
    assert "time buckets" in page.locator("#bucket-note").inner_text()
    # the buckets and their detected flag, computed here from the results table with the bucket rule
    # (width = period / max_points, bucket = floor((t - start) / width)). The page's "now" is seconds
    # after ours and every reading sits 3 h inside its bucket, so the same readings fall in each bucket.
    end = site.now.timestamp()
    start, width = end - 90 * 86400.0, 90 * 86400.0 / 10
    buckets: dict[int, bool] = {}
    for r in records(site):
        if r.measured_ts >= start:
            k = int((r.measured_ts - start) // width)
            buckets[k] = buckets.get(k, False) or bool(r.sub_detected)
    expected = ["diamond" if buckets[k] else "circle-open" for k in sorted(buckets)]
    assert "diamond" in expected and "circle-open" in expected
    assert d["symbols"] == expected
    assert "◆ a half-order line" in page.locator("#bucket-note").inner_text()


def test_precursor_chart_says_why_it_is_empty_and_growth_chart_has_its_levels(login, site):
    from server.alarms.rules import default_rules

    page = open_pump(login, site, "?days=90")
    rows = [r for r in records(site) if r.measured_ts >= site.now.timestamp() - 90 * 86400.0]
    detected = sum(bool(r.sub_detected) for r in rows)
    assert detected >= 2
    note = page.locator("#precursor-note").inner_text()
    assert f"a half-order line is detected in {detected} readings" in note
    assert "parametric threshold" in note
    spec = next(r for r in default_rules(group=2, support="rigid") if r.metric == "growth_rate")
    ys = page.evaluate("""() => document.getElementById('chart-growth').layout.shapes
        .filter((s) => s.y0 === s.y1 && s.xref === 'paper').map((s) => [s.y0, s.label.text])""")
    assert sorted(ys) == sorted([[spec.alert, f"alert {spec.alert:g} 1/s"],
                                 [spec.danger, f"danger {spec.danger:g} 1/s"]])


def sig3(x):
    """Three significant digits in plain positional form (numpy's positional formatter as reference)."""
    if x is None:
        return "—"
    return np.format_float_positional(float(f"{x:.3g}"), trim="-")


def test_recent_readings_table_has_the_result_columns(login, site):
    page = open_pump(login, site, "?days=30")
    page.wait_for_function("() => document.querySelectorAll('#readings tbody tr[data-record-id]').length > 0")
    heads = page.locator("#readings thead th").all_inner_texts()
    assert heads[2:7] == ["Half-order velocity (mm/s r.m.s.)", "Class of the line",
                          "Overall velocity (mm/s r.m.s.)", "ISO 20816 zone", "Growth rate (1/s)"]
    rows = page.locator("#readings tbody tr").all()
    db_rows = list(reversed(records(site)))[:15]
    assert len(rows) == len(db_rows)
    for tr, r in zip(rows, db_rows, strict=True):
        cells = tr.locator("td").all_inner_texts()
        assert int(tr.get_attribute("data-record-id")) == r.id
        assert cells[2] == (sig3(r.sub_velocity_rms_mm_s) if r.sub_detected else "—")
        assert cells[3] == ((r.sub_class or "detected") if r.sub_detected else "none detected")
        assert cells[4] == sig3(r.overall_velocity_rms_mm_s)
        assert cells[5] == (f"zone {r.zone}" if r.zone else "—")
        assert cells[6] == sig3(r.growth_rate_per_s)
    assert any(r.sub_detected for r in db_rows) and any(not r.sub_detected for r in db_rows)
    assert page.locator("#band-note").is_hidden()  # 2560 Hz readings reach 1000 Hz: zones graded
    values = page.locator("#alarm-states tbody td:nth-child(4)").all_inner_texts()
    assert values and not any(re.search(r"\d[eE][-+]?\d", v) for v in values)  # plain numbers
    measures = ("mm/s r.m.s.", "1/s", "%", "dB/day", "days", ")")
    assert all(v.endswith(measures) for v in values), values


def test_dates_are_typed_and_shown_in_iso_form_whatever_the_locale(browser, site):
    ctx = browser.new_context(viewport={"width": 1440, "height": 900}, timezone_id="America/New_York",
                              locale="en-US")  # a locale whose date inputs would show mm/dd/yyyy
    try:
        page = ctx.new_page()
        page.goto(f"{site.base}/login")
        page.fill("#username", "viewer1")
        page.fill("#password", PASSWORD)
        page.click("button[type=submit]")
        page.wait_for_url(f"{site.base}/")
        open_pump(None, site, locale_page=page)
        page.select_option("#period", "custom")
        for sel in ("#start", "#end"):
            assert re.fullmatch(r"\d{4}-\d{2}-\d{2}", page.input_value(sel)), sel  # ISO 8601 calendar date
        assert page.locator("label[for=start]").inner_text() == "From (YYYY-MM-DD)"
        page.fill("#start", "11/01/2026")
        page.click("#apply")
        err = page.locator("#asset-error")
        err.wait_for(state="visible")
        assert "YYYY-MM-DD" in err.inner_text() and "start" in err.inner_text()
        page.fill("#start", "2026-11-01")
        with page.expect_request(re.compile(r"/series\?")) as req:
            page.click("#apply")
        start = re.search(r"start=([^&]+)", req.value.url).group(1)
        from urllib.parse import unquote

        # midnight of 1 November 2026 in the site's zone (Berlin, CET = UTC+1 then), as UTC
        assert unquote(start).startswith("2026-10-31T23:00:00")
        assert not violations(page), describe(violations(page))
    finally:
        ctx.close()
