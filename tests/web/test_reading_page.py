"""The reading page read as a person sees it (real Chromium, real uvicorn, the package's seeded database).

The pump's drive-end point has 12 readings sampled at 2560 Hz (its overall band reaches 1000 Hz); the
ID fan's point has 3 readings sampled at 320 Hz, which cannot cover the ISO 20816 band.
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
from sqlalchemy import select
from support.a11y import describe, violations

pytestmark = pytest.mark.browser
G_N = 9.80665  # standard gravity, m/s2 (ISO 80000-3 / CGPM 1901 conventional value)


def ready(page):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=20_000)


def open_reading(login, site, record_id, role="viewer"):
    page = login(role, viewport=(1440, 900))
    page.goto(f"{site.base}/records/{record_id}")
    ready(page)
    return page


def stored(site, record_id):
    from server.storage.packing import unpack_arrays
    from server.storage.tables import Record, Result

    with site.db.read() as s:
        rec = s.get(Record, record_id)
        res = s.scalar(select(Result).where(Result.record_id == record_id, Result.current))
        meta, arrays = unpack_arrays(res.spectrum)
        return rec, res, meta, arrays


def test_velocity_spectrum_beside_the_acceleration_one_in_rms(login, site):
    rid = site.seeded.last_growing_record
    page = open_reading(login, site, rid)
    rec, res, meta, arrays = stored(site, rid)
    v = page.evaluate("""() => { const d = document.getElementById('chart-velocity');
        return { x: d.data[0].x, y: d.data[0].y, title: d.layout.yaxis.title.text }; }""")
    assert v["title"] == "velocity amplitude (mm/s r.m.s.)"
    f, a = np.asarray(arrays["freqs_hz"]), np.asarray(arrays["amplitude"])
    assert v["x"] == pytest.approx(f.tolist())
    # V_rms = A_peak / (2 pi f) / sqrt 2, A in m/s2 -> mm/s (integration of a sine; Harris' Shock and
    # Vibration Handbook, ch. 1). The record is in m/s2; bins below the 10 Hz band edge are left out.
    k = int(np.argmin(np.abs(f - res.forcing_hz)))
    expect = a[k] / (2 * math.pi * f[k]) * 1000.0 / math.sqrt(2.0)
    assert v["y"][k] == pytest.approx(expect, rel=1e-6)
    assert all(y is None for x, y in zip(v["x"], v["y"], strict=True) if x < 10.0)
    # the 1X line on the velocity chart is the 1X velocity r.m.s. stored for the reading (within the
    # spectrum's window spread: the line's top bin carries most of it)
    top = max(y for x, y in zip(v["x"], v["y"], strict=True) if y is not None and abs(x - res.forcing_hz) < 1)
    assert top == pytest.approx(res.one_x_velocity_rms_mm_s, rel=0.15)
    acc = page.evaluate("() => document.getElementById('chart-spectrum').layout.yaxis.title.text")
    assert acc == "acceleration amplitude (m/s2 peak)"
    # beside each other at 1440 px: same row
    boxes = [page.locator(f"section:has(#{i})").bounding_box() for i in ("chart-spectrum", "chart-velocity")]
    assert abs(boxes[0]["y"] - boxes[1]["y"]) < 2 and boxes[1]["x"] > boxes[0]["x"] + boxes[0]["width"] - 1


def test_numbers_are_plain_and_every_amplitude_names_its_measure(login, site):
    rid = site.seeded.last_growing_record
    page = open_reading(login, site, rid)
    text = page.locator("#numbers").inner_text()
    assert not re.search(r"\d[eE][-+]?\d", text), text  # no scientific notation
    for m in re.finditer(r"mm/s", text):
        after, before = text[m.end():m.end() + 8], text[max(0, m.start() - 24):m.start()]
        assert after.startswith(" r.m.s.") or "peak" in before, text[m.start() - 30:m.end() + 10]
    for m in re.finditer(r"m/s2", text):
        assert text[m.end():m.end() + 5] == " peak", text[m.start() - 30:m.end() + 10]
    rec, res, meta, arrays = stored(site, rid)
    growth = page.locator(".n", has_text="Growth rate").inner_text()
    assert not re.search(r"\d[eE][-+]?\d", growth)
    # a doubling time only for growth the 95 % interval says is real (the growth card's own rule)
    data = json.loads(res.data) if isinstance(res.data, str) else res.data
    g = data["growth"]
    real = g["rate_per_s"] is not None and g["rate_per_s"] > 0 and g["ci95_per_s"][0] is not None \
        and g["ci95_per_s"][0] > 0
    doubling = page.locator(".n", has_text="Doubling time").inner_text()
    assert ("no significant growth" in doubling) == (not real), (g, doubling)
    if real:  # ln 2 / rate, to the page's three significant digits
        shown = page.evaluate(f"HW.num({math.log(2) / g['rate_per_s']})")
        assert shown in doubling, (shown, doubling)
    lines = page.evaluate("""() => document.getElementById('chart-waveform').data.map((t) => t.name)""")
    assert any("instantaneous" in n for n in lines)
    assert any(n.startswith("subharmonic envelope (") and "peak" in n for n in lines)


def test_no_doubling_time_for_growth_the_interval_does_not_support(login, site):
    """A rate whose 95 % interval holds 0 is "no significant growth" on the growth card, so no doubling time
    either (one meaning per number)."""
    from server.storage.tables import Result

    with site.db.read() as s:
        rows = s.execute(select(Result.record_id, Result.data).where(Result.current)).all()
    weak = None
    for rid, raw in rows:
        g = (json.loads(raw) if isinstance(raw, str) else raw)["growth"]
        ci = g.get("ci95_per_s") or [None, None]
        if g.get("rate_per_s") and g["rate_per_s"] > 0 and ci[0] is not None and ci[0] <= 0 <= ci[1]:
            weak = rid
            break
    assert weak is not None, "the seeded plant has a reading with a positive rate whose interval holds 0"
    page = open_reading(login, site, weak)
    assert "no significant growth" in page.locator(".n", has_text="Growth rate").inner_text()
    doubling = page.locator(".n", has_text="Doubling time").inner_text()
    assert "—" in doubling and "no significant growth" in doubling, doubling


def test_waterfall_is_centred_on_the_opened_reading(login, site):
    from server.storage.tables import Result

    ids = site.seeded.record_ids["P1-DE-H"]
    rid = ids[4]  # an older reading of the seeded twelve (other tests may add newer ones)
    page = open_reading(login, site, rid)
    with site.db.read() as s:  # the point's readings with a result, oldest first, from the table
        rows_db = s.execute(select(Result.record_id).where(Result.point_id == site.seeded.growing_point,
                                                           Result.current)
                            .order_by(Result.measured_ts)).scalars().all()
    at = rows_db.index(rid)
    older, newer = at, len(rows_db) - 1 - at
    assert older == 4 and newer >= 7 and len(rows_db) <= 21  # all of them fit in the 21 rows
    rows = page.evaluate("() => document.getElementById('chart-waterfall').data[0].y")
    assert len(rows) == len(rows_db)
    marked = [i for i, y in enumerate(rows) if y.startswith("▶")]
    assert marked == [older]
    frame = page.evaluate("""() => document.getElementById('chart-waterfall').layout.shapes
        .filter((s) => s.type === 'rect').map((s) => [s.y0, s.y1])""")
    assert frame == [[older - 0.5, older + 0.5]]
    assert f"{older} older, {newer} newer" in page.locator("#waterfall-note").inner_text()
    # fewer rows than readings: two on each side of the opened one; at the oldest, the rest come after it
    for opened, want in ((rid, rows_db[at - 2:at + 3]), (rows_db[0], rows_db[:5])):
        got = page.evaluate(f"fetch('/api/v1/dashboard/records/{opened}/waterfall?n=5').then(r => r.json())")
        assert [x["record_id"] for x in got["spectra"]] == want


def test_a_low_sample_rate_reading_says_so_and_grades_no_zone(login, site):
    from server.storage.tables import Record

    rid = site.seeded.record_ids["F-DE-H"][-1]
    page = open_reading(login, site, rid)
    with site.db.read() as s:
        fs = s.get(Record, rid).fs_hz
    assert fs == 320.0
    zone = page.locator("#zone-number").inner_text()
    assert "not graded" in zone and "zone " not in zone.replace("ISO 20816 zone", "")
    note = page.locator("#band-note").inner_text()
    # ISO 20816-3: broad-band 10-1000 Hz for machines above 600 r/min (the fan runs at 990 r/min);
    # values from memory. The record reaches 0.45 fs = 144 Hz.
    assert "sampled at 320 Hz" in note and "not the 10-1000 Hz band of ISO 20816" in note
    assert "covers 10-144 Hz" in note
    limits = page.locator("#limits-note").inner_text()
    assert "ISO 20816-3:2022" in limits and "check them against your copy of the standard" in limits.lower()
    assert "from memory" not in page.locator("main").inner_text()
    assert not violations(page), describe(violations(page))
    # the machine page's readings table agrees: the fan's low-rate readings carry no zone either
    fan = site.seeded.plant.asset_ids["fan"]
    page.goto(f"{site.base}/assets/{fan}?point={site.seeded.precursor_point}")
    ready(page)
    page.wait_for_function("() => document.querySelectorAll('#readings tbody tr[data-record-id]').length > 0")
    zones = [tr.locator("td").nth(5).inner_text() for tr in page.locator("#readings tbody tr").all()]
    assert zones == ["not graded"] * len(site.seeded.record_ids["F-DE-H"])
    assert "do not reach the ISO 20816 band" in page.locator("#band-note").inner_text()


def test_a_full_band_reading_grades_its_zone(login, site):
    from server.storage.tables import Result

    rid = site.seeded.last_growing_record
    page = open_reading(login, site, rid)
    with site.db.read() as s:
        z = s.scalar(select(Result.zone).where(Result.record_id == rid, Result.current))
    assert z in ("A", "B", "C", "D")
    assert page.locator("#zone-number .zone").inner_text() == f"zone {z}"
    assert page.locator("#band-note").is_hidden()
