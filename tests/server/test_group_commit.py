"""Group commit on the ingest path (server/storage/group_commit.py, server/services/ingest.py): concurrent
requests share transactions, each is committed before its call returns, client_ref stays idempotent, and one
request's refusal never costs another its record. Real SQLite / PostgreSQL, real threads."""

from __future__ import annotations

import datetime as dt
import threading
import time

import numpy as np
import pytest
from sqlalchemy import create_engine, func, select

from server.errors import Conflict, NotFound
from server.services.ingest import _group, ingest_record
from server.storage.group_commit import GroupCommit
from server.storage.tables import Job, Record, Waveform

T0 = dt.datetime(2026, 3, 2, 8, tzinfo=dt.UTC)


def test_callers_that_arrive_during_a_commit_share_the_next_one():
    seen: list[list[int]] = []

    def run(items):
        time.sleep(0.05)  # a slow commit: the others queue up meanwhile
        seen.append(list(items))
        return [ValueError(f"odd {i}") if i % 2 else i * 10 for i in items]

    group = GroupCommit(run, max_batch=4)
    got: dict[int, object] = {}

    def call(i):
        try:
            got[i] = group.submit(i)
        except ValueError as exc:
            got[i] = str(exc)

    threads = [threading.Thread(target=call, args=(i,)) for i in range(10)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(10)
    # each caller gets its own outcome (or its own exception), whatever batch it rode in
    assert got == {i: (f"odd {i}" if i % 2 else i * 10) for i in range(10)}
    assert sorted(i for b in seen for i in b) == list(range(10))  # each item exactly once
    assert max(len(b) for b in seen) <= 4 and len(seen) < 10  # batched, within the bound


def test_a_failing_batch_fails_each_of_its_callers():
    group = GroupCommit(lambda items: 1 / 0, max_batch=8)
    with pytest.raises(ZeroDivisionError):
        group.submit("x")


def _samples(seed: int) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal(2048).astype("<f4")


def test_concurrent_ingest_is_grouped_committed_before_return_and_idempotent(migrated_db, plant):
    db = migrated_db
    db.group_commit_max = 8
    reader = create_engine(db.url)
    seen_committed: list[bool] = []
    outcomes: dict[str, object] = {}
    lock = threading.Lock()

    def send(name: str, ref: str | None, seed: int, point_id: int):
        x = _samples(seed)
        start.wait(30)  # every request at once, as from many sensors
        try:
            out = ingest_record(db, point_id=point_id, samples=x, fs_hz=2560.0, units="m/s2",
                                measured_at=T0, client_ref=ref)
        except Exception as exc:  # noqa: BLE001 - the refusal is the outcome checked below
            with lock:
                outcomes[name] = exc
            return
        with reader.connect() as conn:  # a separate connection sees it as soon as the call returns
            visible = conn.scalar(select(func.count()).select_from(Record).where(Record.id == out.record_id))
        with lock:
            outcomes[name] = out
            seen_committed.append(visible == 1)

    calls = [(f"n{i}", f"ref-{i}", i, plant.point_id) for i in range(24)]
    calls += [(f"dup{i}", "ref-same", 100, plant.point_id) for i in range(4)]  # one record, four sends
    calls += [("clash", "ref-3", 999, plant.point_id)]  # a used reference with other samples
    calls += [("nowhere", "ref-x", 5, 987654)]  # no such point
    start = threading.Barrier(len(calls))
    threads = [threading.Thread(target=send, args=c) for c in calls]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    reader.dispose()
    assert all(seen_committed) and len(seen_committed) >= 28
    assert isinstance(outcomes["nowhere"], NotFound)
    # "clash" raced ref-3's first send: whichever came second is the Conflict
    firsts = [outcomes[n] for n in ("n3", "clash")]
    assert sum(isinstance(o, Conflict) for o in firsts) == 1
    dups = [outcomes[f"dup{i}"] for i in range(4)]
    assert len({d.record_id for d in dups}) == 1 and sum(d.created for d in dups) == 1
    assert len({d.job_id for d in dups}) == 1
    with db.read() as s:
        n_records = s.scalar(select(func.count()).select_from(Record))
        n_waves = s.scalar(select(func.count()).select_from(Waveform))
        n_jobs = s.scalar(select(func.count()).select_from(Job))
    assert n_records == n_waves == n_jobs == 24 + 1
    group = _group(db)
    assert group.items == len(calls) and group.batches < group.items  # several requests per transaction
