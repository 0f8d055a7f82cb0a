"""The plant page worst first, read as a person sees it (real Chromium, real uvicorn, seeded database).

The seeded plant has two sites; alphabetically "Hilltop annex" (the ID fan, healthy but without a reading
for longer than its online interval) comes before "Riverside works" (the CW pump whose half-order line
grows into alarm). Worst first, the pump's card must lead, be inside the first screen at 1440x900 and at
1280x720, and the fan must be marked stale rather than a plain "normal".
"""

from __future__ import annotations

import datetime as dt
import json
import time
from pathlib import Path

import pytest
from sqlalchemy import func, select
from support.a11y import describe, violations

pytestmark = pytest.mark.browser
LEVEL_RANK = {"normal": 0, "alert": 1, "danger": 2}  # common practice: normal < alert < danger
TIMINGS = Path(__file__).resolve().parents[2] / "test-artifacts" / "plant-timings.json"


def ready(page, timeout=15_000):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=timeout)


def worst_levels(site) -> dict[int, str]:
    from server.alarms.tables import AlarmState
    from server.storage.tables import Asset

    with site.db.read() as s:
        rows = s.execute(select(AlarmState.asset_id, AlarmState.level)).all()
        assets = s.scalars(select(Asset.id)).all()  # every machine, also those other tests added
    out = dict.fromkeys(assets, "normal")
    for aid, level in rows:
        if LEVEL_RANK[level] > LEVEL_RANK[out[aid]]:
            out[aid] = level
    return out


def stale_assets(site, now: dt.datetime) -> set[int]:
    """Machines with a point whose last record is older than its interval (route stop interval; 24 h for
    an online point) or that never had one: computed here from the tables, not from the page's JSON."""
    from server.storage.tables import Point, Record, RouteStop

    with site.db.read() as s:
        last = dict(s.execute(select(Record.point_id, func.max(Record.measured_at))
                              .group_by(Record.point_id)).all())
        interval = {}
        for pid, h in s.execute(select(RouteStop.point_id, RouteStop.due_interval_h)).all():
            interval[pid] = max(interval.get(pid, 0.0), h)
        points = s.execute(select(Point.id, Point.asset_id)).all()
    out = set()
    for pid, aid in points:
        t = last.get(pid)
        if t is not None and t.tzinfo is None:
            t = t.replace(tzinfo=dt.UTC)
        if t is None or (now - t).total_seconds() / 3600.0 > interval.get(pid, 24.0):
            out.add(aid)
    return out


def test_plant_page_leads_with_the_worst_machine_and_counts_them(login, site):
    page = login("engineer", viewport=(1440, 900))
    ready(page)
    levels = worst_levels(site)
    plant = site.seeded.plant
    pump, fan = plant.asset_ids["pump"], plant.asset_ids["fan"]
    assert LEVEL_RANK[levels[pump]] > 0  # the growing half-order line raised an alarm
    # the summary strip counts what the alarm states say
    counts = {k: int(page.locator(f".sum-{k}").get_attribute("data-count"))
              for k in ("danger", "alert", "stale", "normal")}
    for level in ("danger", "alert", "normal"):
        assert counts[level] == sum(v == level for v in levels.values()), level
    now = dt.datetime.now(dt.UTC)
    stale = stale_assets(site, now)
    assert fan in stale and pump not in stale
    assert counts["stale"] == len(stale)
    strip = page.locator("#plant-summary").inner_text()
    assert f"{counts['stale']} stale" in strip.replace("\n", " ")
    # cards in page order: never a less severe machine before a more severe one, across sites and areas
    order = [(int(c.get_attribute("data-asset-id")), c.get_attribute("data-level"))
             for c in page.locator("article.machine").all()]
    assert order[0][0] == pump
    ranks = [LEVEL_RANK[lv] for _, lv in order]
    assert ranks == sorted(ranks, reverse=True)
    # area headings follow their worst machine (the pump's area first, then the fan's)
    heads = page.locator("h3.area-head").all_inner_texts()
    assert heads[0].startswith("Cooling water") and heads[-1].startswith("Boiler house")
    # the stale fan says so in words, with how long it has been silent
    fan_card = page.locator(f"article.machine[data-asset-id='{fan}']")
    assert fan_card.get_attribute("data-stale") == "1"
    assert "stale · no reading for" in fan_card.inner_text()
    assert page.locator(f"article.machine[data-asset-id='{pump}']").get_attribute("data-stale") == "0"
    # the stale filter shows the stale machines only
    page.locator(".sum-stale").click()
    shown = {int(c.get_attribute("data-asset-id")) for c in page.locator("article.machine").all()}
    assert shown == stale


