"""``halfwatch demo`` (the invented plant, live) and ``halfwatch mail-sink`` (an SMTP sink for trials).

The demo plant lives outside the production package, in ``halfwatch_demo`` (shipped with the source tree,
not with the server image); this is the one module of ``server`` that imports it, and only when one of
these commands runs (tests/ops/test_layers.py checks that)."""

from __future__ import annotations

import argparse
from pathlib import Path

from server.cli import UsageError

DEMO_MISSING = ("the demo plant (package halfwatch_demo) is not installed here: it ships with the halfwatch "
                "source tree, not with the server image. In a checkout of the source run `make demo`, or "
                "`pip install -e .` and then `halfwatch demo`")


def demo_module(name: str):
    """``halfwatch_demo.<name>``, imported on use; a UsageError that says what to install if it is missing."""
    import importlib

    try:
        return importlib.import_module(f"halfwatch_demo.{name}")
    except ModuleNotFoundError as exc:
        if (exc.name or "").split(".")[0] != "halfwatch_demo":
            raise  # something the demo itself needs: its own message names it
        raise UsageError(DEMO_MISSING) from None


def _port_free(port: int) -> bool:
    import socket

    with socket.socket() as s:
        try:
            s.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def cmd_demo(args) -> int:
    import logging
    import time

    mailsink, run = demo_module("mailsink"), demo_module("run")
    free_port, shown, start_sink = mailsink.free_port, mailsink.shown, mailsink.start_sink
    prepare, send_mail_now, serve = run.prepare, run.send_mail_now, run.serve
    if args.days <= 0 or args.days > 400:
        raise UsageError(f"--days {args.days:g}: give 1 to 400 days of history")
    if args.interval < 0.5:
        raise UsageError(f"--interval {args.interval:g}: give at least 0.5 seconds between live readings")
    port = args.port
    if not args.no_serve and not _port_free(port):
        raise UsageError(f"port {port} on 127.0.0.1 is in use; choose another with --port")
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    folder = Path(args.data_dir).resolve()
    mail_dir = folder / "mail"
    sink = start_sink(mail_dir, port=free_port())
    db = None
    try:
        print(f"halfwatch demo: data folder {shown(folder)} (delete it to start over)")
        print(f"halfwatch demo: alert emails are written as .eml files to {shown(mail_dir)}")
        t0 = time.perf_counter()
        settings, state, db, point_ids, report = prepare(
            folder, days=args.days, port=port, smtp_port=sink.port, jobs=args.jobs)
        if report.readings:
            print(f"backfill: {report.readings} readings analysed in {report.seconds:.0f} s")
        sent = send_mail_now(db, settings)
        print(f"ready in {time.perf_counter() - t0:.0f} s; {sent} alert email(s) sent to the sink")
        if args.no_serve:
            return 0
        serve(settings, state, db, point_ids, mail_dir, interval_s=args.interval)
        return 0
    finally:
        if db is not None:
            db.dispose()
        sink.stop()


def cmd_mail_sink(args) -> int:
    import signal
    import threading

    start_sink = demo_module("mailsink").start_sink
    folder = Path(args.dir)
    try:
        sink = start_sink(folder, host=args.host, port=args.port)
    except OSError as exc:
        raise UsageError(f"cannot listen on {args.host}:{args.port}: {exc}") from None
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    print(f"mail sink on {args.host}:{args.port}: every message is written to {folder} (nothing is relayed)",
          flush=True)
    try:
        stop.wait()
    except KeyboardInterrupt:
        pass
    finally:
        sink.stop()
    return 0


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="run the invented demo plant with simulated live data on 127.0.0.1")
    p.add_argument("--data-dir", default="demo-data", help="folder for the demo database and mail "
                   "(default ./demo-data)")
    p.add_argument("--days", type=float, default=90.0, help="days of history to backfill (default 90)")
    p.add_argument("--port", type=int, default=8000, help="HTTP port on 127.0.0.1 (default 8000)")
    p.add_argument("--jobs", type=int, default=None,
                   help="analysis processes for the backfill (default: cores - 1, at most 3)")
    p.add_argument("--interval", type=float, default=3.0, help="seconds between live readings (default 3)")
    p.add_argument("--no-serve", action="store_true", help="set up and backfill only, then exit")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("mail-sink", help="an SMTP server that writes every message to a folder (for trials)")
    p.add_argument("--dir", default="mail", help="folder for the .eml files (default ./mail)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=1025, help="SMTP port to listen on (default 1025)")
    p.set_defaults(func=cmd_mail_sink)
