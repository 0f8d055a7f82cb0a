"""Plant page benchmark: time from opening the plant page to the danger machine's card being visible, in
headless Chromium at 1440x900 and 1280x720, on a demo database (``halfwatch demo --no-serve``).

The demo's API is served by uvicorn on 127.0.0.1 (no worker, no live sensors); the viewer logs in once per
viewport, then the page is opened ``--runs`` times per viewport, the two viewports interleaved. For each
viewport the table gives the median and the slowest time to the card, the card's position, and whether the
whole card is inside the first screen with no scrolling.

Usage::

    .venv/bin/halfwatch demo --no-serve --days 90 --data-dir /tmp/demo
    .venv/bin/python bench/plant_first_screen.py /tmp/demo [--runs 7]
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT)]
VIEWPORTS = ((1440, 900), (1280, 720))
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
        "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1, EXCLUDE localhost"]


def serve(folder: Path):
    from halfwatch_demo.run import DEMO_USERS, demo_settings, load_state
    from server.app import create_app

    state = load_state(folder)
    settings = demo_settings(folder, state, port=8000, smtp_port=1025).model_copy(
        update={"embedded_worker": False})
    return create_app(settings), DEMO_USERS["viewer"], state.passwords["viewer"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("data_dir", type=Path, help="a demo data folder (halfwatch demo --no-serve --data-dir)")
    ap.add_argument("--runs", type=int, default=7, help="page openings per viewport (default 7)")
    a = ap.parse_args()
    if not (a.data_dir / "halfwatch.db").exists():
        raise SystemExit(f"no demo database in {a.data_dir}: run halfwatch demo --no-serve first")
    sys.path.insert(0, str(ROOT / "tests"))
    from playwright.sync_api import sync_playwright
    from support.servers import serve_in_thread

    app, user, password = serve(a.data_dir)
    chromium = shutil.which("chromium") or "/usr/bin/chromium"
    times: dict[tuple, list[float]] = {v: [] for v in VIEWPORTS}
    where: dict[tuple, dict] = {}
    with serve_in_thread(app) as base, sync_playwright() as p:
        browser = p.chromium.launch(executable_path=chromium, headless=True, args=ARGS)
        pages = {}
        for v in VIEWPORTS:
            ctx = browser.new_context(viewport={"width": v[0], "height": v[1]}, timezone_id="UTC")
            page = ctx.new_page()
            page.goto(f"{base}/login")
            page.fill("#username", user)
            page.fill("#password", password)
            page.click("button[type=submit]")
            page.wait_for_url(f"{base}/")
            pages[v] = page
        overview = pages[VIEWPORTS[0]].evaluate("fetch('/api/v1/dashboard/overview').then(r => r.json())")
        danger = [(asset["id"], asset["name"]) for site in overview["sites"] for area in site["areas"]
                  for asset in area["assets"] if asset["alarms"]["level"] == "danger"]
        if not danger:
            raise SystemExit("no machine in danger in this demo database")
        aid, name = danger[0]
        for _ in range(a.runs):
            for v in VIEWPORTS:
                page = pages[v]
                t0 = time.perf_counter()
                page.goto(f"{base}/")
                card = page.locator(f"article.machine[data-asset-id='{aid}']")
                card.wait_for(state="visible")
                times[v].append(time.perf_counter() - t0)
                box = card.bounding_box()
                where[v] = {"y": box["y"], "bottom": box["y"] + box["height"],
                            "scroll": page.evaluate("window.scrollY"),
                            "render_ms": page.evaluate("document.body.dataset.renderMs || null")}
        browser.close()
    print(f"plant page, danger machine {name!r}, {a.runs} openings per viewport (interleaved), "
          f"{overview_size(overview)} machines")
    print(f"{'viewport':<10} {'median s':>9} {'max s':>7} {'card top px':>12} {'card bottom px':>15} "
          f"{'first screen':>13}")
    for v in VIEWPORTS:
        w = where[v]
        inside = w["y"] >= 0 and w["bottom"] <= v[1] and w["scroll"] == 0
        print(f"{v[0]}x{v[1]:<5} {statistics.median(times[v]):>9.3f} {max(times[v]):>7.3f} {w['y']:>12.0f} "
              f"{w['bottom']:>15.0f} {'yes' if inside else 'NO':>13}")
    print(json.dumps({f"{v[0]}x{v[1]}": round(statistics.median(times[v]), 3) for v in VIEWPORTS}))


def overview_size(overview: dict) -> int:
    return sum(len(area["assets"]) for site in overview["sites"] for area in site["areas"])


if __name__ == "__main__":
    main()
