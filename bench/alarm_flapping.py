"""Flapping of the slow alarm rules (trend dB/day, forecast time to limit): level changes and emails per
rule, before and after the rule-level fix, on seeded sequences and optionally on a demo database.

"before" replays the former evaluation (Theil-Sen median slope on the last 30 readings, 2 of 3, 10 %
hysteresis, no dwell, an email for every level change); "after" replays the present one (6-hour
buckets, the conservative end of the 90 % interval, 3 of 4, 50 % hysteresis, 2-day dwell, emails for
escalations and clears). The "after (worker path)" column runs the real ``evaluate_result`` on a
SQLite file, to show the replay is faithful.

The margin rule alone: level changes and emails before (2 of 3, 10 %, no dwell, an email per rule
escalation or clear) and after (3 of 4, 50 %, two-day dwell, the incident's emails: one per level not yet
announced, one clear). ``--incidents before=A.db after=B.db`` counts, per machine of demo databases, the
incidents (rebuilt from the audit trail the same way for both) and the alert emails about them.

    .venv/bin/python bench/alarm_flapping.py [--demo-db PATH_TO_halfwatch.db]
    .venv/bin/python bench/alarm_flapping.py --incidents before=OLD/halfwatch.db after=NEW/halfwatch.db
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sqlite3
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from server.alarms import checks  # noqa: E402
from server.alarms.engine import Reading, step  # noqa: E402
from server.alarms.evaluate import HISTORY_LEN, _dwelling  # noqa: E402
from server.alarms.rules import RuleSpec, default_rules  # noqa: E402

SLOW = ("trend_db_per_day", "time_to_limit_days")
BEFORE_RULES = {"trend_db_per_day": RuleSpec("trend_db_per_day", 1.0, 3.0),
                "time_to_limit_days": RuleSpec("time_to_limit_days", 30.0, 7.0, direction="below")}
T0 = dt.datetime(2026, 9, 1, tzinfo=dt.UTC).timestamp()


def sequences() -> dict[str, list[tuple[float, float]]]:
    """Invented half-order r.m.s. velocities (mm/s), hourly for 60 days."""
    out = {}
    hours = np.arange(60 * 24)
    for seed in (1, 2, 3):
        rng = np.random.default_rng(seed)
        out[f"steady 0.5 mm/s, 20 % scatter, seed {seed}"] = list(zip(
            T0 + hours * 3600.0, 0.5 * np.exp(0.2 * rng.standard_normal(hours.size)), strict=True))
    rng = np.random.default_rng(7)
    days = hours / 24.0
    growing = 0.3 * 10 ** (1.5 * days / 20.0) * np.exp(0.2 * rng.standard_normal(hours.size))
    keep = days < 14  # +1.5 dB/day reaches 2.8 mm/s near day 13
    out["growing +1.5 dB/day, 20 % scatter"] = list(zip(T0 + hours[keep] * 3600.0, growing[keep],
                                                        strict=True))
    return out


def replay(readings, *, limit: float, after: bool) -> dict[str, tuple[int, int, float | None]]:
    """(level changes, emails, day of the first alert) per slow rule."""
    specs = {r.metric: r for r in default_rules() if r.metric in SLOW} if after else BEFORE_RULES
    level = dict.fromkeys(SLOW, "normal")
    windows = {m: [] for m in SLOW}
    since, history, buckets = {}, [], []
    counts = {m: [0, 0, None] for m in SLOW}
    for ts, v in readings:
        history = [*history, [ts, v]][-HISTORY_LEN:]
        if after:
            buckets = checks.add_to_buckets(buckets, ts, v)
            values = checks.trend_and_forecast(
                checks.trend_history(buckets), limit=limit, conservative=True,
                min_points=checks.RULE_MIN_POINTS, min_span_days=checks.RULE_MIN_SPAN_DAYS)
        else:
            values = checks.trend_and_forecast(history, limit=limit)
        for metric, value in zip(SLOW, values, strict=True):
            if value is None:
                continue
            spec = specs[metric]
            new, windows[metric], tr = step(spec, level[metric], windows[metric],
                                            Reading(value, spec.alert, spec.danger))
            if tr is None or (after and _dwelling(metric, tr, since, ts)):
                continue
            since[metric], level[metric] = ts, new
            counts[metric][0] += 1
            counts[metric][1] += int(not after or tr.escalation or new == "normal")
            if counts[metric][2] is None and tr.escalation:
                counts[metric][2] = (ts - readings[0][0]) / 86400.0
    return {m: tuple(c) for m, c in counts.items()}


def worker_path(readings, tmp: Path) -> dict[str, int]:
    """Level changes per slow rule through the real evaluate_result on a SQLite file."""
    import importlib.util

    from support.plant import make_plant

    from server.migrations import upgrade
    from server.settings import Settings
    from server.storage import Database

    # tests/alarms/helpers.py by path: bench/alarms.py shadows the tests' "alarms" package here
    spec = importlib.util.spec_from_file_location("alarm_helpers", ROOT / "tests" / "alarms" / "helpers.py")
    helpers = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(helpers)
    Feeder, make_result = helpers.Feeder, helpers.make_result
    settings = Settings(data_dir=tmp)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    plant = make_plant(db)
    feeder = Feeder(db, settings)
    counts = dict.fromkeys(SLOW, 0)
    for ts, v in readings:
        at = dt.datetime.fromtimestamp(ts, dt.UTC)
        for _id, _kind, metric, _f, _t in feeder.feed(plant.point_id, make_result(half_v=float(v)), at=at):
            if metric in counts:
                counts[metric] += 1
    db.dispose()
    return counts


def demo_points(path: str) -> dict[str, tuple[list[tuple[float, float]], float]]:
    """Per point of a demo database (opened read-only): its readings and the half-order danger level."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        names = dict(conn.execute("SELECT p.id, a.name || ' / ' || p.name FROM points p "
                                  "JOIN assets a ON a.id = p.asset_id"))
        limits = dict(conn.execute("SELECT point_id, danger_level FROM alarm_rules "
                                   "WHERE metric = 'half_order_velocity' AND point_id IS NOT NULL"))
        rows = conn.execute("SELECT point_id, measured_ts, sub_detected, sub_velocity_rms_mm_s FROM results "
                            "WHERE current AND quality_ok ORDER BY point_id, measured_ts").fetchall()
    finally:
        conn.close()
    out: dict = {}
    for pid, ts, detected, rms in rows:
        v = (rms or 0.0) if detected else 0.0  # the r.m.s. column, as result_metrics compares
        out.setdefault(names.get(pid, str(pid)), ([], limits.get(pid) or 2.8))[0].append((ts, v))
    return out


