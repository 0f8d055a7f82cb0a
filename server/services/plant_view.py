"""What the plant page adds to the asset tree: staleness per machine, the half-order levels its
sparkline draws, and the summary strip (machines in danger / alert / stale).

A point is stale when it has had no reading for longer than its interval: the route stop's interval
for a point on a route (the longest, if it is on several), ``ONLINE_STALE_H`` for a point read online.
A point that never had a reading is stale too. Pure reads; the plant page's JSON carries the result.
"""

from __future__ import annotations

import datetime as dt

#: house choice: an online point reads every few minutes to hours, so a day without a reading means the
#: measurement chain or its gateway is down.
ONLINE_STALE_H = 24.0


def parse(iso: str | None) -> dt.datetime | None:
    return None if not iso else dt.datetime.fromisoformat(iso.replace("Z", "+00:00"))


def point_intervals_h(routes: list[dict]) -> dict[int, float]:
    """Route interval per point (hours), from ``tree.routes_due`` routes."""
    out: dict[int, float] = {}
    for r in routes:
        for st in r["stops"]:
            out[st["point_id"]] = max(out.get(st["point_id"], 0.0), float(st["due_interval_h"]))
    return out


def staleness(points: list[dict], intervals_h: dict[int, float], now: dt.datetime) -> dict:
    """``{"stale", "points": [...], "days_since_reading"}`` of one machine's points."""
    stale_points = []
    for p in points:
        interval = intervals_h.get(p["id"], ONLINE_STALE_H)
        last = parse(p.get("last_measured_at"))
        age_h = None if last is None else (now - last).total_seconds() / 3600.0
        if age_h is None or age_h > interval:
            stale_points.append({"point_id": p["id"], "point": p["name"], "interval_h": interval,
                                 "days_since_reading": None if age_h is None else round(age_h / 24.0, 1),
                                 "on_route": p["id"] in intervals_h})
    ages = [s["days_since_reading"] for s in stale_points if s["days_since_reading"] is not None]
    return {"stale": bool(stale_points), "points": stale_points,
            "days_since_reading": max(ages) if ages else None}


def half_order_levels(levels_by_point: dict[int, dict]) -> dict | None:
    """The lowest alert and danger half-order levels (mm/s r.m.s.) among a machine's points."""
    found = [lv["half_order_velocity"] for lv in levels_by_point.values() if lv.get("half_order_velocity")]
    alerts = [lv["alert"] for lv in found if lv.get("alert")]
    dangers = [lv["danger"] for lv in found if lv.get("danger")]
    if not alerts and not dangers:
        return None
    return {"alert": min(alerts) if alerts else None, "danger": min(dangers) if dangers else None}


def summary(sites: list[dict]) -> dict:
    """Counts for the summary strip; a machine counts once, at its worst level, and once more if stale."""
    out = {"machines": 0, "danger": 0, "alert": 0, "normal": 0, "stale": 0}
    for site in sites:
        for area in site["areas"]:
            for asset in area["assets"]:
                out["machines"] += 1
                out[asset["alarms"]["level"]] += 1
                out["stale"] += bool(asset["staleness"]["stale"])
    return out


def decorate(s, sites: list[dict], routes: list[dict], now: dt.datetime, levels_of) -> dict:
    """Add ``staleness`` and ``half_order_levels_rms_mm_s`` to every asset; return the summary.

    ``levels_of(session, asset_id, point_ids)`` gives the levels in force per point (the dashboard's
    ``point_levels``, the one home of the rule precedence)."""
    intervals = point_intervals_h(routes)
    for site in sites:
        for area in site["areas"]:
            for asset in area["assets"]:
                ids = [p["id"] for p in asset["points"]]
                asset["staleness"] = staleness(asset["points"], intervals, now)
                asset["half_order_levels_rms_mm_s"] = half_order_levels(levels_of(s, asset["id"], ids)) \
                    if ids else None
    return summary(sites)
