"""Alert-email commands: ``halfwatch mailer`` (the outbox sender) and ``halfwatch email-test``."""

from __future__ import annotations

import argparse
import re
import sys

from server.cli import UsageError

ADDRESS = re.compile(r"^[^@\s]+@[^@\s]+\.[^@\s]+$")


def _settings():
    from pydantic import ValidationError

    from server.settings import Settings

    try:
        return Settings()
    except ValidationError as exc:
        first = exc.errors()[0]
        raise UsageError(f"HALFWATCH_{str(first['loc'][0]).upper()}: {first['msg']}") from None


def cmd_mailer(args) -> int:
    from server.alarms.mailer import run_background_once, run_mailer_forever
    from server.cli.service import _database

    settings = _settings()
    if not settings.smtp_host:
        raise UsageError("HALFWATCH_SMTP_HOST is not set; give the SMTP server that sends the alert emails")
    db = _database(settings)
    try:
        if args.once:
            print(f"sent {run_background_once(db, settings)} email(s)")
        else:
            run_mailer_forever(db, settings)
    finally:
        db.dispose()
    return 0


def cmd_email_test(args) -> int:
    import smtplib

    from server.alarms.mailer import build_message, connect
    from server.alarms.notify import message_id
    from server.alarms.render import smtp_test_email

    if not ADDRESS.match(args.to):
        raise UsageError(f"--to: {args.to!r} is not an email address (like planner@example.com)")
    settings = _settings()
    if not settings.smtp_host:
        raise UsageError("HALFWATCH_SMTP_HOST is not set; give the SMTP server to test")
    subject, text, html = smtp_test_email(base_url=settings.public_base_url)
    msg = build_message(0, args.to, message_id(f"test:{args.to}:{id(args)}"), subject, text, html, settings)
    try:
        smtp = connect(settings)
        try:
            smtp.send_message(msg, to_addrs=[args.to])
        finally:
            smtp.quit()
    except (OSError, smtplib.SMTPException) as exc:
        where = f"{settings.smtp_host}:{settings.smtp_port}"
        print(f"halfwatch email-test: sending through {where} failed: {exc}", file=sys.stderr)
        return 1
    print(f"test message sent to {args.to} through {settings.smtp_host}:{settings.smtp_port}")
    return 0


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("mailer", help="send the alert emails waiting in the outbox and refresh the "
                       "operating-window fits behind the margin rule (runs until stopped)")
    p.add_argument("--once", action="store_true", help="send what is due, then exit")
    p.set_defaults(func=cmd_mailer)
    p = sub.add_parser("email-test", help="send a test message through the configured SMTP server")
    p.add_argument("--to", required=True, metavar="ADDRESS", help="recipient address")
    p.set_defaults(func=cmd_email_test)
