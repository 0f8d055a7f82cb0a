"""Alarm benchmark: rule evaluation per analysed record (10 rules per point) against the analysis time
of one record, and outbox throughput against a local aiosmtpd server. Prints a table of ratios
measured in one run.

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


def _signal(rng, i: int) -> np.ndarray:
    fs, n = 2560.0, 16384
    t = np.arange(n) / fs
    half = 0.02 + 0.01 * i
    x = 0.4 * np.sin(2 * np.pi * 24.75 * t) + half * np.sin(2 * np.pi * 12.375 * t + 0.3)
    return (x + 0.02 * rng.standard_normal(n)).astype(np.float32)


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
    from server.storage.tables import Record, Result

    settings = Settings(data_dir=tmp / "rules")
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    _site, point_id = _plant(db)
    for metric, alert, danger in EXTRA_RULES:
        service.set_rule(db, {"point_id": point_id, "metric": metric, "alert": alert, "danger": danger},
                         actor="bench")
    n_rules = len(service.list_rules(db, point_id=point_id))
    rng = np.random.default_rng(7)
    t_analysis, t_store, t_store_eval, t_pure, t_eval_call = [], [], [], [], []
    t0 = dt.datetime(2026, 1, 5, tzinfo=dt.UTC)
    specs = default_rules() + [RuleSpec(m, a, d) for m, a, d in EXTRA_RULES]
    for i in range(n_records):
        x = _signal(rng, i)
        start = time.perf_counter()
        analysis = analyze_record(x, 2560.0, units="m/s2", nominal_hz=24.75)
        t_analysis.append(time.perf_counter() - start)
        data = analysis.to_dict()
        at = t0 + dt.timedelta(hours=i)
        for evaluate, sink in ((False, t_store), (True, t_store_eval)):
            start = time.perf_counter()
            with db.unit_of_work() as s:
                rec = Record(point_id=point_id, measured_at=at, fs_hz=2560.0, n_samples=x.size, units="m/s2",
                             origin="api", uploader="bench", checksum=f"{i}{evaluate}")
                s.add(rec)
                s.flush()
                res = Result(record_id=rec.id, point_id=point_id, measured_ts=at.timestamp(),
                             analysis_version="bench", data=json.dumps(data), spectrum=b"")
                s.add(res)
                s.flush()
                if evaluate:
                    inner = time.perf_counter()
                    evaluate_result(s, rec, res, settings=settings, now=at)
                    s.flush()
                    t_eval_call.append(time.perf_counter() - inner)
            sink.append(time.perf_counter() - start)
        history = [[at.timestamp() - 3600.0 * (30 - j), 0.5 + 0.01 * j] for j in range(30)]
        start = time.perf_counter()
        metrics = result_metrics(data)
        metrics["trend_db_per_day"], metrics["time_to_limit_days"] = trend_and_forecast(history, limit=2.8)
        for spec in specs:
            value = metrics.get(spec.metric)
            levels = spec.levels(data)
            if value is not None and levels is not None:
                step(spec, "normal", [], Reading(value, *levels))
        t_pure.append(time.perf_counter() - start)
    db.dispose()
    med = statistics.median
    return {"rules": n_rules, "analysis": med(t_analysis), "store": med(t_store),
            "store_eval": med(t_store_eval), "pure": med(t_pure), "eval_call": med(t_eval_call)}


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
    eval_cost = r["store_eval"] - r["store"]
    rows = [
        ("analysis of one record (16384 samples)", r["analysis"] * 1e3, 1.0),
        (f"rule logic only: metrics, trend fit, {r['rules']} steps", r["pure"] * 1e3,
         r["pure"] / r["analysis"]),
        ("store result, no alarms (SQLite txn)", r["store"] * 1e3, r["store"] / r["analysis"]),
        (f"store result + evaluate {r['rules']} rules (SQLite txn)", r["store_eval"] * 1e3,
         r["store_eval"] / r["analysis"]),
        ("  difference: alarm evaluation + its commit", eval_cost * 1e3, eval_cost / r["analysis"]),
        ("  evaluate_result() call alone (incl. flush)", r["eval_call"] * 1e3,
         r["eval_call"] / r["analysis"]),
    ]
    print(f"Alarm rule cost per analysed record (median of {args.records} records)")
    print(f"{'step':52s} {'ms':>9s} {'x analysis':>11s}")
    for name, ms, ratio in rows:
        print(f"{name:52s} {ms:9.3f} {ratio:10.2%}")
    for label, cost in (("rule logic (metrics, trend, 10 state steps)", r["pure"]),
                        ("alarm evaluation with its database work", r["eval_call"])):
        verdict = "meets" if cost / r["analysis"] < 0.05 else "misses"
        print(f"goal < 5 % of the analysis time: {label} -> {verdict}")
    print()
    print(f"Outbox throughput against a local aiosmtpd server ({args.emails} emails, one connection)")
    print(f"{'sent':>6s} {'received':>9s} {'seconds':>9s} {'emails/s':>9s} {'ms/email':>9s}")
    print(f"{o['sent']:6d} {o['received']:9d} {o['elapsed']:9.3f} {o['sent'] / o['elapsed']:9.1f} "
          f"{o['elapsed'] / max(1, o['sent']) * 1e3:9.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
