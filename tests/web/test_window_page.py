"""The operating-window page read as a person sees it (real Chromium, real uvicorn, the seeded database).

The seeded compressor point C2-CYL-A has 30 readings at 1X 22-28 Hz (two strokes per revolution) with an
invented tongue (tests/web/conftest.py). The page must state the plain conclusion at the newest reading's
1X acceleration, in Hz and in shaft r/min, with the caution; zoom its axes to the readings in the database
(not from zero); show the fitted mode with intervals; and pass axe-core without serious or critical
violations.
"""

from __future__ import annotations

import re

import pytest
from sqlalchemy import select
from support.a11y import describe, violations

pytestmark = pytest.mark.browser


def ready(page, timeout=15_000):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=timeout)


def _db_readings(site, pid):
    from server.storage.tables import Asset, Point, Result

    with site.db.read() as s:
        rows = s.execute(select(Result.forcing_hz, Result.one_x_accel_peak).where(
            Result.point_id == pid, Result.current).order_by(Result.measured_ts)).all()
        point = s.get(Point, pid)
        multiplier = s.get(Asset, point.asset_id).forcing_multiplier
        return [(f, a) for f, a in rows if f is not None and a is not None], point.units, multiplier


def test_window_page_states_the_conclusion_and_zooms_to_the_readings(login, site, screenshot):
    pid = site.seeded.plant.point_ids["C2-CYL-A"]
    rows, units, multiplier = _db_readings(site, pid)
    page = login("viewer", viewport=(1440, 900))
    page.goto(f"{site.base}/points/{pid}/window")
    ready(page)

    text = page.locator("#window-conclusion").inner_text()
    assert page.locator("#window-conclusion").is_visible()
    newest_accel_peak = rows[-1][1]  # the newest reading's 1X acceleration peak, from the database
    assert f"At today's 1X acceleration of {newest_accel_peak:.3g} {units} peak" in text
    m = re.search(r"from ([\d.]+) to ([\d.]+) Hz \(([\d,]+) to ([\d,]+) r/min shaft", text)
    assert m, text
    a_hz, b_hz, a_rpm, b_rpm = (float(g.replace(",", "")) for g in m.groups())
    assert a_hz < b_hz
    # shaft r/min = 60 * 1X Hz / (1X cycles per revolution), with the asset's multiplier from the database
    assert a_rpm == pytest.approx(60 * a_hz / multiplier, abs=1.0)
    assert b_rpm == pytest.approx(60 * b_hz / multiplier, abs=1.0)
    assert "nearest stable speeds are below" in text
    caution = page.locator("#window-caution").inner_text()
    assert "manufacturer" in caution and "site" in caution and "not a protection" in caution
    assert "skipped (avoided) speed range" in page.locator("#window-skip").inner_text()

    # axes zoomed to the data in the database: every reading inside, and no more than half the span again
    layout = page.evaluate("document.getElementById('chart-window').layout")
    x0, x1 = layout["xaxis"]["range"]
    y0, y1 = layout["yaxis"]["range"]
    fs, amps = [f for f, _ in rows], [a for _, a in rows]
    assert x0 <= min(fs) and x1 >= max(fs) and y0 <= min(amps) and y1 >= max(amps)
    assert y0 > 0 and (y1 - y0) <= 1.5 * (max(amps) - min(amps))  # not from zero, not to a far threshold
    # speeds beyond the ones run are shaded as extrapolated
    grey = [s for s in layout["shapes"] if s.get("fillcolor") == "rgba(100,116,139,0.16)"]
    assert grey and all(s["x1"] <= min(fs) + 1e-9 or s["x0"] >= max(fs) - 1e-9 for s in grey)

    nums = page.locator("#window-numbers").inner_text()
    assert re.search(r"Mode natural frequency f0\s+[\d.]+ Hz\s+95 % interval [\d.]+ to [\d.]+ Hz", nums)
    assert re.search(r"Mode damping ratio ζ\s+[\d.]+\s+95 % interval", nums)
    found = violations(page)
    assert not found, describe(found)
    screenshot(page, "window-conclusion")
