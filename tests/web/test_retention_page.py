"""The reading page with retention: an engineer pins a reading (audited), and a reading whose raw waveform
retention removed still opens with its spectrum, envelope and result, and says so."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import select

from server.audit.tables import ConfigChange
from server.retention.apply import _batch
from server.retention.tables import RecordPin


def _ready(page, timeout=15_000):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=timeout)


def test_engineer_pins_and_unpins_a_reading(login, site):
    rid = site.seeded.record_ids["P1-DE-H"][1]
    page = login("engineer")
    page.goto(f"{site.base}/records/{rid}")
    _ready(page)
    assert "Stored." in page.locator("#retention-note").inner_text()
    page.fill("#pin-note", "keep for the bearing vendor")
    page.click("#pin-button")
    page.wait_for_selector("#unpin-button:not([hidden])")
    assert "pinned by engineer1" in page.locator("#retention-note").inner_text()
    with site.db.read() as s:
        assert s.get(RecordPin, rid).note == "keep for the bearing vendor"
    page.click("#unpin-button")
    page.wait_for_selector("#pin-button:not([hidden])")
    with site.db.read() as s:
        assert s.get(RecordPin, rid) is None
        acts = list(s.scalars(select(ConfigChange.action).where(ConfigChange.target == "record",
                                                                ConfigChange.target_id == rid)))
    assert acts == ["pin", "unpin"]
    viewer = login("viewer")
    viewer.goto(f"{site.base}/records/{rid}")
    _ready(viewer)
    assert viewer.locator("#pin-button").is_hidden()  # only engineers pin


def test_a_reading_without_its_raw_waveform_still_opens(login, site):
    rid = site.seeded.record_ids["P1-DE-H"][0]
    now = dt.datetime.now(dt.UTC)
    assert _batch(site.db, [rid], now, "test retention", now) != (0, 0)
    page = login("viewer")
    page.goto(f"{site.base}/records/{rid}")
    _ready(page)
    assert "removed by retention" in page.locator("#retention-note").inner_text()
    names = page.evaluate("document.getElementById('chart-waveform').data.map(t => t.name)")
    assert "subharmonic envelope (m/s2 peak)" in names
    assert not any(n.startswith("acceleration") for n in names)
    assert page.evaluate("document.getElementById('chart-spectrum').data[0].x.length") > 100
    assert "removed by retention" in page.locator("#growth-note").inner_text()
    assert [e for e in page.js_errors if "autocomplete" not in e] == []
