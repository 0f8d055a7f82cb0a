"""Taking jobs and fencing them: claims, attempts, leases, the worker's heartbeat, and the fencing token.

Claiming is one atomic ``UPDATE ... WHERE id = (SELECT ... LIMIT 1) RETURNING`` (on PostgreSQL the
subquery takes ``FOR UPDATE SKIP LOCKED``, so workers on several machines share the queue). A job whose
lease ran out (its worker crashed or was killed) is claimed again; each claim counts as an attempt and
after ``max_attempts`` the job is marked failed with its error. Every later write about a job names it by
id, worker and attempt (the fence): a worker whose lease was taken over writes nothing.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import socket
import uuid
from dataclasses import dataclass
from typing import TYPE_CHECKING

from sqlalchemy import and_, bindparam, or_, select, tuple_, update

from server.storage.tables import Job, utcnow

if TYPE_CHECKING:
    from server.worker.store import Analysed

log = logging.getLogger("halfwatch.worker")


class LeaseLost(RuntimeError):
    """The job's lease expired and someone else owns it now; this worker's result is discarded."""


@dataclass(frozen=True)
class Claim:
    job_id: int
    record_id: int
    attempt: int
    worker_id: str
    reason: str = ""  # "ingest": the record's first analysis, so no earlier result to supersede


def default_worker_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"


_J = Job.__table__.c
_EXPIRE = (update(Job.__table__)
           .where(_J.state == "running", _J.lease_until < bindparam("now"),
                  _J.attempts >= bindparam("max_attempts"))
           .values(state="failed", finished_at=bindparam("now"), lease_until=None, error=bindparam("why")))
# A time further ahead than any worker could have set it (``horizon`` = now + lease + CLOCK_SLACK) means
# the clock was stepped back: such a job is due now instead of parked for the size of the step.
CLOCK_SLACK = dt.timedelta(minutes=10)
_RUNNABLE = or_(and_(_J.state == "queued", or_(_J.not_before <= bindparam("now"),
                                               _J.not_before > bindparam("horizon"))),
                and_(_J.state == "running", or_(_J.lease_until < bindparam("now"),
                                                _J.lease_until > bindparam("horizon"))))
_CLAIMS: dict[tuple[bool, int], object] = {}


def _claim_statement(skip_locked: bool, n: int):
    """UPDATE the n oldest runnable jobs ... RETURNING, built once per (backend, n).

    One job: ``WHERE id = (SELECT ... LIMIT 1 [FOR UPDATE SKIP LOCKED])``. Several on PostgreSQL: the locked
    pick goes into a CTE joined with ``UPDATE ... FROM`` (an ``IN (SELECT ... SKIP LOCKED)`` form let
    concurrent claimers come back empty-handed while jobs were still queued). Several on SQLite (one writer
    at a time): ``WHERE id IN (SELECT ... LIMIT n)``."""
    key = (skip_locked, n)
    if key not in _CLAIMS:
        pick = select(_J.id).where(_RUNNABLE).order_by(_J.id).limit(n)
        if skip_locked:
            pick = pick.with_for_update(skip_locked=True)
        if n == 1:
            target = _J.id == pick.scalar_subquery()
        elif skip_locked:
            picked = pick.cte("picked")
            target = _J.id == picked.c.id
        else:
            target = _J.id.in_(pick.scalar_subquery())
        _CLAIMS[key] = (update(Job.__table__).where(target, _RUNNABLE)
                        .values(state="running", attempts=_J.attempts + 1, worker_id=bindparam("wid"),
                                lease_until=bindparam("lease_until"))
                        .returning(_J.id, _J.record_id, _J.attempts, _J.reason))
    return _CLAIMS[key]


def claim_batch(db, worker_id: str, *, lease_s: float, max_attempts: int, n: int = 1,
                now: dt.datetime | None = None) -> list[Claim]:
    """Claim up to n of the oldest runnable jobs (queued, or running with an expired lease), oldest first."""
    now = now or utcnow()
    why = (f"lease expired on attempt {max_attempts} of {max_attempts}: the worker stopped during the "
           "analysis (crashed or killed)")
    with db.write() as conn:
        # leases that ran out on the last allowed attempt: give up on them
        conn.execute(_EXPIRE, {"now": now, "max_attempts": max_attempts, "why": why})
        lease_until = now + dt.timedelta(seconds=lease_s)
        rows = conn.execute(_claim_statement(db.dialect == "postgresql", max(1, int(n))), {
            "now": now, "horizon": lease_until + CLOCK_SLACK, "wid": worker_id,
            "lease_until": lease_until}).all()
    return sorted((Claim(r[0], r[1], r[2], worker_id, r[3] or "") for r in rows), key=lambda c: c.job_id)


def claim(db, worker_id: str, *, lease_s: float, max_attempts: int, now: dt.datetime | None = None):
    """Claim the oldest runnable job; None if there is none."""
    got = claim_batch(db, worker_id, lease_s=lease_s, max_attempts=max_attempts, n=1, now=now)
    return got[0] if got else None


_FENCE = update(Job.__table__).where(_J.id == bindparam("jid"), _J.worker_id == bindparam("wid"),
                                     _J.attempts == bindparam("attempt"), _J.state == "running")
_DONE = _FENCE.values(state="done", finished_at=bindparam("t"), lease_until=None, error=None)
_DONE_MANY = (update(Job.__table__)
              .where(tuple_(_J.id, _J.attempts).in_(bindparam("pairs", expanding=True)),
                     _J.worker_id == bindparam("wid"), _J.state == "running")
              .values(state="done", finished_at=bindparam("t"), lease_until=None, error=None)
              .returning(_J.id))


def _fence(conn, c: Claim, statement=None, **values) -> None:
    params = {"jid": c.job_id, "wid": c.worker_id, "attempt": c.attempt}
    if statement is None:
        statement = _FENCE.values(**values)
    else:
        params["t"] = utcnow()
    done = conn.execute(statement, params)
    if done.rowcount != 1:
        raise LeaseLost(f"job {c.job_id} attempt {c.attempt} is no longer leased to {c.worker_id}")


def _fence_batch(conn, items: list[Analysed]) -> set[int]:
    """Mark the batch's jobs done in one statement; the ids still leased to this worker at their attempt."""
    wid = items[0].claim.worker_id
    if any(item.claim.worker_id != wid for item in items):
        raise ValueError("one batch, one worker")
    pairs = [(item.claim.job_id, item.claim.attempt) for item in items]
    return set(conn.execute(_DONE_MANY, {"pairs": pairs, "wid": wid, "t": utcnow()}).scalars())


def fail(db, c: Claim, error: str, *, permanent: bool, settings) -> None:
    now = utcnow()
    final = permanent or c.attempt >= settings.max_attempts
    values = {"error": error[:4000], "lease_until": None}
    if final:
        values.update(state="failed", finished_at=now)
    else:
        wait = dt.timedelta(seconds=settings.retry_backoff_s * c.attempt)
        values.update(state="queued", not_before=now + wait)
    try:
        with db.write() as conn:
            _fence(conn, c, **values)
    except LeaseLost:
        log.warning("job %s: lease lost before the failure could be recorded", c.job_id)


def start_heartbeat(db, worker_id: str, settings):
    """The worker's heartbeat row (server.ops.heartbeat: /readyz and /metrics read it), old rows pruned."""
    from server.ops.heartbeat import Heartbeat

    beat = Heartbeat(db, worker_id, "worker", interval_s=settings.heartbeat_s)
    beat.prune()
    return beat
