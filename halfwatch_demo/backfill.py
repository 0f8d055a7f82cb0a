"""Backfill the demo's history: simulate -> ingest service -> analysis -> stored result + alarm rules.

Each reading goes the way a real one goes: :func:`server.services.ingest.ingest_record` stores it with
its analysis job, the job is claimed and loaded like the worker does, the analysis is the worker's own
(:func:`server.worker.analyse`) and :func:`server.worker.store` stores the result and runs the alarm
rules in the same transaction. Only the simulation and the analysis run ahead in a small process pool
(``jobs``), which is what makes 90 days take minutes. ``store`` runs the alarm rules at the record's own
time (its ``now``), so alarm histories and emails carry the backfilled dates.

Records carry a ``client_ref`` made from the point and the time, so an interrupted backfill resumes
where it stopped and a second run stores nothing twice.
"""

from __future__ import annotations

import collections
import datetime as dt
import logging
import os
import signal
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from types import SimpleNamespace

from sqlalchemy import select

from halfwatch_demo import plant as demo_plant
from halfwatch_demo.scenario import condition, seed_for
from halfwatch_demo.schedule import backfill_slots, online_slots

log = logging.getLogger("halfwatch.demo")

IN_FLIGHT = 64  # readings simulated ahead of the store loop
WINDOW_FIT_EVERY = dt.timedelta(days=7)


@dataclass(frozen=True)
class Task:
    point: str
    point_id: int
    when: dt.datetime
    online: bool
    kind: str
    params: dict
    speed_hz: float
    fs_hz: float
    n_samples: int
    multiplier: float
    group: int
    foundation: str

    @property
    def client_ref(self) -> str:
        return f"demo:{self.point}:{self.when.strftime('%Y%m%dT%H%M%SZ')}"


def make_tasks(point_ids: dict[str, int], slots, anchor: dt.datetime) -> list[Task]:
    specs = {p.name: (a, p) for a, p in demo_plant.all_points()}
    tasks = []
    for slot in slots:
        asset, point = specs[slot.point]
        t_days = (slot.when - anchor).total_seconds() / 86400.0
        iso = slot.when.strftime("%Y%m%dT%H%M%S")
        c = condition(asset, point, t_days, slot.when.hour, seed_for(point.name, iso))
        tasks.append(Task(point.name, point_ids[point.name], slot.when, point.online, c.kind, c.params,
                          round(c.speed_hz, 4), asset.fs_hz, demo_plant.record_samples(asset),
                          asset.multiplier, asset.group,
                          asset.foundation))
    return tasks


def compute(task: Task):
    """Simulate one reading and analyse it exactly as the worker would (runs in the pool)."""
    from analysis.sim.simulate import simulate
    from server.storage.blobs import as_f4
    from server.worker import analyse

    iso = task.when.strftime("%Y%m%dT%H%M%S")
    rec = simulate(task.kind, seed=seed_for(task.point, iso), fs_hz=task.fs_hz,
                   duration_s=task.n_samples / task.fs_hz, **task.params)
    x = as_f4(rec.samples)
    record = SimpleNamespace(fs_hz=task.fs_hz, units="g", speed_hz=task.speed_hz)
    asset = SimpleNamespace(machine_group=task.group, foundation=task.foundation,
                            forcing_multiplier=task.multiplier, nominal_speed_hz=task.speed_hz)
    try:
        return x, analyse(record, asset, x), None
    except Exception as exc:  # stored as a failed job by the store loop, like the worker would
        return x, None, f"{type(exc).__name__}: {exc}"


def _quiet_child() -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    os.environ.setdefault("OMP_NUM_THREADS", "1")


def existing_refs(db, point_ids) -> set[str]:
    from server.storage.tables import Record

    with db.read() as s:
        return set(s.scalars(select(Record.client_ref).where(Record.point_id.in_(list(point_ids)),
                                                             Record.client_ref.like("demo:%"))))