def test_icons_are_drawn_not_taken_from_a_symbol_font(login, site):
    page = login("viewer")
    ready(page)
    # level badges, stale marks and the caution carry inline SVG; no emoji or symbol characters remain
    assert page.locator(".level svg[data-icon]").count() == page.locator(".level").count() > 0
    assert page.locator("#caution svg.caution-icon").count() == 1
    text = page.locator("body").inner_text()
    for glyph in "⏰◷⚠✓○▲◆★":
        assert glyph not in text, glyph


def test_sparklines_plot_the_rule_measure_with_its_levels(login, site):
    from server.alarms.rules import result_metrics
    from server.routes.dashboard import point_levels
    from server.storage.tables import Asset, Result

    page = login("viewer", viewport=(1440, 900))
    ready(page)
    pump = site.seeded.plant.asset_ids["pump"]
    gd = f"document.getElementById('spark-{pump}')"
    page.wait_for_function(f"() => {gd} && {gd}.dataset.drawn === '1'")
    y = [v for v in page.evaluate(f"{gd}.data[0].y") if v is not None]
    shapes = page.evaluate(f"{gd}.layout.shapes.map(s => s.y0)")
    ytitle = page.evaluate(f"{gd}.layout.yaxis.title.text")
    yrange = page.evaluate(f"{gd}.layout.yaxis.range")
    since = time.time() - 30 * 86400
    with site.db.read() as s:
        asset = s.get(Asset, pump)
        pids = [p.id for p in asset.points]
        levels = point_levels(s, asset, pids)
        rows = s.scalars(select(Result).where(Result.point_id.in_(pids), Result.current.is_(True),
                                              Result.measured_ts >= since)).all()
        # the half-order rule's own value of each reading (mm/s r.m.s., server.alarms.rules)
        values = [result_metrics(json.loads(r.data) if isinstance(r.data, str) else r.data)
                  ["half_order_velocity"]
                  for r in rows]
    assert ytitle == "mm/s r.m.s."
    assert max(y) == pytest.approx(max(values), rel=1e-6)  # the largest bucket maximum is the largest reading
    alert = min(lv["half_order_velocity"]["alert"] for lv in levels.values())
    danger = min(lv["half_order_velocity"]["danger"] for lv in levels.values())
    assert sorted(shapes) == pytest.approx(sorted([alert, danger]))
    assert yrange[0] == 0 and yrange[1] >= danger  # a stated scale that holds both lines


@pytest.mark.parametrize("viewport", [(1440, 900), (1280, 720)])
def test_the_worst_machine_is_on_the_first_screen(browser, site, viewport):
    from support.fixtures import PASSWORD

    ctx = browser.new_context(viewport={"width": viewport[0], "height": viewport[1]}, timezone_id="UTC",
                              locale="en-US")
    try:
        page = ctx.new_page()
        page.goto(f"{site.base}/login")
        page.fill("#username", "viewer1")
        page.fill("#password", PASSWORD)
        page.click("button[type=submit]")
        page.wait_for_url(f"{site.base}/")
        pump = site.seeded.plant.asset_ids["pump"]
        t0 = time.perf_counter()
        page.goto(f"{site.base}/")
        card = page.locator(f"article.machine[data-asset-id='{pump}']")
        card.wait_for(state="visible")
        seconds = time.perf_counter() - t0
        box = card.bounding_box()
        assert box["y"] >= 0 and box["y"] + box["height"] <= viewport[1], box  # whole card, no scrolling
        assert page.evaluate("window.scrollY") == 0
        TIMINGS.parent.mkdir(parents=True, exist_ok=True)
        seen = json.loads(TIMINGS.read_text()) if TIMINGS.exists() else {}
        seen[f"{viewport[0]}x{viewport[1]}"] = round(seconds, 3)
        TIMINGS.write_text(json.dumps(seen, indent=2))
    finally:
        ctx.close()


@pytest.mark.parametrize("path", ["/", "/alarms", "/routes", "/settings", "/asset", "/record", "/window"])
def test_every_page_has_no_serious_accessibility_violation(login, site, path):
    """axe-core (tests/support/axe, Deque Systems) on each page once it is drawn: no serious or critical
    violation of its WCAG 2.x A/AA rules."""
    plant = site.seeded.plant
    real = {"/asset": f"/assets/{plant.asset_ids['pump']}",
            "/record": f"/records/{site.seeded.last_growing_record}",
            "/window": f"/points/{plant.point_ids['C2-CYL-A']}/window"}.get(path, path)
    page = login("admin", viewport=(1440, 900))
    page.goto(f"{site.base}{real}")
    ready(page)
    page.wait_for_timeout(300)
    found = violations(page)
    assert not found, describe(found)