MARGIN_BEFORE = RuleSpec("threshold_margin", 0.20, 0.05, direction="below")  # 2 of 3, 10 %, no dwell


def margin_sequences() -> dict[str, list[tuple[float, float]]]:
    """Invented threshold margins, hourly: 3 days scattering around a level, then 4 days well clear."""
    out = {}
    hours = np.arange(7 * 24)
    for name, centre, seed in (("margin near danger (5 %), +-3 % scatter", 0.06, 11),
                               ("margin near alert (20 %), +-3 % scatter", 0.20, 12),
                               ("margin beyond threshold (-4 %), +-3 % scatter", -0.04, 13)):
        rng = np.random.default_rng(seed)
        m = np.where(hours < 72, centre + 0.03 * rng.standard_normal(hours.size), 0.5)
        out[name] = list(zip(T0 + hours * 3600.0, m, strict=True))
    return out


def replay_margin(readings, *, after: bool) -> tuple[int, int]:
    """(level changes, emails per address) of the margin rule alone on one machine.

    before: 2 of 3, 10 % band, no dwell, an email for each escalation and each clear of the rule;
    after: the default rule (3 of 4, 50 %, two-day dwell) and the incident's emails (one per level not yet
    announced, one when it clears)."""
    spec = next(r for r in default_rules() if r.metric == "threshold_margin") if after else MARGIN_BEFORE
    level, window, since, announced = "normal", [], {}, 0
    changes = emails = 0
    rank = {"normal": 0, "alert": 1, "danger": 2}
    for ts, v in readings:
        new, window, tr = step(spec, level, window, Reading(float(v), spec.alert, spec.danger))
        if tr is None or (after and _dwelling("threshold_margin", tr, since, ts)):
            continue
        since["threshold_margin"], level = ts, new
        changes += 1
        if not after:
            emails += int(tr.escalation or new == "normal")
        elif new == "normal":
            emails += int(announced > 0)
            announced = 0
        elif rank[new] > announced:
            emails, announced = emails + 1, rank[new]
    return changes, emails


