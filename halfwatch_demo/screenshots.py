"""Screenshots of the running demo for the README, taken in headless Chromium.

    python -m halfwatch_demo.screenshots http://127.0.0.1:8000 erin PASSWORD docs/screenshots

Logs in as the given user, opens the main pages of the demo plant (overview, the onset asset VP-102,
its latest record, its operating window, alarms, routes, outgoing mail) and writes one PNG per page.
Needs Playwright and a Chromium on the PATH (the Debian package ``chromium``).
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

ARGS = ["--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
        "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1, EXCLUDE localhost"]


def _ids(base: str, cookies: dict) -> tuple[int, int, int]:
    import httpx

    with httpx.Client(base_url=base, cookies=cookies, timeout=20) as c:
        tree = c.get("/api/v1/tree").json()
        for site in tree["sites"]:
            for area in site["areas"]:
                for asset in area["assets"]:
                    if asset["name"].endswith("VP-102"):
                        point = next(p for p in asset["points"] if p["name"].endswith(" H"))
                        rec = c.get(f"/api/v1/points/{point['id']}/records", params={"limit": 1}).json()
                        rows = rec.get("records") or rec.get("items") or []
                        return asset["id"], point["id"], rows[0]["id"]
    raise SystemExit("no asset VP-102 in this plant: is this the demo?")


def take(base: str, user: str, password: str, out: Path) -> list[Path]:
    from playwright.sync_api import sync_playwright

    out.mkdir(parents=True, exist_ok=True)
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    shots = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=chromium, headless=True, args=ARGS, timeout=30_000)
        page = browser.new_page(viewport={"width": 1280, "height": 860})
        page.goto(base + "/login")
        page.fill("input[name=username]", user)
        page.fill("input[name=password]", password)
        page.press("input[name=password]", "Enter")
        page.wait_for_url(lambda url: "/login" not in url, timeout=30_000)
        cookies = {c["name"]: c["value"] for c in page.context.cookies()}
        asset_id, point_id, record_id = _ids(base, cookies)
        pages = [("overview", "/"), ("asset", f"/assets/{asset_id}"), ("record", f"/records/{record_id}"),
                 ("window", f"/points/{point_id}/window"), ("alarms", "/alarms"), ("routes", "/routes"),
                 ("mail", "/demo/mail")]
        for name, path in pages:
            page.goto(base + path)
            page.wait_for_load_state("networkidle")
            page.wait_for_timeout(1500)  # let the charts finish drawing
            target = out / f"demo-{name}.png"
            page.screenshot(path=str(target), full_page=False)
            shots.append(target)
        browser.close()
    return shots


if __name__ == "__main__":
    if len(sys.argv) != 5:
        raise SystemExit(__doc__)
    for path in take(sys.argv[1].rstrip("/"), sys.argv[2], sys.argv[3], Path(sys.argv[4])):
        print(path)
