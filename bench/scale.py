"""Queries at size: N results (default 10 million) on SQLite and PostgreSQL, then the dashboard's series
endpoint, the plant page's data and /metrics timed beside a bare SQL query of the same rows.

The plant: ``--points`` measurement points (default N / 10,000, i.e. 1,000 points with about 14 months of
hourly readings each), four per machine. Records and results are generated directly in the database by one
bulk ``INSERT ... SELECT`` per chunk (``generate_series`` on PostgreSQL, a recursive CTE on SQLite), in time
order across points as readings arrive; nothing is analysed. Then ``ANALYZE`` (PostgreSQL: ``VACUUM
ANALYZE``, which autovacuum does on its own for a table that grows by inserts).

Measured through a real uvicorn on 127.0.0.1 with a logged-in viewer, interleaved runs, medians:
  series   GET /api/v1/dashboard/points/{id}/series over one year (7 metrics, 600 buckets, trend fit)
  plant    GET /api/v1/dashboard/overview (the plant page's data: every machine, worst level, sparks)
  metrics  GET /metrics
  bare SQL the same point-year rows of one metric straight from the driver (no HTTP, no bucketing)
On PostgreSQL the query plan of the trend is printed, and (``--compare-index``) the series endpoint is timed
again after dropping the covering index of migration 0007, to show what it serves.
Usage: .venv/bin/python bench/scale.py [--rows 10000000] [--backend sqlite|postgresql|both] [--runs 15]
PostgreSQL comes from HALFWATCH_BENCH_POSTGRES_URL or HALFWATCH_TEST_POSTGRES_URL (a fresh schema, dropped).
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import random
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests"), str(ROOT / "bench")]

CHUNK = 1_000_000
PER_ASSET = 4
T_END = dt.datetime(2026, 11, 1, tzinfo=dt.UTC)
USER, PASSWORD = "scale1", "scale password 1"


def make_plant(db, n_points: int) -> list[int]:
    from sqlalchemy import insert, select

    from server.storage.tables import Area, Asset, Point, Site

    with db.unit_of_work() as s:
        site = Site(name="Scale works")
        s.add(site)
        s.flush()
        areas = [Area(site_id=site.id, name=f"Hall {i + 1}") for i in range(max(1, n_points // 200))]
        s.add_all(areas)
        s.flush()
        n_assets = -(-n_points // PER_ASSET)
        s.execute(insert(Asset), [{"area_id": areas[i % len(areas)].id, "name": f"Pump {i + 1:04d}",
                                   "kind": "pump",
                                   "machine_group": 2, "foundation": "rigid", "nominal_speed_hz": 24.75,
                                   "forcing_kind": "shaft", "forcing_multiplier": 1.0, "description": ""}
                                  for i in range(n_assets)])
        assets = s.scalars(select(Asset.id).order_by(Asset.id)).all()
        s.execute(insert(Point), [{"asset_id": assets[i // PER_ASSET], "name": f"P{i % PER_ASSET + 1}",
                                   "location": "", "direction": "radial", "units": "m/s2"}
                                  for i in range(n_points)])
        return list(s.scalars(select(Point.id).order_by(Point.id)).all())


def fill(db, point_ids: list[int], rows: int) -> tuple[float, float]:
    """rows records + results, hour by hour across all points; returns (t0 epoch, seconds taken)."""
    from sqlalchemy import text

    n_points = len(point_ids)
    p0 = point_ids[0]
    assert point_ids == list(range(p0, p0 + n_points)), "bench points must have consecutive ids"
    hours = -(-rows // n_points)
    t0 = T_END.timestamp() - hours * 3600.0
    pg = db.dialect == "postgresql"
    start = time.perf_counter()
    with db.write() as conn:
        first = conn.execute(text("SELECT coalesce(max(id), 0) FROM records")).scalar() + 1
    for lo in range(0, rows, CHUNK):
        hi = min(rows, lo + CHUNK)
        # i = 0..rows-1: hour i / n_points, point i % n_points; record id = first + i
        if pg:
            src = f"FROM generate_series({lo}, {hi - 1}) AS g(i)"
            ts = f"({t0} + (i / {n_points}) * 3600.0)"
            at = f"to_timestamp({ts})"
            amp = f"(0.2 + 0.1 * sin(i / {n_points} / 500.0) + 0.02 * ((i % 9973) * 31 % 101) / 101.0)"
            pre = ""
        else:
            src = "FROM g"
            ts = f"({t0} + (i / {n_points}) * 3600.0)"
            at = f"strftime('%Y-%m-%d %H:%M:%f', {ts}, 'unixepoch')"
            amp = f"(0.2 + 0.1 * sin(i / {n_points} / 500.0) + 0.02 * ((i % 9973) * 31 % 101) / 101.0)"
            pre = f"WITH RECURSIVE g(i) AS (SELECT {lo} UNION ALL SELECT i + 1 FROM g WHERE i < {hi - 1}) "
        blob = "decode('00', 'hex')" if pg else "x'00'"
        with db.write() as conn:
            conn.execute(text(
                f"INSERT INTO records (id, point_id, measured_at, received_at, fs_hz, n_samples, units, "
                f"speed_hz, "
                f"speed_source, origin, uploader, client_ref, checksum) {pre}"
                f"SELECT {first} + i, {p0} + i % {n_points}, {at}, {at}, 2560.0, 16384, 'm/s2', 24.75, "
                f"'given', "
                f"'api', 'scale', NULL, '{'0' * 64}' {src}"))
            conn.execute(text(
                f"INSERT INTO results (record_id, point_id, measured_ts, analysis_version, current, "
                f"created_at, "
                f"data, spectrum, forcing_hz, sub_detected, sub_class, sub_frequency_hz, sub_accel_peak, "
                f"sub_velocity_peak_mm_s, sub_velocity_rms_mm_s, sub_snr_db, growth_rate_per_s, "
                f"overall_velocity_rms_mm_s, zone, quality_ok, one_x_accel_peak, one_x_velocity_rms_mm_s, "
                f"precursor_rate_per_s) {pre}"
                f"SELECT {first} + i, {p0} + i % {n_points}, {ts}, 'scale', {'true' if pg else '1'}, {at}, "
                f"'{{\"version\":\"2.0\"}}', {blob}, "
                f"24.75, {'true' if pg else '1'}, 'half-order', 12.375, {amp}, {amp} * 6.4, "
                f"{amp} * 4.5, 18.0, 0.0, 3.0 + {amp}, 'B', {'true' if pg else '1'}, 1.0, 3.2, NULL {src}"))
        print(f"  {hi:>11,} rows ({time.perf_counter() - start:6.0f} s)", flush=True)
    if pg:
        with db.write_engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
            conn.execute(text("VACUUM ANALYZE records"))
            conn.execute(text("VACUUM ANALYZE results"))
    else:
        with db.write() as conn:
            conn.execute(text("ANALYZE"))
    return t0, time.perf_counter() - start


def bare(db, pid: int, a: float, b: float):
    """The floor: the same point-year rows of one metric through the driver itself."""
    sql = ("SELECT measured_ts, sub_velocity_rms_mm_s FROM results WHERE point_id = {p} AND current = {t} "
           "AND measured_ts BETWEEN {p} AND {p} ORDER BY measured_ts")
    raw = db.read_engine.raw_connection()
    try:
        cur = raw.cursor()
        if db.dialect == "postgresql":
            cur.execute(sql.format(p="%s", t="true"), (pid, a, b))
        else:
            cur.execute(sql.format(p="?", t="1"), (pid, a, b))
        return cur.fetchall()
    finally:
        raw.close()


def timed(fn) -> float:
    t = time.perf_counter()
    fn()
    return (time.perf_counter() - t) * 1000


def run_backend(name: str, url: str, rows: int, n_points: int, runs: int, compare_index: bool, tmp: Path):
    import httpx
    from benchdb import fresh_database
    from sqlalchemy import text
    from support.fixtures import settings_for
    from support.servers import serve_in_thread

    from server.app import create_app
    from server.migrations import upgrade
    from server.services.users import add_user
    from server.storage import Database

    db_url, cleanup = fresh_database(tmp, url if name == "postgresql" else None)
    try:
        upgrade(db_url)
        settings = settings_for(tmp / name, database_url=db_url)
        db = Database.from_settings(settings)
        pids = make_plant(db, n_points)
        print(f"{name}: filling {rows:,} results on {len(pids)} points ...", flush=True)
        t0, fill_s = fill(db, pids, rows)
        app = create_app(settings)
        add_user(app.state.db, settings, username=USER, password=PASSWORD, role="viewer",
                 hashing=app.state.passwords)
        a, b = T_END.timestamp() - 365 * 86400.0, T_END.timestamp()
        q = {"start": dt.datetime.fromtimestamp(a, dt.UTC).isoformat(), "end": T_END.isoformat(),
             "max_points": 600, "limit": 20}
        out: dict[str, list[float]] = {"trend endpoint (1 point-year, 1 metric)": [],
                                       "series endpoint (1 point-year, 7 metrics)": [],
                                       "bare SQL, same rows (1 metric)": [],
                                       "plant page data (/dashboard/overview)": [], "/metrics": []}
        rnd = random.Random(5)
        with serve_in_thread(app) as base:
            c = httpx.Client(base_url=base, timeout=300)
            c.post("/api/v1/session", json={"username": USER, "password": PASSWORD}).raise_for_status()
            c.get(f"/api/v1/dashboard/points/{pids[0]}/series", params=q).raise_for_status()  # warm
            for _ in range(runs):
                pid = rnd.choice(pids)
                out["bare SQL, same rows (1 metric)"].append(timed(lambda pid=pid: bare(db, pid, a, b)))
                out["trend endpoint (1 point-year, 1 metric)"].append(timed(
                    lambda pid=pid: c.get(f"/api/v1/points/{pid}/trend", params={
                        "start": q["start"], "end": q["end"], "metric": "subharmonic.velocity_rms_mm_s",
                        "max_points": 1000}).raise_for_status()))
                out["series endpoint (1 point-year, 7 metrics)"].append(timed(
                    lambda pid=pid: c.get(f"/api/v1/dashboard/points/{pid}/series",
                                          params=q).raise_for_status()))
            for _ in range(max(3, runs // 3)):
                out["plant page data (/dashboard/overview)"].append(timed(
                    lambda: c.get("/api/v1/dashboard/overview").raise_for_status()))
                out["/metrics"].append(timed(lambda: c.get("/metrics").raise_for_status()))
            n_rows = len(bare(db, pids[0], a, b))
            plan = None
            if name == "postgresql":
                with db.read_engine.connect() as conn:
                    plan = [r[0] for r in conn.execute(text(
                        "EXPLAIN SELECT measured_ts, sub_velocity_rms_mm_s FROM results WHERE point_id = :p "
                        "AND "
                        "current AND measured_ts BETWEEN :a AND :b ORDER BY measured_ts"),
                        {"p": pids[0], "a": a, "b": b})]
                if compare_index:
                    with db.write() as conn:
                        conn.execute(text("DROP INDEX ix_results_trend_pg"))
                    key = "series endpoint, covering index dropped"
                    key2 = "trend endpoint, covering index dropped"
                    out[key], out[key2] = [], []
                    for _ in range(runs):
                        pid = rnd.choice(pids)
                        out[key2].append(timed(lambda pid=pid: c.get(f"/api/v1/points/{pid}/trend", params={
                            "start": q["start"], "end": q["end"], "metric": "subharmonic.velocity_rms_mm_s",
                            "max_points": 1000}).raise_for_status()))
                        out[key].append(timed(lambda pid=pid: c.get(f"/api/v1/dashboard/points/{pid}/series",
                                                                    params=q).raise_for_status()))
        size = None
        if name == "postgresql":
            with db.read_engine.connect() as conn:
                size = conn.execute(text("SELECT pg_total_relation_size('results') + "
                                         "pg_total_relation_size('records')")).scalar()
        else:
            size = Path(db_url.split("///", 1)[1]).stat().st_size
        db.dispose()
        return {"out": out, "fill_s": fill_s, "n_rows": n_rows, "plan": plan, "bytes": size}
    finally:
        cleanup()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--points", type=int, default=None, help="default rows / 10,000")
    ap.add_argument("--backend", choices=("sqlite", "postgresql", "both"), default="both")
    ap.add_argument("--runs", type=int, default=15)
    ap.add_argument("--no-compare-index", dest="compare_index", action="store_false")
    args = ap.parse_args(argv)
    n_points = args.points or max(1, args.rows // 10_000)
    pg_url = os.environ.get("HALFWATCH_BENCH_POSTGRES_URL") or os.environ.get("HALFWATCH_TEST_POSTGRES_URL")
    backends = ["sqlite", "postgresql"] if args.backend == "both" else [args.backend]
    if "postgresql" in backends and not pg_url:
        print("no PostgreSQL URL (HALFWATCH_BENCH_POSTGRES_URL): SQLite only")
        backends.remove("postgresql")
    results = {}
    tmp = Path(tempfile.mkdtemp(prefix="halfwatch-scale-"))
    try:
        for name in backends:
            results[name] = run_backend(name, pg_url or "", args.rows, n_points, args.runs,
                                        args.compare_index, tmp)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"\n{args.rows:,} results on {n_points:,} points (hourly); one point-year = the newest 365 days "
          f"of a point; {os.cpu_count()} cores, medians of {args.runs} interleaved runs (plant and /metrics: "
          f"{max(3, args.runs // 3)})\n")
    for name, r in results.items():
        out = r["out"]
        floor = statistics.median(out["bare SQL, same rows (1 metric)"])
        print(f"{name}: filled in {r['fill_s']:.0f} s, records + results {r['bytes'] / 1e9:.2f} GB; "
              f"a point-year is {r['n_rows']} rows")
        print(f"| {'measurement':44} | median ms | p90 ms | vs bare SQL |")
        print(f"|{'-' * 46}|-----------|--------|-------------|")
        for key, vals in out.items():
            med = statistics.median(vals)
            p90 = sorted(vals)[int(0.9 * (len(vals) - 1))]
            print(f"| {key:44} | {med:9.1f} | {p90:6.1f} | {med / floor:10.1f}x |")
        if r["plan"]:
            print("trend query plan: " + " / ".join(p.strip() for p in r["plan"]))
        print()
    print("goal: the trend of one point-year (series endpoint) <= 150 ms at 10 million results on PostgreSQL")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
