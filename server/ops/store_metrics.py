"""Metrics read from the database at scrape time, so every API process reports the same figures.

Records, jobs, alarms and the email outbox live in the database, and workers and MQTT bridges write
their counters into ``service_heartbeats``; reading them here means a worker or bridge in another
process (or on another host) is counted without a metrics port of its own. Counters that only grow
(records ingested, alarm transitions) are read incrementally by primary key (see ``_Tally``), so a
scrape costs a few indexed queries however large the tables get.
"""

from __future__ import annotations

import datetime as dt
import logging
import threading
from collections import defaultdict

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily
from sqlalchemy import func, select

from server.storage.tables import JOB_STATES, ORIGINS, Job, Record, utcnow

log = logging.getLogger("halfwatch.metrics")

PREFIX = "halfwatch_"
OPEN_OUTBOX = ("pending", "sending", "failed")
SETTLE_S = 300.0  # far longer than any write transaction (see _Tally)


class _Tally:
    """A running count per label of rows that only ever get added, read by primary key ranges.

    Ids are handed out when a row is inserted, not when it is committed: on PostgreSQL a transaction
    holding id 100 can commit after one holding id 101. So the settled part (ids up to ``last_id``)
    only advances over rows older than ``SETTLE_S``, which every transaction has long committed, and
    the younger rows above it are counted afresh at each scrape (a short primary-key range).
    """

    def __init__(self):
        self.last_id = 0
        self.settled: dict[str, int] = defaultdict(int)

    def update(self, session, id_col, label_col, time_col, *where) -> dict[str, int]:
        cutoff = utcnow() - dt.timedelta(seconds=SETTLE_S)
        top = session.scalar(select(func.max(id_col)).where(id_col > self.last_id, time_col < cutoff, *where))
        if top is not None:
            for label, n in session.execute(select(label_col, func.count()).where(
                    id_col > self.last_id, id_col <= top, *where).group_by(label_col)):
                self.settled[str(label)] += n
            self.last_id = top
        fresh = session.execute(select(label_col, func.count()).where(id_col > self.last_id, *where)
                                .group_by(label_col)).all()
        counts = dict(self.settled)
        for label, n in fresh:
            counts[str(label)] = counts.get(str(label), 0) + n
        return counts


