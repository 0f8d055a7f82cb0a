"""Bytes per point-year with default retention, measured on a generated year (docs/data.md).

Part 1, bytes per result: demo-like readings (the demo's record lengths and conditions) are simulated
and analysed once; the stored row is measured with the earlier chart blob (float32, max-hold to
2,048 / 1,000 points) and with the compact one (server/storage/packing.py).

Part 2, a year: P points (default 20) read hourly for 365 days, written straight into the tables
(server.retention.generate: records, waveforms, finished jobs, current results, alarm transitions) with
one real demo reading's waveform blob, result JSON and compact chart blob. Retention runs at the end of
every week with the default settings (30 days, 3 readings either side of a transition, batches of 200),
and once more at the end of the year. Then the database's own size accounting gives the bytes per table
(SQLite: the dbstat table, indexes counted with their table; PostgreSQL: pg_total_relation_size, TOAST
and indexes included). The year is projected to 100, 1,000 and 10,000 points linearly (every part of it
is per point). Alarm transitions per point-year are an assumption of this bench (``--transitions``).

    python bench/storage_year.py [--points 20] [--days 365] [--transitions 24] [--postgres URL]
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

START = dt.datetime(2025, 1, 1, 0, 7, tzinfo=dt.UTC)
TABLES = ("records", "waveforms", "jobs", "results", "alarm_events", "waveform_removals", "config_changes",
          "record_pins")


def demo_readings(n: int):
    """(point name, samples, analysis) for n demo points at a mid-year condition."""
    from halfwatch_demo import plant as demo_plant
    from halfwatch_demo.backfill import Task, compute
    from halfwatch_demo.scenario import condition, seed_for

    when = dt.datetime(2026, 5, 1, 10, tzinfo=dt.UTC)
    out = []
    points = list(demo_plant.all_points())
    for asset, point in points[:: max(1, len(points) // n)][:n]:
        c = condition(asset, point, 40.0, 10, seed_for(point.name, "bench"))
        task = Task(point.name, 1, when, point.online, c.kind, c.params, c.speed_hz, asset.fs_hz,
                    demo_plant.record_samples(asset), asset.multiplier, asset.group, asset.foundation)
        x, analysis, err = compute(task)
        if err is None:
            out.append((point.name, x, analysis))
    return out


def result_bytes(readings):
    """Table rows: bytes per result with the earlier and the compact chart blob (JSON + blob + columns)."""
    import json

    from analysis.results import max_hold
    from server.storage.packing import pack_arrays
    from server.worker import ENVELOPE_POINTS, chart_blob

    rows, before, after = [], [], []
    for name, _x, an in readings:
        data = len(json.dumps(an.to_dict(), separators=(",", ":")))
        f, a = max_hold(an.spectrum.freqs_hz, an.spectrum.amplitude, 2048)
        et, ev = max_hold(an.envelope_t_s, an.envelope, ENVELOPE_POINTS)
        old = len(pack_arrays({"units": "g", "amplitude": "peak"}, freqs_hz=f, amplitude=a, envelope_t_s=et,
                              envelope=ev))
        new = len(chart_blob("g", an))
        cols = 150  # typed metric columns, ids and times (about 18 numbers)
        before.append(data + old + cols)
        after.append(data + new + cols)
        rows.append((name, data, old, new, data + old + cols, data + new + cols))
    return rows, sum(before) / len(before), sum(after) / len(after)


def table_bytes(db) -> dict[str, int]:
    from sqlalchemy import text

    with db.read_engine.connect() as conn:
        if db.dialect == "sqlite":
            owner = dict(conn.execute(text("SELECT name, tbl_name FROM sqlite_master")).all())
            sizes: dict[str, int] = {}
            for name, size in conn.execute(text("SELECT name, SUM(pgsize) FROM dbstat GROUP BY name")):
                table = owner.get(name, name)
                sizes[table] = sizes.get(table, 0) + int(size)
            return sizes
        return {t: int(conn.execute(text(f"SELECT pg_total_relation_size('{t}')")).scalar() or 0)
                for t in conn.execute(text(
                    "SELECT tablename FROM pg_tables WHERE schemaname = current_schema()")).scalars()}


def _vacuum(db) -> None:
    """Plain VACUUM of the tables retention deletes from: their free space (TOAST included) is reused by
    the next week's readings, as autovacuum makes it in a running service (a year generated in an hour
    outruns autovacuum, and the deleted waveforms would be counted as if they were kept)."""
    from sqlalchemy import text

    with db.write_engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
        for table in ("waveforms", "records", "jobs", "results"):
            conn.execute(text(f"VACUUM {table}"))


def generate_year(url: str, points: int, days: int, transitions: int, template,
                  vacuum: bool = True) -> tuple[dict, dict, float]:
    from benchdb import migrated_plant

    from server.retention.apply import run
    from server.retention.generate import add_readings
    from server.settings import Settings

    db, pids = migrated_plant(url, assets=points)
    settings = Settings(database_url=url)
    hours = days * 24
    every = max(1, 8760 // max(1, transitions))  # transitions per point-year, staggered between points
    t0 = time.perf_counter()
    deleted = freed = 0
    for week in range(0, days, 7):
        lo, hi = week * 24, min(hours, (week + 7) * 24)
        for k, pid in enumerate(pids):
            times = [START + dt.timedelta(hours=h) for h in range(lo, hi)]
            marks = tuple(i for i, h in enumerate(range(lo, hi)) if (h + 37 * k) % every == every // 2)
            add_readings(db, pid, times, template, transitions=marks)
        out = run(db, settings, now=START + dt.timedelta(hours=hi))
        deleted, freed = deleted + out.deleted, freed + out.freed_bytes
        if vacuum and db.dialect == "postgresql":  # what autovacuum does between retention runs in service
            _vacuum(db)
    final = run(db, settings, now=START + dt.timedelta(hours=hours))
    if vacuum and db.dialect == "postgresql":
        _vacuum(db)
    elapsed = time.perf_counter() - t0
    sizes = table_bytes(db)
    kept = final.plan.kept
    with db.read() as s:
        from sqlalchemy import func, select

        from server.storage.tables import Record, Waveform

        counts = {"readings": s.scalar(select(func.count()).select_from(Record)),
                  "waveforms kept": s.scalar(select(func.count()).select_from(Waveform)),
                  "deleted": deleted + final.deleted,
                  **{f"kept past horizon: {r}": n for r, n in kept.items()}}
    db.dispose()
    return sizes, counts, elapsed


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=20)
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--transitions", type=int, default=24, help="alarm transitions per point-year (assumed)")
    ap.add_argument("--demo-readings", type=int, default=8)
    ap.add_argument("--postgres", default=None, help="also measure on this PostgreSQL URL (a new schema)")
    ap.add_argument("--no-sqlite", action="store_true", help="measure PostgreSQL only")
    ap.add_argument("--no-vacuum", action="store_true",
                    help="PostgreSQL: no VACUUM after the weekly retention runs (dead space then counts)")
    args = ap.parse_args(argv)

    from server.retention.generate import Template
    from server.storage.blobs import encode_waveform
    from server.worker import chart_blob

    readings = demo_readings(args.demo_readings)
    rows, before, after = result_bytes(readings)
    print("bytes per result (demo-like readings; JSON + chart blob + ~150 B of columns)")
    print(f"{'point':<28}{'JSON':>7}{'blob before':>13}{'blob after':>12}{'row before':>12}{'row after':>11}")
    for r in rows:
        print(f"{r[0]:<28}{r[1]:>7}{r[2]:>13}{r[3]:>12}{r[4]:>12}{r[5]:>11}")
    print(f"{'average':<28}{'':>7}{'':>13}{'':>12}{before:>12.0f}{after:>11.0f}   after/before "
          f"{after / before:.2f}\n")

    import json

    sized = sorted((len(encode_waveform(r[1])[1]), i) for i, r in enumerate(readings))
    name, x, an = readings[sized[len(sized) // 2][1]]  # the median waveform size of the demo readings
    codec, blob = encode_waveform(x)
    tpl = Template(codec, blob, json.dumps(an.to_dict(), separators=(",", ":")), chart_blob("g", an),
                   fs_hz=an.sample_rate_hz, n_samples=int(x.size))
    print(f"generated year: {args.points} points x {args.days} days hourly, one {name} reading as template "
          f"({x.size} samples, waveform {len(blob)} B, result JSON {len(tpl.data)} B, chart "
          f"{len(tpl.spectrum)} B), {args.transitions} alarm transitions per point-year, default retention\n")
    backends = ([] if args.no_sqlite else [("SQLite", None)]) + (
        [("PostgreSQL", args.postgres)] if args.postgres else [])
    from benchdb import fresh_database

    for label, pg in backends:
        with tempfile.TemporaryDirectory() as tmp:
            url, cleanup = fresh_database(Path(tmp), pg)
            try:
                sizes, counts, elapsed = generate_year(url, args.points, args.days, args.transitions, tpl,
                                                       vacuum=not args.no_vacuum)
            finally:
                cleanup() if pg else None
        per = {t: sizes.get(t, 0) / args.points * 365 / args.days for t in TABLES}
        other = (sum(sizes.values()) / args.points * 365 / args.days) - sum(per.values())
        total = sum(per.values()) + other
        print(f"{label}: bytes per point-year ({elapsed:.0f} s to generate; {counts})")
        print(f"{'table':<20}{'MB / point-year':>16}")
        for t in TABLES:
            print(f"{t:<20}{per[t] / 1e6:>16.2f}")
        print(f"{'other tables':<20}{other / 1e6:>16.2f}")
        print(f"{'total':<20}{total / 1e6:>16.2f}   goal <= 100 MB: {'met' if total <= 100e6 else 'NOT met'}")
        window = per["waveforms"] * min(1.0, 24 * 30 * args.points / max(1, counts["waveforms kept"]))
        print(f"{'  of which window':<20}{window / 1e6:>16.2f}   (waveforms of the last 30 days: a fixed "
              f"cost per point; a further year adds {(total - window) / 1e6:.1f} MB)")
        no_retention = total - per["waveforms"] + per["waveforms"] / max(1, counts["waveforms kept"]) * (
            counts["readings"] / args.points * 365 / args.days) * args.points
        print(f"{'without retention':<20}{no_retention / 1e6:>16.2f}   (every waveform kept)")
        print(f"{'points':>10}{'GB / year':>12}{'GB / year without retention':>30}")
        for n in (args.points, 100, 1000, 10000):
            print(f"{n:>10}{total * n / 1e9:>12.1f}{no_retention * n / 1e9:>30.1f}")
        print()
    return 0


if __name__ == "__main__":
    sys.exit(main())
