"""When the demo's readings are taken: online points every hour, route points on the weekly walks.

The intake walk is on Tuesday mornings and missed one week (``MISSED_WEEK`` weeks before the anchor);
the compressor walk is on Thursdays and could not reach CHW-1 and PW-4 on its last two visits, so those
stops are overdue when the demo starts.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from halfwatch_demo.plant import ASSETS, ROUTES, tag

MISSED_WEEK = 6  # the intake walk of this many weeks before the anchor did not happen
SKIPPED_ON_LAST_WALKS = ("CHW-1", "PW-4")
WALK_DAYS = {"Intake and boiler house weekly": (1, 8, 10), "Compressor and cooling weekly": (3, 9, 0)}
STOP_MINUTES = 4  # time between two stops of a walk


@dataclass(frozen=True, order=True)
class Slot:
    when: dt.datetime
    point: str


def _points_by_tag(online: bool) -> dict[str, list[str]]:
    return {tag(a): [p.name for p in a.points if p.online == online] for a in ASSETS}


def online_slots(start: dt.datetime, end: dt.datetime) -> list[Slot]:
    """A reading at a few seconds past every full hour in (start, end] for each online point."""
    names = [n for names in _points_by_tag(True).values() for n in names]
    first = start.replace(minute=0, second=0, microsecond=0) + dt.timedelta(hours=1)
    out = []
    t = first
    while t <= end:
        for i, name in enumerate(names):
            out.append(Slot(t + dt.timedelta(seconds=7 * i + 3), name))
        t += dt.timedelta(hours=1)
    return out


def route_slots(start: dt.datetime, anchor: dt.datetime) -> list[Slot]:
    """The weekly walks between start and the anchor (none after it: the walks are in the past)."""
    route_points = _points_by_tag(False)
    out = []
    for route, tags in ROUTES.items():
        weekday, hour, minute = WALK_DAYS[route]
        day = anchor.replace(hour=hour, minute=minute, second=0, microsecond=0)
        day -= dt.timedelta(days=(day.weekday() - weekday) % 7)
        if day > anchor:
            day -= dt.timedelta(days=7)
        week = 0
        while day > start:
            if not (route.startswith("Intake") and week == MISSED_WEEK):
                stops = [n for t in tags for n in route_points[t]
                         if not (week < 2 and t in SKIPPED_ON_LAST_WALKS)]
                out.extend(Slot(day + dt.timedelta(minutes=STOP_MINUTES * i), n) for i, n in enumerate(stops))
            day -= dt.timedelta(days=7)
            week += 1
    return [s for s in out if start < s.when <= anchor]


def backfill_slots(start: dt.datetime, anchor: dt.datetime, end: dt.datetime | None = None) -> list[Slot]:
    """Every reading of the history in time order (online up to ``end``, default the anchor)."""
    return sorted(online_slots(start, end or anchor) + route_slots(start, anchor))
