"""The dashboard in real headless Chromium against a real uvicorn on 127.0.0.1 with a seeded database.

Readings were analysed by the real worker (``run_once``); alarm levels come from the real alarm rules.
Charts are checked through plotly's own data on the chart div (``document.getElementById(id).data``).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from sqlalchemy import select

pytestmark = pytest.mark.browser


def ready(page, timeout=15_000):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=timeout)


def no_js_errors(page):
    assert [e for e in page.js_errors if "autocomplete" not in e] == []


@pytest.mark.parametrize("role", ["viewer", "technician", "engineer", "admin"])
def test_each_role_logs_in_and_is_offered_only_its_pages(login, role):
    page = login(role)
    ready(page)
    menu = page.locator("header nav a").all_inner_texts()
    assert menu[:3] == ["Plant", "Alarms", "Routes"]
    assert "Settings" in menu  # engineers configure there; viewers and technicians keep their email alerts
    assert page.locator(".role-tag").inner_text() == role
    assert page.locator("#caution").is_visible()
    assert "not a machine protection or trip system" in page.locator("#caution").inner_text()
    assert page.locator("#simulated-label").is_visible()
    no_js_errors(page)


def test_overview_lists_assets_with_their_worst_level(login, site, screenshot):
    from server.alarms.tables import AlarmState

    page = login("engineer")
    ready(page)
    plant = site.seeded.plant
    with site.db.read() as s:
        levels = {a: [st.level for st in s.scalars(select(AlarmState).where(AlarmState.asset_id == aid))]
                  for a, aid in plant.asset_ids.items()}
    rank = {"normal": 0, "alert": 1, "danger": 2}
    for name, aid in plant.asset_ids.items():
        card = page.locator(f"article.machine[data-asset-id='{aid}']")
        expected = max(levels[name], key=rank.get, default="normal")
        assert card.get_attribute("data-level") == expected
        # the level is written out and carries a drawn icon (inline SVG), not only a colour
        badge = card.locator(".level").inner_text().lower()
        assert expected in badge and card.locator(f".level svg[data-icon='{expected}']").count() == 1
    assert levels["pump"] and max(levels["pump"], key=rank.get) != "normal"  # the growing half-order
    spark = page.evaluate(f"document.getElementById('spark-{plant.asset_ids['pump']}').data[0].y")
    assert sum(v is not None for v in spark) >= 10
    # each site's times in its own zone (HALFWATCH_SITE_TIMEZONES), named beside the site
    zones = page.locator("section.site h2").all_inner_texts()
    assert any("Hilltop annex" in z and "America/Chicago" in z for z in zones)
    assert any("Riverside works" in z and "Europe/Berlin" in z for z in zones)
    screenshot(page, "overview")
    page.fill("#f-search", "compressor")
    assert page.locator("article.machine").count() == 1
    page.fill("#f-search", "")
    page.select_option("#f-level", "alert")
    alarmed = {str(aid) for a, aid in plant.asset_ids.items() if any(x != "normal" for x in levels[a])}
    shown = {e.get_attribute("data-asset-id") for e in page.locator("article.machine").all()}
    assert shown == alarmed and str(plant.asset_ids["pump"]) in shown
    no_js_errors(page)


def test_asset_page_draws_every_chart_with_data(login, site, screenshot):
    from server.storage.tables import Result

    plant = site.seeded.plant
    page = login("engineer")
    page.goto(f"{site.base}/assets/{plant.asset_ids['pump']}?point={site.seeded.growing_point}")
    ready(page)
    for chart in ("chart-half", "chart-overall", "chart-onex", "chart-ratio", "chart-growth", "chart-speed"):
        traces = page.evaluate(f"document.getElementById('{chart}').data")
        assert traces, chart
        assert max(len([v for v in t.get("y", []) if v is not None]) for t in traces) >= 10, chart
        titles = page.evaluate(f"[document.getElementById('{chart}').layout.xaxis.title.text, "
                               f"document.getElementById('{chart}').layout.yaxis.title.text]")
        assert "(" in titles[0] and "(" in titles[1], (chart, titles)  # every axis names its unit
    half = page.evaluate("document.getElementById('chart-half').data")
    line = next(t for t in half if t["name"] == "half-order velocity r.m.s. (mm/s r.m.s.)")
    with site.db.read() as s:
        stored = [v for (v,) in s.execute(select(Result.sub_velocity_rms_mm_s).where(
            Result.point_id == site.seeded.growing_point, Result.current.is_(True))
            .order_by(Result.measured_ts))]
    assert line["y"] == pytest.approx(stored)
    names = [t.get("name", "") for t in half]
    assert any(n.startswith("trend fit") for n in names)
    # times are shown in the site's zone (Europe/Berlin is UTC+1 in December): wall clock = UTC + 1 h
    pid = site.seeded.growing_point
    first_utc = page.evaluate(f"fetch('/api/v1/points/{pid}/records?limit=1000').then(r => r.json())"
                              )["records"][-1]["measured_at"]
    shown = dt.datetime.fromisoformat(line["x"][0])
    assert shown - dt.datetime.fromisoformat(first_utc[:19]) == dt.timedelta(hours=1)
    # ISO 20816 zones shaded on the overall chart: group 2, rigid support, A/B 1.4, B/C 2.8, C/D 4.5 mm/s
    # r.m.s. (ISO 20816-3 Annex A table, values from memory, as in server/alarms/rules.py)
    shapes = page.evaluate("document.getElementById('chart-overall').layout.shapes")
    edges = sorted({round(s["y0"], 3) for s in shapes} | {round(s["y1"], 3) for s in shapes})
    assert edges[:4] == [0, 1.4, 2.8, 4.5]
    annotations = page.evaluate("document.getElementById('chart-overall').layout.annotations"
                                ".map(a => a.text)")
    assert annotations == ["zone A", "zone B", "zone C", "zone D"]
    # readings with a half-order line carry no 0.5X precursor: its chart says so instead of staying blank
    none = page.evaluate("document.getElementById('chart-precursor').layout.annotations.map(a => a.text)")
    assert none == ["no precursor: a half-order line is detected (see the note)"]
    assert "Above the parametric threshold" in page.locator("#precursor-note").inner_text()
    screenshot(page, "asset")
    no_js_errors(page)


def test_record_page_marks_half_order_at_half_the_forcing_frequency(login, site, screenshot):
    page = login("viewer")
    rid = site.seeded.last_growing_record
    page.goto(f"{site.base}/records/{rid}")
    ready(page)
    traces = page.evaluate("document.getElementById('chart-spectrum').data")
    markers = next(t for t in traces if t["name"] == "order markers")
    at = dict(zip(markers["text"], markers["x"], strict=True))
    # common practice: order k sits at k times the forcing frequency; this record's forcing is the
    # tachometer speed given with it (24.75 Hz, shaft forcing)
    assert at["0.5X"] == pytest.approx(0.5 * 24.75)
    assert at["1X"] == pytest.approx(24.75) and at["1.5X"] == pytest.approx(1.5 * 24.75)
    assert at["2X"] == pytest.approx(2 * 24.75)
    found = next(t for t in traces if t["name"].endswith("line found"))
    assert found["x"][0] == pytest.approx(0.5 * 24.75, abs=0.5)  # the detected line is at 0.5X
    # cursor read-out in Hz and orders: move the mouse onto the 0.5X line
    page.locator("#chart-spectrum").scroll_into_view_if_needed()
    # the page may still re-lay out while later charts arrive, so aim again if the first hover misses
    for _attempt in range(5):
        x, y = page.evaluate("""() => { const gd = document.getElementById('chart-spectrum');
            const xa = gd._fullLayout.xaxis, ya = gd._fullLayout.yaxis, r = gd.getBoundingClientRect();
            return [r.left + xa._offset + xa.l2p(12.375),
                    r.top + ya._offset + ya.l2p(ya.range[1] * 0.3)]; }""")
        page.mouse.move(x - 30, y)
        page.mouse.move(x, y, steps=4)
        page.wait_for_function(
            "() => document.getElementById('readout').textContent.includes('X')", timeout=5000)
        readout = page.locator("#readout").inner_text()
        hz = float(readout.split("Hz")[0])
        order = float(readout.split("=")[1].split("X")[0])
        if abs(order - 0.5) <= 0.06:
            break
        page.mouse.move(0, 0)
        page.wait_for_timeout(300)
    assert order == pytest.approx(hz / 24.75, abs=1e-3)  # the read-out's orders are Hz / forcing
    assert order == pytest.approx(0.5, abs=0.06)  # near the cursor (the chart spectrum is decimated)
    page.click("#zoom-half")
    rng = page.evaluate("document.getElementById('chart-spectrum').layout.xaxis.range")
    assert rng == pytest.approx([0.28 * 24.75, 0.72 * 24.75])
    wave = page.evaluate("document.getElementById('chart-waveform').data.map(t => [t.name, t.y.length])")
    assert any(n == "subharmonic envelope (m/s2 peak)" and k > 10 for n, k in wave)
    assert any(n.startswith("fitted growth") for n, _ in wave)
    fall = page.evaluate("document.getElementById('chart-waterfall').data[0].z.length")
    assert fall == len(site.seeded.record_ids["P1-DE-H"])
    screenshot(page, "record")
    no_js_errors(page)


def test_operating_window_plots_the_readings_and_today(login, site, screenshot):
    from server.storage.tables import Result

    pid = site.seeded.plant.point_ids["C2-CYL-A"]
    page = login("viewer")
    page.goto(f"{site.base}/points/{pid}/window")
    ready(page)
    traces = page.evaluate("document.getElementById('chart-window').data")
    by = {t["name"]: t for t in traces}
    with site.db.read() as s:
        rows = s.execute(select(Result.forcing_hz, Result.sub_detected, Result.sub_class).where(
            Result.point_id == pid, Result.current.is_(True)).order_by(Result.measured_ts)).all()
    present = sorted(f for f, det, klass in rows if det and klass == "half-order")
    assert present and len(present) < len(rows)  # both labels occur in the seeded history
    assert sorted(by["half-order present"]["x"]) == pytest.approx(present)
    assert len(by["half-order absent"]["x"]) == len(rows) - len(present)
    assert by["today's operating point"]["x"] == [pytest.approx(rows[-1][0])]
    fit = page.evaluate(f"fetch('/api/v1/dashboard/points/{pid}/window').then(r => r.json())")["fit"]
    if fit.get("f0_hz"):  # the physics fit constrained the tongue: its boundary is drawn
        assert "fitted unstable region (boundary)" in by
    assert page.locator("#window-message").inner_text()  # the fit says what it could or could not do
    screenshot(page, "window")
    no_js_errors(page)


def test_engineer_acknowledges_an_alarm_and_the_database_records_it(login, site, screenshot):
    from server.alarms.tables import AlarmState

    page = login("engineer")
    page.goto(f"{site.base}/alarms")
    ready(page)
    assert page.locator("#alarm-caution").is_visible()
    row = page.locator("tr.alarm-row").first
    alarm_id = int(row.get_attribute("data-alarm-id"))
    row.locator("button[data-action=acknowledge]").click()  # one rule, in the page's one dialog
    page.fill("#dlg-comment", "work order 4711 raised, bearing check")
    page.click("#dlg-ok")
    page.wait_for_selector("#alarms-done:not([hidden])")
    with site.db.read() as s:
        state = s.get(AlarmState, alarm_id)
    assert state.acked_by == "engineer1"
    assert state.ack_comment == "work order 4711 raised, bearing check"
    assert state.acked_level == state.level
    page.click("#tab-acknowledged")
    page.wait_for_selector(f"tr[data-alarm-id='{alarm_id}']")
    cell = page.locator(f"tr[data-alarm-id='{alarm_id}'] .alarm-state")
    assert "acknowledged by engineer1" in cell.inner_text()
    screenshot(page, "alarms")
    no_js_errors(page)


def test_viewer_sees_alarms_but_is_not_offered_acknowledgement(login, site):
    page = login("viewer")
    page.goto(f"{site.base}/alarms")
    ready(page)
    assert page.locator("button[data-action]").count() == 0
    assert page.locator("tr.alarm-row").count() >= 1


def _wav_with_half_order(tmp_path) -> str:
    import soundfile as sf

    rng = np.random.default_rng(7)
    fs, n, f1 = 2560, 32768, 24.75
    t = np.arange(n) / fs
    x = 0.3 * np.sin(2 * np.pi * f1 * t) + 0.5 * np.sin(2 * np.pi * 0.5 * f1 * t)
    x = x + 0.02 * rng.standard_normal(n)
    path = tmp_path / "p1-de-h.wav"
    sf.write(str(path), x.astype(np.float32), fs, subtype="FLOAT")
    return str(path)


def test_technician_uploads_a_route_reading_and_sees_its_result(login, site, tmp_path, screenshot):
    from server.storage.tables import Record

    page = login("technician", viewport=(1024, 768))  # a tablet
    page.goto(f"{site.base}/routes")
    ready(page)
    pid = site.seeded.growing_point
    form = page.locator(f"form.stop-upload[data-point-id='{pid}']")
    form.locator("input[type=file]").set_input_files(_wav_with_half_order(tmp_path))
    form.locator("select[name=units]").select_option("m/s2")
    form.locator("input[name=speed]").fill("24.75")
    form.locator("button[type=submit]").click()
    result = page.locator(f".stop[data-point-id='{pid}'] .result-ready")
    result.wait_for(timeout=90_000)
    text = result.inner_text()
    assert "half-order line at 12.3" in text or "half-order line at 12.4" in text
    rid = int(result.get_attribute("data-record-id"))
    with site.db.read() as s:
        rec = s.get(Record, rid)
    assert rec.origin == "upload" and rec.uploader == "user:technician1" and rec.speed_hz == 24.75
    screenshot(page, "routes")
    no_js_errors(page)


def test_viewer_reaches_only_their_own_email_alerts_in_settings(login, site):
    page = login("viewer")
    assert page.locator("header nav a", has_text="Settings").count() == 1
    resp = page.goto(f"{site.base}/settings")
    assert resp.status == 200
    assert page.locator("#sec-subs h2").inner_text() == "My email alerts"
    assert page.locator("#sec-users, #sec-plant, #sec-rules, #sec-keys").count() == 0
    api = page.evaluate("fetch('/api/v1/users').then(r => r.status)")
    assert api == 403


def test_pages_need_a_login(browser, site):
    ctx = browser.new_context()
    try:
        page = ctx.new_page()
        page.goto(f"{site.base}/assets/{site.seeded.plant.asset_ids['pump']}")
        assert page.url.startswith(f"{site.base}/login?next=")
        assert page.locator("#login-form").is_visible()
    finally:
        ctx.close()


def test_admin_creates_an_api_key_shown_once(login, site, screenshot):
    from server.security import token_hash
    from server.storage.tables import ApiKey

    page = login("admin")
    page.goto(f"{site.base}/settings")
    ready(page)
    page.fill("#key-name", "gateway north")
    page.click("#key-form button[type=submit]")
    page.wait_for_selector("#new-key")
    key = page.locator("#new-key").inner_text().strip()
    with site.db.read() as s:
        row = s.scalar(select(ApiKey).where(ApiKey.name == "gateway north"))
    assert row.key_hash == token_hash(key)
    page.wait_for_selector("#keys-table td:text('gateway north')")
    assert key not in page.locator("#keys-table").inner_text()  # the list shows the prefix only
    page.reload()
    ready(page)
    assert key not in page.content()
    screenshot(page, "settings")
    no_js_errors(page)


def test_keyboard_reaches_the_menu_and_controls_are_labelled(login, site):
    page = login("engineer")
    ready(page)
    page.keyboard.press("Tab")
    page.keyboard.press("Tab")
    focused = page.evaluate("document.activeElement.textContent.trim()")
    assert focused in ("halfwatch", "½halfwatch", "Plant")
    unlabelled = page.evaluate("""[...document.querySelectorAll('input, select, textarea')].filter(e =>
        !(e.labels && e.labels.length) && !e.getAttribute('aria-label') && e.type !== 'hidden').length""")
    assert unlabelled == 0
    page.goto(f"{site.base}/alarms")
    ready(page)
    assert page.evaluate("""[...document.querySelectorAll('input, select')].filter(e =>
        !(e.labels && e.labels.length) && !e.getAttribute('aria-label')).length""") == 0




def test_engineer_adds_a_machine_and_point_sets_a_level_and_subscribes(login, site):
    from server.alarms.tables import AlarmRule, AlarmSubscription
    from server.storage.tables import Asset, Point

    page = login("engineer")
    page.goto(f"{site.base}/settings")
    ready(page)
    assert page.locator("#sec-users").count() == 0  # users and keys are for admins
    page.select_option("#asset-area_id", str(site.seeded.plant.area_id))
    page.fill("#asset-name", "Booster fan 7")
    page.select_option("#asset-kind", "fan")
    page.fill("#asset-nominal_speed_hz", "14.8")
    page.click("#asset-form button[type=submit]")
    page.wait_for_selector("#plant-list a:text('Booster fan 7')")
    with site.db.read() as s:
        asset = s.scalar(select(Asset).where(Asset.name == "Booster fan 7"))
    assert asset.kind == "fan" and asset.nominal_speed_hz == 14.8
    page.select_option("#point-asset_id", str(asset.id))
    page.fill("#point-name", "BF7-DE-V")
    page.select_option("#point-direction", "vertical")
    page.click("#point-form button[type=submit]")
    page.wait_for_selector("#rule-point option:text('Booster fan 7 · BF7-DE-V')", state="attached")
    with site.db.read() as s:
        point = s.scalar(select(Point).where(Point.name == "BF7-DE-V"))
    assert point.asset_id == asset.id and point.direction == "vertical"
    page.select_option("#rule-point", str(point.id))
    page.wait_for_selector(f"#rules-table tbody[data-point-id='{point.id}']")
    row = page.locator("#rules-table tr[data-metric='half_order_velocity']")
    row.locator("input[type=number]").nth(0).fill("0.9")
    row.locator("input[type=number]").nth(1).fill("1.8")
    row.locator("button").click()
    page.wait_for_selector("#settings-done:has-text('saved')")
    with site.db.read() as s:
        rule = s.scalar(select(AlarmRule).where(AlarmRule.point_id == point.id,
                                                AlarmRule.metric == "half_order_velocity"))
    assert (rule.alert_level, rule.danger_level, rule.is_default) == (0.9, 1.8, False)
    page.fill("#sub-email", "planner.north@example.test")
    page.select_option("#sub-scope", f"asset:{asset.id}")
    page.select_option("#sub-min_level", "danger")
    page.click("#sub-form button[type=submit]")
    page.wait_for_selector("#subs-table td:text('planner.north@example.test')")
    with site.db.read() as s:
        sub = s.scalar(select(AlarmSubscription)
                       .where(AlarmSubscription.email == "planner.north@example.test"))
    assert (sub.scope, sub.scope_id, sub.min_level) == ("asset", asset.id, "danger")
    assert sub.timezone == "Europe/Berlin"  # the site's zone
    no_js_errors(page)


def test_engineer_shelves_an_alarm_until_a_time_in_the_site_zone(login, site):
    from server.alarms.tables import AlarmState

    page = login("engineer")
    page.goto(f"{site.base}/alarms")
    ready(page)
    row = page.locator("tr.alarm-row").first
    alarm_id = int(row.get_attribute("data-alarm-id"))
    from zoneinfo import ZoneInfo

    day = (dt.datetime.now(dt.UTC) + dt.timedelta(days=60)).date()
    row.locator("button[data-action=shelve]").click()  # one rule, in the page's one dialog
    page.fill("#dlg-until", f"{day.isoformat()} 08:00")
    page.fill("#dlg-reason", "outage planned for June")
    page.click("#dlg-ok")
    page.wait_for_selector("#alarms-done:not([hidden])")
    with site.db.read() as s:
        state = s.get(AlarmState, alarm_id)
    # 08:00 wall-clock in the site's zone, converted with the IANA tz database (Python's zoneinfo)
    wall = dt.datetime(day.year, day.month, day.day, 8, 0, tzinfo=ZoneInfo("Europe/Berlin"))
    assert state.shelved_until == wall.astimezone(dt.UTC)
    assert state.shelve_reason == "outage planned for June" and state.shelved_by == "engineer1"
    page.click("#tab-shelved")
    page.wait_for_selector(f"tr[data-alarm-id='{alarm_id}']")
    cell = page.locator(f"tr[data-alarm-id='{alarm_id}'] .alarm-state")
    assert f"{day.isoformat()} 08:00" in cell.inner_text()


def test_technician_uploads_a_whole_route_zip_and_sees_each_row(login, site, tmp_path):
    import zipfile

    from server.storage.tables import Record

    wav = _wav_with_half_order(tmp_path)
    when = (dt.datetime.now(dt.UTC) - dt.timedelta(minutes=5)).replace(microsecond=0).isoformat()
    path = tmp_path / "walk.zip"
    with zipfile.ZipFile(path, "w") as z:
        z.write(wav, "cw/p1-nde-v.wav")
        z.writestr("manifest.csv", "point,measured_at,file,units,speed_hz\n"
                                   f"P1-NDE-V,{when},cw/p1-nde-v.wav,m/s2,24.75\n"
                                   f"P1-NDE-V,{when},cw/missing.wav,m/s2,24.75\n")
    page = login("technician", viewport=(1024, 768))
    page.goto(f"{site.base}/routes")
    ready(page)
    route = page.locator(f"#route-{site.seeded.plant.route_id}")
    route.locator("input[name=zip]").set_input_files(str(path))
    route.locator("button", has_text="Upload ZIP").click()
    report = route.locator(".zip-report")
    page.wait_for_function("() => document.querySelector('.zip-report').textContent.length > 0")
    assert "accepted" in report.inner_text(), report.inner_text()
    summary = report.locator("p.notice").first.inner_text()
    assert summary.startswith("1 accepted, 0 already stored, 1 rejected")
    assert "rejected:" in report.locator("tbody tr").nth(1).inner_text()
    done = report.locator(".result-ready")
    done.wait_for(timeout=90_000)
    with site.db.read() as s:
        rec = s.get(Record, int(done.get_attribute("data-record-id")))
    assert rec.origin == "route" and rec.point_id == site.seeded.plant.point_ids["P1-NDE-V"]
    no_js_errors(page)