class StoreCollector:
    """A prometheus-client custom collector over one :class:`server.storage.Database`."""

    def __init__(self, db, settings):
        self.db = db
        self.settings = settings
        self._lock = threading.Lock()
        self._records = _Tally()
        self._transitions = _Tally()

    def collect(self):
        up = GaugeMetricFamily(PREFIX + "database_up", "1 if the last scrape could read the database")
        try:
            with self._lock, self.db.read() as s:
                families = list(self._families(s))
        except Exception as exc:  # a scrape reports the outage instead of failing
            log.warning("metrics: database unreadable: %s", exc)
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1)
        yield up
        yield from families

    def _families(self, s):
        yield from self._records_jobs(s)
        yield from self._alarms(s)
        yield from self._heartbeats(s)

    def _records_jobs(self, s):
        counts = self._records.update(s, Record.id, Record.origin, Record.received_at)
        fam = CounterMetricFamily(PREFIX + "records_ingested", "records stored, by origin", labels=["origin"])
        for origin in dict.fromkeys([*ORIGINS, *counts]):
            fam.add_metric([origin], counts.get(origin, 0))
        yield fam

        jobs = dict(s.execute(select(Job.state, func.count()).where(Job.state != "done")
                              .group_by(Job.state)).all())
        fam = GaugeMetricFamily(PREFIX + "jobs", "analysis jobs by state (queue depth: queued + running; "
                                "failed ones wait for a person)", labels=["state"])
        for state in JOB_STATES:
            if state != "done":
                fam.add_metric([state], jobs.get(state, 0))
        yield fam
        oldest = s.scalar(select(Job.created_at).where(Job.state.in_(("queued", "running")))
                          .order_by(Job.id).limit(1))
        age = GaugeMetricFamily(PREFIX + "job_oldest_age_seconds",
                                "age of the oldest queued or running analysis job (0: queue empty)")
        age.add_metric([], 0.0 if oldest is None else max(0.0, (utcnow() - oldest).total_seconds()))
        yield age

    def _alarms(self, s):
        from server.alarms.rules import LEVELS
        from server.alarms.tables import AlarmEvent, AlarmState, OutboxMessage

        levels = dict(s.execute(select(AlarmState.level, func.count()).group_by(AlarmState.level)).all())
        fam = GaugeMetricFamily(PREFIX + "alarms", "alarm states (point x metric) by current level",
                                labels=["level"])
        for level in LEVELS:
            fam.add_metric([level], levels.get(level, 0))
        yield fam
        counts = self._transitions.update(s, AlarmEvent.id, AlarmEvent.to_level, AlarmEvent.created_at,
                                          AlarmEvent.kind == "transition")
        fam = CounterMetricFamily(PREFIX + "alarm_transitions", "alarm level changes, by the level entered",
                                  labels=["level"])
        for level in LEVELS:
            fam.add_metric([level], counts.get(level, 0))
        yield fam

        status = dict(s.execute(select(OutboxMessage.status, func.count())
                                .where(OutboxMessage.status.in_(OPEN_OUTBOX))
                                .group_by(OutboxMessage.status)).all())
        fam = GaugeMetricFamily(PREFIX + "outbox_messages", "alert emails not yet sent (pending, sending) "
                                "or given up (failed)", labels=["status"])
        for name in OPEN_OUTBOX:
            fam.add_metric([name], status.get(name, 0))
        yield fam
        oldest = s.scalar(select(OutboxMessage.created_at).where(OutboxMessage.status.in_(
            ("pending", "sending"))).order_by(OutboxMessage.id).limit(1))
        age = GaugeMetricFamily(PREFIX + "outbox_oldest_age_seconds",
                                "age of the oldest unsent alert email (0 when none waits)")
        age.add_metric([], 0.0 if oldest is None else max(0.0, (utcnow() - oldest).total_seconds()))
        yield age

    def _heartbeats(self, s):
        from server.ops.heartbeat import beats, is_live

        rows = beats(s)
        now = utcnow()
        max_age = self.settings.ready_max_heartbeat_age_s
        workers = [r for r in rows if r.kind == "worker"]
        bridges = [r for r in rows if r.kind == "mqtt-bridge"]
        live = GaugeMetricFamily(PREFIX + "services_live", f"workers and MQTT bridges that beat within "
                                 f"{max_age:g} s", labels=["kind"])
        live.add_metric(["worker"], sum(is_live(r, max_age, now) for r in workers))
        live.add_metric(["mqtt-bridge"], sum(is_live(r, max_age, now) for r in bridges))
        yield live
        age = GaugeMetricFamily(PREFIX + "worker_heartbeat_age_seconds",
                                "seconds since the freshest worker heartbeat (absent: no worker ever ran)")
        running = [r for r in workers if r.status != "stopped"]
        if running:
            age.add_metric([], min((now - r.beat_at).total_seconds() for r in running))
        yield age
        yield _merged_histogram(workers, "analysis_seconds", PREFIX + "analysis_duration_seconds",
                                "time to analyse one record (worker, outside any transaction)")
        connected = GaugeMetricFamily(PREFIX + "mqtt_bridges_connected",
                                      "MQTT bridges whose last heartbeat says they are subscribed")
        connected.add_metric([], sum(r.status == "connected" and is_live(r, max_age, now) for r in bridges))
        yield connected
        yield _merged_counter(bridges, "messages", "outcome", PREFIX + "mqtt_messages",
                              "MQTT messages handled by the bridges: stored, duplicate (already stored) "
                              "or rejected", values=("stored", "duplicate", "rejected"))
        yield _merged_counter(bridges, "rejects", "code", PREFIX + "mqtt_rejects",
                              "MQTT messages rejected, by error code")
        yield _merged_counter(bridges, "disconnects", None, PREFIX + "mqtt_disconnects",
                              "times a bridge lost its broker connection")


def _merged_counter(rows, name: str, label: str | None, metric: str, doc: str, values=()):
    totals: dict[str, float] = dict.fromkeys(values, 0.0)
    for r in rows:
        for key, n in ((r.stats or {}).get("counters") or {}).items():
            base, _, labels = key.partition("|")
            if base != name:
                continue
            value = labels.partition("=")[2] if label else ""
            totals[value] = totals.get(value, 0.0) + n
    fam = CounterMetricFamily(metric, doc, labels=[label] if label else None)
    if label:
        for value, n in sorted(totals.items()):
            fam.add_metric([value], n)
    else:
        fam.add_metric([], totals.get("", 0.0))
    return fam


def _merged_histogram(rows, name: str, metric: str, doc: str):
    from server.ops.heartbeat import ANALYSIS_BUCKETS_S

    bounds = list(ANALYSIS_BUCKETS_S)
    counts = [0] * (len(bounds) + 1)
    total = 0.0
    for r in rows:
        h = ((r.stats or {}).get("histograms") or {}).get(name)
        if not h or h.get("bounds") != bounds:
            continue
        counts = [a + b for a, b in zip(counts, h["counts"], strict=True)]
        total += h["sum"]
    cumulative, running = [], 0
    for bound, n in zip([*map(str, bounds), "+Inf"], counts, strict=True):
        running += n
        cumulative.append((bound, running))
    return HistogramMetricFamily(metric, doc, buckets=cumulative, sum_value=total)
