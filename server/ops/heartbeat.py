"""Heartbeats of long-running services, with cumulative counters the API's /metrics aggregates.

A :class:`Heartbeat` lives in the worker or bridge process. ``count``/``observe`` only touch memory
(under a lock, any thread); ``beat()`` writes the row when ``interval_s`` has passed (or when forced),
in its own short write transaction. A failed beat is logged and retried at the next call: the
heartbeat never stops the service it reports on.
"""

from __future__ import annotations

import bisect
import copy
import datetime as dt
import logging
import os
import socket
import threading
import time

from sqlalchemy import delete, select

from server.ops.tables import ServiceHeartbeat
from server.storage.tables import utcnow

log = logging.getLogger("halfwatch.heartbeat")

# Upper bounds (s) of the analysis-duration buckets; the last bucket is +Inf.
ANALYSIS_BUCKETS_S = (0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0)
STOPPED_ROWS_KEPT_DAYS = 7


class Heartbeat:
    """One service instance's heartbeat row and counters (see the module docstring)."""

    def __init__(self, db, instance_id: str, kind: str, *, interval_s: float = 10.0,
                 buckets: dict[str, tuple[float, ...]] | None = None):
        self.db = db
        self.id = instance_id[:160]
        self.kind = kind
        self.interval_s = interval_s
        self.buckets = {"analysis_seconds": ANALYSIS_BUCKETS_S, **(buckets or {})}
        self.status = "starting"
        self.started_at = utcnow()
        self._stats: dict = {"counters": {}, "histograms": {}}
        self._lock = threading.Lock()
        self._last_beat = -float("inf")

    def count(self, name: str, n: int = 1, **labels: str) -> None:
        key = name if not labels else name + "|" + ",".join(f"{k}={v}" for k, v in sorted(labels.items()))
        with self._lock:
            counters = self._stats["counters"]
            counters[key] = counters.get(key, 0) + n

    def observe(self, name: str, value: float) -> None:
        bounds = self.buckets[name]
        with self._lock:
            h = self._stats["histograms"].setdefault(name, {"bounds": list(bounds),
                                                            "counts": [0] * (len(bounds) + 1),
                                                            "sum": 0.0})
            h["counts"][bisect.bisect_left(bounds, value)] += 1
            h["sum"] += float(value)

    def snapshot(self) -> dict:
        with self._lock:
            return copy.deepcopy(self._stats)

    def beat(self, status: str | None = None, *, force: bool = False) -> bool:
        """Write the row if the interval has passed (or ``force``); True if written."""
        if status is not None and status != self.status:
            self.status = status
            force = True
        now_m = time.monotonic()
        if not force and now_m - self._last_beat < self.interval_s:
            return False
        try:
            self._write()
        except Exception as exc:  # the database may be busy or down: report and carry on
            log.warning("heartbeat %s not written: %s", self.id, exc)
            return False
        self._last_beat = now_m
        return True

    def _write(self) -> None:
        stats = self.snapshot()
        now = utcnow()
        with self.db.unit_of_work() as s:
            row = s.get(ServiceHeartbeat, self.id)
            if row is None:
                s.add(ServiceHeartbeat(id=self.id, kind=self.kind, host=socket.gethostname()[:120],
                                       pid=os.getpid(), started_at=self.started_at, beat_at=now,
                                       status=self.status, stats=stats))
            else:
                row.beat_at, row.status, row.stats = now, self.status, stats

    def prune(self, keep_days: float = STOPPED_ROWS_KEPT_DAYS) -> None:
        """Forget stopped instances of this kind that last beat more than ``keep_days`` ago."""
        cutoff = utcnow() - dt.timedelta(days=keep_days)
        try:
            with self.db.unit_of_work() as s:
                s.execute(delete(ServiceHeartbeat).where(ServiceHeartbeat.kind == self.kind,
                                                         ServiceHeartbeat.status == "stopped",
                                                         ServiceHeartbeat.beat_at < cutoff))
        except Exception as exc:
            log.warning("heartbeat prune skipped: %s", exc)


def beats(session, kind: str | None = None) -> list[ServiceHeartbeat]:
    q = select(ServiceHeartbeat).order_by(ServiceHeartbeat.beat_at.desc())
    if kind is not None:
        q = q.where(ServiceHeartbeat.kind == kind)
    return list(session.scalars(q))


def is_live(row: ServiceHeartbeat, max_age_s: float, now: dt.datetime | None = None) -> bool:
    now = now or utcnow()
    return row.status != "stopped" and (now - row.beat_at).total_seconds() <= max_age_s