def store_one(db, settings, task: Task, x, analysis, error) -> bool:
    """Ingest one reading, then claim, load and store it the way ``server.worker.run_once`` does.

    The analysis was made in the pool on the same float32 samples the worker would load. Returns
    False when the reading was already stored.
    """
    from server.services.ingest import Limits, ingest_record
    from server.worker import claim, fail, load, store

    out = ingest_record(db, point_id=task.point_id, samples=x, fs_hz=task.fs_hz, units="g",
                        measured_at=task.when, speed_hz=task.speed_hz,
                        speed_source="drive" if task.online else "strobe",
                        origin="api" if task.online else "route", uploader="demo simulator",
                        client_ref=task.client_ref, limits=Limits.from_settings(settings))
    if not out.created:
        return False
    c = claim(db, "demo-backfill", lease_s=settings.lease_s, max_attempts=settings.max_attempts)
    if c is None or c.record_id != out.record_id:
        raise RuntimeError(f"backfill expected the job of record {out.record_id}, claimed {c}")
    if error is not None:  # the worker marks a bad signal failed at once, without retries
        fail(db, c, error, permanent=True, settings=settings)
        return True
    record, _asset, samples = load(db, c.record_id)
    store(db, c, record, analysis, settings, samples=samples, now=task.when)  # alarm times follow the record
    return True


@dataclass
class Report:
    readings: int = 0
    skipped: int = 0
    seconds: float = 0.0
    emails: int = 0


def drain_queue(db, settings) -> int:
    """Analyse jobs left queued by an interrupted run (the worker's own path)."""
    from server.worker import run_once

    n = 0
    while run_once(db, settings, "demo-backfill"):
        n += 1
    return n


def run_backfill(db, settings, point_ids: dict[str, int], *, anchor: dt.datetime, days: float,
                 gap: tuple[dt.datetime, dt.datetime] | None = None, jobs: int | None = None,
                 say=print) -> Report:
    """Backfill ``days`` of history before ``anchor``; online points also in ``gap`` (after the anchor)."""
    from server.alarms.margin import refresh_window_fits

    t0 = time.perf_counter()
    drain_queue(db, settings)
    start = anchor - dt.timedelta(days=days)
    slots = backfill_slots(start, anchor)
    if gap is not None and gap[1] > gap[0]:
        slots = sorted(slots + online_slots(*gap))
    have = existing_refs(db, point_ids.values())
    tasks = [t for t in make_tasks(point_ids, slots, anchor) if t.client_ref not in have]
    report = Report(skipped=len(slots) - len(tasks))
    if not tasks:
        report.seconds = time.perf_counter() - t0
        return report
    # the store loop in this process is the slower half, so one analysis process per spare core
    jobs = max(1, jobs or min(3, (os.cpu_count() or 2) - 1))
    say(f"backfill: {len(tasks)} simulated readings to analyse ({report.skipped} already stored), "
        f"{jobs} analysis process(es)")
    next_fit = tasks[0].when + WINDOW_FIT_EVERY
    step = max(1, len(tasks) // 10)
    import multiprocessing

    pool = ProcessPoolExecutor(jobs, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_quiet_child)
    try:
        queue = collections.deque()
        it = iter(tasks)
        for task in it:
            queue.append((task, pool.submit(compute, task)))
            if len(queue) >= IN_FLIGHT:
                break
        while queue:
            task, fut = queue.popleft()
            nxt = next(it, None)
            if nxt is not None:
                queue.append((nxt, pool.submit(compute, nxt)))
            store_one(db, settings, task, *fut.result())
            report.readings += 1
            if task.when >= next_fit:
                refresh_window_fits(db, now=task.when)
                next_fit = task.when + WINDOW_FIT_EVERY
            if report.readings % step == 0:
                say(f"backfill: {report.readings} of {len(tasks)} "
                    f"({100 * report.readings // len(tasks)} %), {time.perf_counter() - t0:.0f} s")
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
    refresh_window_fits(db)
    report.seconds = time.perf_counter() - t0
    return report
