"""The 0.5X precursor (a noise-excited resonance bump below the parametric threshold) on the dashboard.

The seeded ID fan point has three below-threshold readings from the parametric simulator at h/h_c 0.4, 0.6
and 0.8 (tests/web/conftest.py). Outside reference for what the pages must show: below threshold the damped
Mathieu mode near f_W/2 is a Lorentzian bump whose narrow decay rate is γ− = ζω0(1 − h/h_c), falling to 0 at
onset (noisy precursor of period doubling, Wiesenfeld 1985, J. Stat. Phys. 38, 1071-1097), and a
Lorentzian's half-power full width is γ/π (closed form), so γ− = π × width when the spectrum resolves the
bump; otherwise γ− comes from the slow flow (analysis/record/slow_flow.py) and π × width bounds it.
"""

from __future__ import annotations

import json
import math

import pytest
from sqlalchemy import select

pytestmark = pytest.mark.browser


def _fan_results(site) -> list[dict]:
    from server.storage.tables import Result

    with site.db.read() as s:
        rows = s.scalars(select(Result.data).where(Result.point_id == site.seeded.precursor_point,
                                                   Result.current.is_(True)).order_by(Result.measured_ts))
        return [json.loads(d) if isinstance(d, str) else d for d in rows]


def _ready(page):
    page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=20_000)


def _no_js_errors(page):
    assert [e for e in page.js_errors if "autocomplete" not in e] == []


def test_seeded_readings_carry_a_precursor_that_narrows_towards_threshold(site):
    results = _fan_results(site)
    assert len(results) == 3
    pre = [r["subharmonic"]["precursor"] for r in results]
    assert all(not r["subharmonic"]["detected"] for r in results)  # below threshold: no half-order line
    assert all(p is not None and p["narrow_rate_per_s"] is not None for p in pre)
    for p in pre:
        # the bump sits on f_W/2 (centre of the first Mathieu tongue, Landau & Lifshitz, Mechanics §27), f_W =
        # 16.5 Hz here
        assert p["frequency_hz"] == pytest.approx(16.5 / 2, abs=0.1)
        if "slow flow" in p["note"]:  # γ− from the slow flow; π·width is then an upper bound of it
            assert 0 < p["narrow_rate_per_s"] <= math.pi * p["width_hz"]
        else:
            assert p["narrow_rate_per_s"] == pytest.approx(math.pi * p["width_hz"], rel=1e-6)  # γ = π·width
    rates = [p["narrow_rate_per_s"] for p in pre]
    assert rates[0] > rates[1] > rates[2]  # γ− = ζω0(1 − h/h_c) falls as h/h_c rises (Wiesenfeld 1985)


def test_record_page_shows_the_precursor_cards_and_its_band(login, site, screenshot):
    rid = site.seeded.record_ids["F-DE-H"][-1]
    p = _fan_results(site)[-1]["subharmonic"]["precursor"]
    assert p is not None  # checked before the browser part
    page = login("viewer")
    page.goto(f"{site.base}/records/{rid}")
    _ready(page)
    cards = page.locator("#numbers").inner_text()
    assert "0.5X precursor centre" in cards and "Precursor decay rate γ−" in cards
    shown = page.evaluate(f"HW.num({p['frequency_hz']}, 5)")
    assert f"{shown} Hz" in cards.replace("\n", " ")
    assert page.evaluate(f"HW.num({p['narrow_rate_per_s']}, 3)") in cards
    assert "Distance to threshold h/h_c" in cards
    if p["ratio_to_threshold"] is None:  # no fit possible: the note stands in for h/h_c
        assert p["note"] in cards
    note = page.locator("#precursor-note")
    assert note.is_visible() and "not a detected half-order line" in note.inner_text()
    traces = page.evaluate("document.getElementById('chart-spectrum').data")
    band = next(t for t in traces if t["name"].startswith("0.5X precursor bump"))
    assert band["fill"] == "toself"
    lo, hi = min(band["x"]), max(band["x"])
    # the band is the half-power width centred on the precursor (values from the stored result JSON)
    assert (lo + hi) / 2 == pytest.approx(p["frequency_hz"], rel=1e-9)
    assert hi - lo == pytest.approx(p["width_hz"], rel=1e-9)
    assert not any(t["name"].endswith("line found") for t in traces)  # no half-order line is drawn
    legend = page.evaluate("document.getElementById('chart-spectrum')._fullData"
                           ".filter(t => t.showlegend !== false).map(t => t.name)")
    assert band["name"] in legend
    page.click("#zoom-half")
    screenshot(page, "record-precursor")
    _no_js_errors(page)


def test_asset_page_trends_the_precursor_decay_rate(login, site, screenshot):
    plant = site.seeded.plant
    expected = [r["subharmonic"]["precursor"]["narrow_rate_per_s"] for r in _fan_results(site)]
    page = login("engineer")
    page.goto(f"{site.base}/assets/{plant.asset_ids['fan']}?point={site.seeded.precursor_point}")
    _ready(page)
    traces = page.evaluate("document.getElementById('chart-precursor').data")
    line = next(t for t in traces if t["name"] == "precursor γ− (1/s)")
    assert line["y"] == pytest.approx(expected)
    title = page.evaluate("document.getElementById('chart-precursor').layout.yaxis.title.text")
    assert "(1/s)" in title
    assert page.evaluate("(document.getElementById('chart-precursor').layout.annotations || []).length") == 0
    assert "falling γ− means the machine is approaching" in page.locator("#precursor-note").inner_text()
    # a point whose readings have a half-order line and no precursor: the series is absent (all null)
    pid = site.seeded.growing_point
    d = page.evaluate(f"fetch('/api/v1/dashboard/points/{pid}/series').then(r => r.json())")
    assert d["n_source"] > 0 and all(v is None for v in d["precursor_rate_per_s"]["mean"])
    screenshot(page, "asset-precursor")
    _no_js_errors(page)