def demo_incident_emails(path: str) -> dict[str, tuple[int, int, int]]:
    """Per machine of a demo database (opened read-only): (incidents, alarm emails, addresses).

    Incidents are rebuilt from the audit trail the same way for any version of the code: a machine is in
    an incident from the first rule of any of its points leaving normal until all are back to normal.
    Emails are the outbox rows about the machine's transitions (one per address)."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        names = dict(conn.execute("SELECT id, name FROM assets"))
        events = conn.execute("SELECT id, asset_id, point_id, metric, to_level FROM alarm_events "
                              "WHERE kind = 'transition' ORDER BY id").fetchall()
        mails = conn.execute("SELECT o.event_id, e.asset_id, o.recipient FROM alarm_outbox o "
                             "JOIN alarm_events e ON e.id = o.event_id "
                             "WHERE o.kind IN ('alarm', 'incident') AND e.kind = 'transition'").fetchall()
    finally:
        conn.close()
    levels: dict[int, dict] = {}
    incidents: dict[int, int] = {}
    for _id, asset, point, metric, to in events:
        states = levels.setdefault(asset, {})
        was_open = any(v != "normal" for v in states.values())
        states[(point, metric)] = to
        if not was_open and to != "normal":
            incidents[asset] = incidents.get(asset, 0) + 1
    out: dict[str, tuple[int, int, int]] = {}
    for asset, n in incidents.items():
        rows = [m for m in mails if m[1] == asset]
        out[names.get(asset, str(asset))] = (n, len(rows), len({m[2] for m in rows}))
    return out


def print_demo_incidents(label: str, path: str) -> None:
    per = demo_incident_emails(path)
    print(f"\n{label}: emails per incident on the demo ({path})")
    print(f"{'machine':<36} {'incidents':>9} {'emails':>7} {'addresses':>9} {'per incident and address':>25}")
    tot_i = tot_e = 0
    for name, (n, emails, addresses) in sorted(per.items()):
        tot_i, tot_e = tot_i + n, tot_e + emails
        rate = emails / n / addresses if addresses else 0.0
        print(f"{name[:36]:<36} {n:>9} {emails:>7} {addresses:>9} {rate:>25.2f}")
    print(f"{'all machines':<36} {tot_i:>9} {tot_e:>7}")


def _row(name, before, after, worker="") -> str:
    cells = []
    for m in SLOW:
        b, a = before[m], after[m]
        first = "-" if a[2] is None else f"{a[2]:.1f}"
        cells.append(f"{b[0]:>4} {b[1]:>4} | {a[0]:>4} {a[1]:>4} {first:>6}")
    return f"{name[:44]:<44} | " + " || ".join(cells) + (f" | {worker}" if worker != "" else "")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--demo-db", help="a demo halfwatch.db to replay (opened read-only)")
    ap.add_argument("--incidents", nargs="+", metavar="LABEL=DB",
                    help="count emails per incident in demo databases, e.g. before=old.db after=new.db")
    args = ap.parse_args(argv)
    print("margin rule (one machine)".ljust(48) + " | before: changes emails | after: changes emails")
    for name, readings in margin_sequences().items():
        (bc, be), (ac, ae) = replay_margin(readings, after=False), replay_margin(readings, after=True)
        print(f"{name:<48} | {bc:>15} {be:>6} | {ac:>14} {ae:>6}")
    print()
    if args.incidents:
        for item in args.incidents:
            label, _, path = item.partition("=")
            print_demo_incidents(label, path)
        return 0
    head = ("sequence".ljust(44) + " | trend dB/day: before chg mail | after chg mail 1st-day"
            " || forecast: same columns | worker path (trend, forecast)")
    print(head)
    print("-" * len(head))
    with tempfile.TemporaryDirectory() as tmp:
        for i, (name, readings) in enumerate(sequences().items()):
            worker = worker_path(readings, Path(tmp) / f"s{i}")
            before, after = (replay(readings, limit=2.8, after=a) for a in (False, True))
            print(_row(name, before, after, f"{worker['trend_db_per_day']}, {worker['time_to_limit_days']}"))
    if args.demo_db:
        total_before = total_after = 0
        for name, (readings, limit) in demo_points(args.demo_db).items():
            before, after = (replay(readings, limit=limit, after=a) for a in (False, True))
            total_before += sum(before[m][1] for m in SLOW)
            total_after += sum(after[m][1] for m in SLOW)
            if any(before[m][0] or after[m][0] for m in SLOW):
                print(_row(f"demo: {name}", before, after))
        print(json.dumps({"demo_slow_rule_emails_before": total_before, "after": total_after}))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
