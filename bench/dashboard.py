"""Dashboard benchmark: a year of hourly readings on 20 points, the trend endpoints against bare SQL, and
navigation-to-charts-drawn time of the machine page in headless Chromium.

Result rows are inserted directly in bulk (no analysis), 365 days x 24 readings x 20 points. Then, in one
run and interleaved: the existing trend endpoint (``/api/v1/points/{id}/trend``, one metric, bucketed to
1000 points), the dashboard's series endpoint (seven metrics, all typed columns of results,
among them the 0.5X precursor's decay rate, bucketed to 600, plus the trend fit), and the bare SQL query
that fetches the same point-year rows of that one metric. Prints a table of medians and ratios.
Usage: ``.venv/bin/python bench/dashboard.py [--runs 25]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

POINTS, DAYS, PER_DAY = 20, 365, 24


def build(tmp: Path):
    from support.fixtures import settings_for
    from support.plant import make_plant

    from server.migrations import upgrade
    from server.storage import Database
    from server.storage.packing import pack_arrays
    from server.storage.tables import Point, Record, Result

    settings = settings_for(tmp)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    plant = make_plant(db)  # the shared test plant; the bench points go on its pump
    with db.unit_of_work() as s:
        pts = [Point(asset_id=plant.asset_ids["pump"], name=f"B{i:02d}") for i in range(POINTS)]
        s.add_all(pts)
        s.flush()
        point_ids = [p.id for p in pts]
    import numpy as np

    blob = pack_arrays({"units": "m/s2"}, freqs_hz=np.linspace(0, 1000, 64), amplitude=np.ones(64))
    t_end = dt.datetime.now(dt.UTC).replace(minute=0, second=0, microsecond=0)
    t0 = t_end - dt.timedelta(days=DAYS)
    rng = np.random.default_rng(1)
    n = DAYS * PER_DAY
    start = time.perf_counter()
    rec_id = 0
    for pid in point_ids:
        recs, res = [], []
        amps = 0.2 * np.exp(np.linspace(0, 1.5, n)) * (1 + 0.05 * rng.standard_normal(n))
        for i in range(n):
            rec_id += 1
            t = t0 + dt.timedelta(hours=i)
            recs.append({"id": rec_id, "point_id": pid, "measured_at": t, "received_at": t, "fs_hz": 2560.0,
                         "n_samples": 16384, "units": "m/s2", "speed_hz": 24.75, "origin": "api",
                         "uploader": "bench", "checksum": "0" * 64})
            # the first 60 % of the year below threshold: a 0.5X precursor whose decay rate falls
            pre = ({"narrow_rate_per_s": 1.5 * (1 - i / (0.62 * n)), "width_hz": 0.5 * (1 - i / (0.62 * n))}
                   if i < 0.6 * n else None)
            data = {"version": "2.0", "orders": {"1X": {"accel_peak": 1.0, "velocity_peak_mm_s": 4.5,
                                                         "velocity_rms_mm_s": 4.5 / 2 ** 0.5}},
                    "subharmonic": {"accel_peak": float(amps[i]), "precursor": pre}}
            res.append({"record_id": rec_id, "point_id": pid, "measured_ts": t.timestamp(),
                        "analysis_version": "bench", "current": True, "data": json.dumps(data),
                        "spectrum": blob,
                        "forcing_hz": 24.75, "sub_detected": True, "sub_class": "half-order",
                        "sub_accel_peak": float(amps[i]), "sub_velocity_peak_mm_s": float(amps[i]) * 6.4,
                        "sub_velocity_rms_mm_s": float(amps[i]) * 6.4 / 2 ** 0.5,
                        "one_x_accel_peak": 1.0, "one_x_velocity_rms_mm_s": 4.5 / 2 ** 0.5,
                        "precursor_rate_per_s": None if pre is None else pre["narrow_rate_per_s"],
                        "overall_velocity_rms_mm_s": 3.0 + float(amps[i]), "growth_rate_per_s": 0.0,
                        "zone": "B", "quality_ok": True, "created_at": t})
        with db.unit_of_work() as s:
            s.execute(Record.__table__.insert(), recs)
            s.execute(Result.__table__.insert(), res)
    print(f"built {POINTS} points x {n} readings in {time.perf_counter() - start:.1f} s")
    return settings, db, point_ids, t0, t_end, plant.asset_ids["pump"]


def bare_sql(db, pid, t0, t1):
    """The floor: fetch the same point-year rows of one metric, straight from SQLite (no bucketing)."""
    import sqlite3

    path = db.url.split("///", 1)[1]
    con = sqlite3.connect(path)
    try:
        return con.execute("SELECT measured_ts, sub_velocity_rms_mm_s FROM results WHERE point_id=? "
                           "AND current=1 AND measured_ts BETWEEN ? AND ? ORDER BY measured_ts",
                           (pid, t0.timestamp(), t1.timestamp())).fetchall()
    finally:
        con.close()


def bare_buckets(db, pid, t0, t1, buckets=1000):
    """A second floor: the same min/max/mean bucketing of one metric, straight from SQLite."""
    import sqlite3

    a, b = t0.timestamp(), t1.timestamp()
    con = sqlite3.connect(db.url.split("///", 1)[1])
    try:
        return con.execute("SELECT CAST((measured_ts - ?) / ? AS INTEGER) AS k, min(sub_velocity_rms_mm_s), "
                           "max(sub_velocity_rms_mm_s), avg(sub_velocity_rms_mm_s), count(*), "
                           "min(measured_ts), max(measured_ts) "
                           "FROM results WHERE point_id=? AND current=1 AND measured_ts BETWEEN ? AND ? "
                           "GROUP BY k ORDER BY k", (a, (b - a) * (1 + 1e-9) / buckets, pid, a, b)).fetchall()
    finally:
        con.close()


def timed(fn, runs):
    out = []
    for _ in range(runs):
        t = time.perf_counter()
        fn()
        out.append((time.perf_counter() - t) * 1000)
    return out


def browser_times(base, asset_id, point_id, runs):
    sys.path.insert(0, str(ROOT / "tests" / "web"))
    from playwright.sync_api import sync_playwright

    args = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--no-first-run", "--disable-quic",
            "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1, EXCLUDE localhost"]
    out = []
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path="/usr/bin/chromium", headless=True, args=args)
        ctx = b.new_context(viewport={"width": 1280, "height": 900})
        page = ctx.new_page()
        page.goto(base + "/login")
        page.fill("#username", "bench1")
        page.fill("#password", "bench password 1")
        page.click("button[type=submit]")
        page.wait_for_url(base + "/")
        page.goto(f"{base}/assets/{asset_id}?point={point_id}")  # warm the cache with plotly.js once
        page.wait_for_function("() => document.body.dataset.ready === '1'", timeout=30_000)
        for _ in range(runs):
            t = time.perf_counter()
            page.goto(f"{base}/assets/{asset_id}?point={point_id}&days=365")  # a year on every chart
            page.wait_for_function("() => document.getElementById('bucket-note').textContent"
                                   ".includes('buckets')"
                                   " && document.getElementById('chart-half').data.length",
                                   timeout=30_000)
            out.append((time.perf_counter() - t) * 1000)
        b.close()
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=25)
    ap.add_argument("--browser-runs", type=int, default=7)
    ap.add_argument("--points", type=int, default=POINTS, help="points with a year of readings each")
    args = ap.parse_args(argv)
    globals()["POINTS"] = args.points
    import httpx
    from support.servers import serve_in_thread

    from server.app import create_app
    from server.services.users import add_user

    with tempfile.TemporaryDirectory() as d:
        settings, db, pids, t0, t1, asset_id = build(Path(d))
        app = create_app(settings)
        add_user(app.state.db, settings, username="bench1", password="bench password 1", role="viewer",
                 hashing=app.state.passwords)
        with serve_in_thread(app) as base:
            c = httpx.Client(base_url=base)
            c.post("/api/v1/session", json={"username": "bench1", "password": "bench password 1"})
            q = {"start": t0.isoformat(), "end": t1.isoformat()}
            rows = {"trend endpoint (1 metric, 1000 buckets)": [],
                    "series endpoint (7 metrics + fit, 600)": [], "bare SQL fetch of the same rows": [],
                    "bare SQL buckets of the same rows (1 metric)": [],
                    "GET /api/v1/me (HTTP + session check only)": []}
            for i in range(args.runs):
                pid = pids[i % len(pids)]
                rows["bare SQL fetch of the same rows"] += timed(lambda pid=pid: bare_sql(db, pid, t0, t1), 1)
                rows["bare SQL buckets of the same rows (1 metric)"] += timed(
                    lambda pid=pid: bare_buckets(db, pid, t0, t1), 1)
                rows["GET /api/v1/me (HTTP + session check only)"] += timed(
                    lambda: c.get("/api/v1/me").raise_for_status(), 1)
                rows["trend endpoint (1 metric, 1000 buckets)"] += timed(
                    lambda pid=pid: c.get(f"/api/v1/points/{pid}/trend",
                                          params={**q, "metric": "subharmonic.velocity_rms_mm_s",
                                                  "max_points": 1000}).raise_for_status(), 1)
                rows["series endpoint (7 metrics + fit, 600)"] += timed(
                    lambda pid=pid: c.get(f"/api/v1/dashboard/points/{pid}/series",
                                          params={**q, "max_points": 600, "limit": 20}).raise_for_status(), 1)
            n_rows = len(bare_sql(db, pids[0], t0, t1))
            answer = c.get(f"/api/v1/points/{pids[0]}/trend",
                           params={**q, "metric": "subharmonic.velocity_rms_mm_s"})
            n_out = len(answer.json()["t"])
            floor = statistics.median(rows["bare SQL fetch of the same rows"])
            print(f"\none point-year: {n_rows} rows -> {n_out} buckets; medians of {args.runs} "
                  "interleaved runs\n")
            print(f"| {'measurement':44} | median ms | p90 ms | vs bare SQL |")
            print(f"|{'-' * 46}|-----------|--------|-------------|")
            for name, vals in rows.items():
                med = statistics.median(vals)
                p90 = sorted(vals)[int(0.9 * (len(vals) - 1))]
                print(f"| {name:44} | {med:9.1f} | {p90:6.1f} | {med / floor:10.2f}x |")
            nav = browser_times(base, asset_id, pids[0], args.browser_runs)
            label = "asset page: navigation to 7 charts drawn (1 y)"
            print(f"| {label:44} | {statistics.median(nav):9.0f} | "
                  f"{sorted(nav)[int(0.9 * (len(nav) - 1))]:6.0f} | {'':11} |")
            print("\ngoals: trend endpoint < 150 ms median and < 2x bare SQL; asset page < 1500 ms")
        db.dispose()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
