"""The outbox sender: claim with a lease, render, deliver over SMTP, record sent/failed.

Several senders may run at once (the worker's loop and ``halfwatch mailer``): a row is claimed in a
short write transaction (``status='sending'`` with ``lease_until``), delivered outside any
transaction, then marked. A sender that dies mid-send leaves the row claimed; once the lease runs
out another sender takes it again. The SMTP exchange itself cannot be made exactly-once, so the row
is marked sent straight after the server's 250 and every copy carries the same ``Message-ID``.
Retries back off exponentially (``mail_backoff_s`` x 2^(attempt-1), capped); after
``mail_max_attempts`` or a permanent 5xx refusal the row is ``failed`` with the error kept.

A row whose message cannot be built (a stored name or payload that no email can carry, such as old
data from before the name rule, or a payload missing its event) never stops the others: building
happens row by row inside its own ``try``; the failure is kept in ``last_error`` and counted in
``attempts``, and after :data:`BUILD_ATTEMPTS` attempts the row is ``failed``. Header values are
made single-line and free of control characters (:func:`server.names.header_safe`) whatever the
stored names hold.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import smtplib
import socket
import ssl
import threading
import uuid
from email.message import EmailMessage
from email.utils import formatdate

from sqlalchemy import or_, select, update

from server.names import EMAIL_RE, header_safe, name_problem
from server.storage.tables import utcnow

from . import render
from .tables import AlarmEvent, OutboxMessage

log = logging.getLogger(__name__)

BUILD_ATTEMPTS = 3  # house choice: a message that cannot be built fails after this many tries


def sender_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"


def claim(db, *, me: str, lease_s: float, batch: int = 50, now: dt.datetime | None = None) -> list[int]:
    """Claim up to ``batch`` due rows for ``me``; returns their ids."""
    now = now or utcnow()
    due = or_(
        (OutboxMessage.status == "pending") & (OutboxMessage.next_attempt_at <= now),
        (OutboxMessage.status == "sending") & (OutboxMessage.lease_until < now),
    )
    pick = select(OutboxMessage.id).where(due).order_by(OutboxMessage.id).limit(batch)
    if db.dialect == "postgresql":
        pick = pick.with_for_update(skip_locked=True)
    stmt = (
        update(OutboxMessage)
        .where(OutboxMessage.id.in_(pick.scalar_subquery()), due)
        .values(status="sending", claimed_by=me, lease_until=now + dt.timedelta(seconds=lease_s),
                attempts=OutboxMessage.attempts + 1)
        .returning(OutboxMessage.id)
    )
    with db.unit_of_work() as s:
        return sorted(s.scalars(stmt).all())


def _event_snapshot(e: AlarmEvent) -> dict:
    return {"kind": e.kind, "metric": e.metric, "from_level": e.from_level, "to_level": e.to_level,
            "value": e.value, "threshold": e.threshold, "record_id": e.record_id, "summary": e.summary,
            "details": e.details or {}, "created_at": e.created_at.strftime("%Y-%m-%d %H:%M UTC")}


def compose(session, row: OutboxMessage, settings) -> tuple[str, str, str]:
    base = settings.public_base_url
    simulated = bool(getattr(settings, "simulated_data", False))
    if row.kind in ("alarm", "incident"):
        ids = row.payload.get("event_ids") or [row.event_id]
        events = {e.id: e for e in session.scalars(select(AlarmEvent).where(AlarmEvent.id.in_(ids)))}
        snapshots = [_event_snapshot(events[i]) for i in ids if i in events]
        if row.kind == "incident":
            return render.incident_email(row.payload, snapshots, base_url=base, simulated=simulated)
        return render.alarm_email(snapshots, base_url=base)
    if row.kind == "digest":
        p = row.payload
        return render.digest_email(p["rows"], scope_name=p["scope_name"], local_date=p["local_date"],
                                   base_url=base, changes_24h=p.get("changes_24h", 0), simulated=simulated)
    return render.smtp_test_email(base_url=base)


def build_message(row_id: int, recipient: str, message_id: str, subject: str, text: str, html: str,
                  settings) -> EmailMessage:
    if name_problem(recipient) or not EMAIL_RE.match(recipient):
        raise ValueError(f"the recipient {recipient!r} is not one plain address")
    msg = EmailMessage()
    msg["From"] = settings.smtp_from
    msg["To"] = recipient
    msg["Subject"] = header_safe(subject, limit=300)
    msg["Date"] = formatdate(localtime=False, usegmt=True)
    msg["Message-ID"] = message_id
    msg["X-Halfwatch-Outbox"] = str(row_id)
    msg.set_content(text)
    msg.add_alternative(html, subtype="html")
    return msg


def tls_context(settings) -> ssl.SSLContext:
    """Certificate checks always on; ``smtp_ca_file`` adds a site CA (an internal mail relay)."""
    ca_file = getattr(settings, "smtp_ca_file", "") or None
    return ssl.create_default_context(cafile=ca_file)


def connect(settings) -> smtplib.SMTP:
    """An authenticated SMTP connection as the settings describe."""
    timeout = settings.smtp_timeout_s
    if settings.smtp_security == "ssl":
        smtp: smtplib.SMTP = smtplib.SMTP_SSL(settings.smtp_host, settings.smtp_port, timeout=timeout,
                                              context=tls_context(settings))
    else:
        smtp = smtplib.SMTP(settings.smtp_host, settings.smtp_port, timeout=timeout)
        if settings.smtp_security == "starttls":
            smtp.starttls(context=tls_context(settings))
    if settings.smtp_user:
        smtp.login(settings.smtp_user, settings.smtp_password.get_secret_value())
    return smtp


def _backoff_s(settings, attempts: int) -> float:
    return min(settings.mail_backoff_max_s, settings.mail_backoff_s * 2 ** max(0, attempts - 1))


def _mark(db, row_id: int, me: str, **values) -> None:
    with db.unit_of_work() as s:
        s.execute(update(OutboxMessage).where(OutboxMessage.id == row_id, OutboxMessage.claimed_by == me)
                  .values(lease_until=None, **values))


def _retry(db, row_id: int, me: str, attempts: int, error: str, settings, *, permanent: bool,
           now: dt.datetime | None = None) -> None:
    now = now or utcnow()
    if permanent or attempts >= settings.mail_max_attempts:
        _mark(db, row_id, me, status="failed", last_error=error[:2000])
    else:
        _mark(db, row_id, me, status="pending", last_error=error[:2000],
              next_attempt_at=now + dt.timedelta(seconds=_backoff_s(settings, attempts)))


def _prepare(db, settings, ids: list[int], *, me: str, now: dt.datetime | None):
    """Compose and build each claimed row on its own; a row that fails is retried later or failed."""
    prepared, broken = [], []
    with db.unit_of_work() as s:
        rows = s.scalars(select(OutboxMessage).where(OutboxMessage.id.in_(ids)).order_by(OutboxMessage.id))
        for row in rows:
            try:
                subject, text, html = compose(s, row, settings)
                msg = build_message(row.id, row.recipient, row.message_id, subject, text, html, settings)
                msg.as_bytes()  # everything that serialising could refuse is refused here, not mid-send
            except Exception as exc:  # noqa: BLE001 - any stored value that cannot become an email
                broken.append((row.id, row.attempts, f"message could not be built: {type(exc).__name__}: "
                                                     f"{header_safe(exc, limit=500)}"))
                continue
            row.subject, row.body_text, row.body_html = msg["Subject"], text, html
            prepared.append((row.id, row.recipient, row.attempts, msg))
    for row_id, attempts, error in broken:
        log.warning("outbox row %s: %s (attempt %s of %s)", row_id, error, attempts, BUILD_ATTEMPTS)
        _retry(db, row_id, me, attempts, error, settings,
               permanent=attempts >= min(BUILD_ATTEMPTS, settings.mail_max_attempts), now=now)
    return prepared


def send_claimed(db, settings, ids: list[int], *, me: str, now: dt.datetime | None = None) -> int:
    """Deliver claimed rows over one SMTP connection; returns how many were sent."""
    prepared = _prepare(db, settings, ids, me=me, now=now)
    if not prepared:
        return 0
    try:
        smtp = connect(settings)
    except (OSError, smtplib.SMTPException) as exc:
        for row_id, _r, attempts, _m in prepared:
            _retry(db, row_id, me, attempts, f"SMTP connect: {exc}", settings, permanent=False, now=now)
        log.warning("SMTP server %s:%s unreachable: %s", settings.smtp_host, settings.smtp_port, exc)
        return 0
    sent = 0
    try:
        for row_id, recipient, attempts, msg in prepared:
            try:
                smtp.send_message(msg, to_addrs=[recipient])
            except smtplib.SMTPRecipientsRefused as exc:
                _retry(db, row_id, me, attempts, f"refused: {exc.recipients}", settings, permanent=True,
                       now=now)
                continue
            except smtplib.SMTPResponseException as exc:
                permanent = 500 <= exc.smtp_code < 600
                _retry(db, row_id, me, attempts, f"SMTP {exc.smtp_code}: {exc.smtp_error!r}", settings,
                       permanent=permanent, now=now)
                continue
            except (OSError, smtplib.SMTPException) as exc:
                _retry(db, row_id, me, attempts, f"SMTP: {exc}", settings, permanent=False, now=now)
                break  # the connection is gone; the rest stay claimed until their lease ends
            except Exception as exc:  # noqa: BLE001 - this row only; the others still go out
                _retry(db, row_id, me, attempts, f"message could not be sent: {type(exc).__name__}: {exc}",
                       settings, permanent=attempts >= min(BUILD_ATTEMPTS, settings.mail_max_attempts),
                       now=now)
                continue
            _mark(db, row_id, me, status="sent", sent_at=utcnow(), last_error=None)
            sent += 1
    finally:
        try:
            smtp.quit()
        except (OSError, smtplib.SMTPException):
            pass
    return sent


def run_mailer_once(db, settings, *, me: str | None = None, now: dt.datetime | None = None) -> int:
    """Queue due digests, then claim and send what is due. Returns the number of emails sent."""
    if not settings.smtp_host:
        return 0
    from .digest import queue_due_digests

    queue_due_digests(db, now=now)
    me = me or sender_id()
    total = 0
    while True:
        ids = claim(db, me=me, lease_s=settings.mail_lease_s, now=now)
        if not ids:
            return total
        sent = send_claimed(db, settings, ids, me=me, now=now)
        total += sent
        if sent < len(ids):
            return total  # something failed: back off until the next poll


def run_background_once(db, settings, *, me: str | None = None, now: dt.datetime | None = None) -> int:
    """One pass of the alarm background work: refresh stale operating-window fits, then send mail."""
    from .margin import refresh_window_fits

    try:
        refresh_window_fits(db, now=now)
    except Exception:  # the fits are optional; mail must still go out
        log.exception("operating-window fit refresh failed")
    return run_mailer_once(db, settings, me=me, now=now)


def run_mailer_forever(db, settings, stop: threading.Event | None = None) -> None:
    stop = stop or threading.Event()
    me = sender_id()
    log.info("mailer %s started (SMTP %s:%s)", me, settings.smtp_host, settings.smtp_port)
    while not stop.is_set():
        try:
            run_background_once(db, settings, me=me)
        except Exception:  # keep the loop alive; the next poll retries
            log.exception("mailer pass failed")
        stop.wait(settings.mail_poll_s)
