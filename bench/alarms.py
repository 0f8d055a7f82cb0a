"""Alarm benchmark: rule evaluation per analysed record (10 rules per point) against the analysis time
of one record of 16384 and of 65536 samples (the typical record, the natural denominator), and outbox
throughput against a local aiosmtpd server. Prints a table of ratios measured in one run, with the
number of SQL statements one evaluation executes.

    .venv/bin/python bench/alarms.py [--records 40] [--emails 200]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import socket
import statistics
import sys
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

EXTRA_RULES = (("order_1x_velocity", 4.5, 7.1), ("order_2x_velocity", 2.8, 4.5), ("crest_factor", 5.0, 8.0))


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _plant(db):
    from server.storage.tables import Area, Asset, Point, Site

    with db.unit_of_work() as s:
        site = Site(name="Bench works")
        s.add(site)
        s.flush()
        area = Area(site_id=site.id, name="Bench area")
        s.add(area)
        s.flush()
        asset = Asset(area_id=area.id, name="Bench pump", nominal_speed_hz=24.75, machine_group=2,
                      foundation="rigid")
        s.add(asset)
        s.flush()
        point = Point(asset_id=asset.id, name="B-DE-H")
        s.add(point)
        s.flush()
        return site.id, point.id


FS_HZ = 2560.0
SIZES = (16384, 65536)  # a short record, and the typical one (the natural denominator)


def _signal(rng, i: int, n: int) -> np.ndarray:
    t = np.arange(n) / FS_HZ
    half = 0.02 + 0.01 * i
    x = 0.4 * np.sin(2 * np.pi * 24.75 * t) + half * np.sin(2 * np.pi * 12.375 * t + 0.3)
    return (x + 0.02 * rng.standard_normal(n)).astype(np.float32)


class StatementCounter:
    """Counts the SQL statements an engine executes while ``on`` is set (executemany counts once)."""

    def __init__(self, engine):
        from sqlalchemy import event

        self.on, self.n = False, 0
        event.listen(engine, "before_cursor_execute", self._count)

    def _count(self, *args):
        if self.on:
            self.n += 1


def _now() -> tuple[float, float]:
    """(wall clock, CPU time of this process): the machine is shared, so CPU time is reported too."""
    return time.perf_counter(), time.process_time()


def _since(start: tuple[float, float]) -> tuple[float, float]:
    wall, cpu = _now()
    return wall - start[0], cpu - start[1]


def _store(db, point_id, at, data, tag, evaluate=None):
    """A worker-like transaction: record + result rows, then (optionally) ``evaluate(session, rec, res)``."""
    from server.storage.tables import Record, Result

    start = _now()
    inner = (0.0, 0.0)
    with db.unit_of_work() as s:
        rec = Record(point_id=point_id, measured_at=at, fs_hz=FS_HZ, n_samples=16384, units="m/s2",
                     origin="api", uploader="bench", checksum=tag)
        s.add(rec)
        s.flush()
        res = Result(record_id=rec.id, point_id=point_id, measured_ts=at.timestamp(),
                     analysis_version="bench", data=json.dumps(data), spectrum=b"")
        s.add(res)
        s.flush()
        if evaluate is not None:
            t = _now()
            # as worker.store does: the result's columns with the analysis as a dict
            evaluate(s, rec, SimpleNamespace(id=res.id, measured_ts=res.measured_ts, data=data))
            s.flush()
            inner = _since(t)
    return _since(start), inner


def bench_rules(tmp: Path, n_records: int) -> dict:
    from analysis import analyze_record
    from server.alarms import service
    from server.alarms.checks import trend_and_forecast
    from server.alarms.engine import Reading, step
    from server.alarms.evaluate import evaluate_result
    from server.alarms.rules import RuleSpec, default_rules, result_metrics
    from server.migrations import upgrade
    from server.settings import Settings
    from server.storage import Database

    settings = Settings(data_dir=tmp / "rules")
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    _site, point_id = _plant(db)
    for metric, alert, danger in EXTRA_RULES:
        service.set_rule(db, {"point_id": point_id, "metric": metric, "alert": alert, "danger": danger},
                         actor="bench")
    n_rules = len(service.list_rules(db, point_id=point_id))
    counter = StatementCounter(db.write_engine)
    rng = np.random.default_rng(7)
    t = {key: [] for key in ("store", "store_eval", "pure", "eval_call", "statements",
                             *(f"analysis_{n}" for n in SIZES))}
    t0 = dt.datetime(2026, 1, 5, tzinfo=dt.UTC)
    specs = default_rules() + [RuleSpec(m, a, d) for m, a, d in EXTRA_RULES]

    def evaluate(s, rec, res):
        counter.on, counter.n = True, 0
        evaluate_result(s, rec, res, settings=settings, now=rec.measured_at)
        s.flush()
        counter.on = False
        t["statements"].append(counter.n)

    for i in range(n_records):
        data = None
        for n in SIZES:  # both record lengths in the same loop, so drift of the machine hits both alike
            x = _signal(rng, i, n)
            start = _now()
            analysis = analyze_record(x, FS_HZ, units="m/s2", nominal_hz=24.75)
            t[f"analysis_{n}"].append(_since(start))
            data = data or analysis.to_dict()
        at = t0 + dt.timedelta(hours=i)
        # The first transaction after an analysis runs with cold caches: alternate which one goes first.
        for first in ((False, True) if i % 2 else (True, False)):
            if first:
                total, inner = _store(db, point_id, at, data, f"{i}-eval", evaluate)
                t["store_eval"].append(total)
                t["eval_call"].append(inner)
            else:
                t["store"].append(_store(db, point_id, at, data, f"{i}-plain")[0])
        history = [[at.timestamp() - 3600.0 * (30 - j), 0.5 + 0.01 * j] for j in range(30)]
        start = _now()
        metrics = result_metrics(data)
        metrics["trend_db_per_day"], metrics["time_to_limit_days"] = trend_and_forecast(history, limit=2.8)
        for spec in specs:
            value = metrics.get(spec.metric)
            levels = spec.levels(data)
            if value is not None and levels is not None:
                step(spec, "normal", [], Reading(value, *levels))
        t["pure"].append(_since(start))
    db.dispose()
    statements = t.pop("statements")
    # medians of wall and of CPU time, separately: (wall, cpu) per step
    out = {key: tuple(statistics.median(v[k] for v in values) for k in (0, 1)) for key, values in t.items()}
    out["difference"] = tuple(out["store_eval"][k] - out["store"][k] for k in (0, 1))
    out.update(rules=n_rules, statements=statements)
    return out


def bench_outbox(tmp: Path, n_emails: int) -> dict:
    from aiosmtpd.controller import Controller

    from server.alarms.mailer import run_mailer_once
    from server.alarms.notify import message_id
    from server.alarms.tables import AlarmEvent, OutboxMessage
    from server.migrations import upgrade
    from server.settings import Settings
    from server.storage import Database

    class Count:
        n = 0

        async def handle_DATA(self, server, session, envelope):
            Count.n += 1
            return "250 OK"

    port = _free_port()
    ctl = Controller(Count(), hostname="127.0.0.1", port=port, ready_timeout=10)
    ctl.start()
    settings = Settings(data_dir=tmp / "outbox", smtp_host="127.0.0.1", smtp_port=port)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    site_id, point_id = _plant(db)
    now = dt.datetime.now(dt.UTC)
    where = {"point_id": point_id, "point": "B-DE-H", "asset_id": 1, "asset": "Bench pump", "area_id": 1,
             "area": "Bench area", "site_id": site_id, "site": "Bench works"}
    with db.unit_of_work() as s:
        ev = AlarmEvent(kind="transition", point_id=point_id, asset_id=1, area_id=1, site_id=site_id,
                        metric="half_order_velocity", from_level="normal", to_level="alert", value=1.6,
                        threshold=1.4, summary="bench", created_at=now,
                        details={"where": where, "metrics": {}, "finding": {}})
        s.add(ev)
        s.flush()
        for i in range(n_emails):
            key = f"alarm:{ev.id}:p{i}@example.test"
            s.add(OutboxMessage(dedupe_key=key, kind="alarm", event_id=ev.id, recipient=f"p{i}@example.test",
                                payload={"event_ids": [ev.id]}, message_id=message_id(key), status="pending",
                                attempts=0, next_attempt_at=now, created_at=now))
    start = time.perf_counter()
    sent = run_mailer_once(db, settings)
    elapsed = time.perf_counter() - start
    ctl.stop()
    db.dispose()
    return {"sent": sent, "received": Count.n, "elapsed": elapsed}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--records", type=int, default=40)
    ap.add_argument("--emails", type=int, default=200)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        r = bench_rules(Path(tmp), args.records)
        o = bench_outbox(Path(tmp), args.emails)
    a16, a64 = r["analysis_16384"], r["analysis_65536"]
    rows = [
        ("analysis of one record (16384 samples)", "analysis_16384"),
        ("analysis of one record (65536 samples)", "analysis_65536"),
        (f"rule logic only: metrics, trend fit, {r['rules']} steps", "pure"),
        ("store result, no alarms (SQLite txn)", "store"),
        (f"store result + evaluate {r['rules']} rules (SQLite txn)", "store_eval"),
        ("  difference: alarm evaluation + its commit", "difference"),
        ("  evaluate_result() call alone (incl. flush)", "eval_call"),
    ]
    print(f"Alarm rule cost per analysed record (median of {args.records} records, {r['rules']} rules per "
          "point); wall clock and CPU time of this process")
    print(f"{'step':50s} {'wall ms':>8s} {'x 16384':>8s} {'x 65536':>8s} {'cpu ms':>8s} {'x 16384':>8s} "
          f"{'x 65536':>8s}")
    for name, key in rows:
        (wall, cpu) = r[key]
        print(f"{name:50s} {wall * 1e3:8.3f} {wall / a16[0]:8.2%} {wall / a64[0]:8.2%} {cpu * 1e3:8.3f} "
              f"{cpu / a16[1]:8.2%} {cpu / a64[1]:8.2%}")
    counts = r["statements"]
    print(f"SQL statements per evaluate_result() call: median {statistics.median(counts):.0f}, max "
          f"{max(counts)} (a record that changes levels also writes events, states and outbox rows)")
    for label, key in (("rule logic (metrics, trend, 10 state steps)", "pure"),
                       ("alarm evaluation with its database work", "eval_call")):
        for n, denom in ((16384, a16), (65536, a64)):
            ratio = max(r[key][k] / denom[k] for k in (0, 1))
            verdict = "meets" if ratio < 0.05 else "misses"
            print(f"goal < 5 % of the analysis time ({n} samples): {label} -> {verdict} "
                  f"(worse of wall and CPU: {ratio:.2%})")
    print()
    print(f"Outbox throughput against a local aiosmtpd server ({args.emails} emails, one connection)")
    print(f"{'sent':>6s} {'received':>9s} {'seconds':>9s} {'emails/s':>9s} {'ms/email':>9s}")
    print(f"{o['sent']:6d} {o['received']:9d} {o['elapsed']:9.3f} {o['sent'] / o['elapsed']:9.1f} "
          f"{o['elapsed'] / max(1, o['sent']) * 1e3:9.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
