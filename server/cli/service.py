"""Service commands: serve, worker, db upgrade, user add, apikey create, reanalyze."""

from __future__ import annotations

import argparse
import sys

from server.cli import UsageError


def _settings(args):
    from server.settings import Settings

    overrides = {}
    for name in ("host", "port"):
        value = getattr(args, name, None)
        if value is not None:
            overrides[name] = value
    return Settings(**overrides)


def _database(settings, *, check: bool = True):
    from server.storage import Database, SchemaNotReady

    db = Database.from_settings(settings)
    if check:
        try:
            db.check_schema()
        except SchemaNotReady as exc:
            db.dispose()
            raise UsageError(str(exc)) from None
    return db


def cmd_serve(args) -> int:
    import uvicorn

    from server.app import create_app

    settings = _settings(args)
    _database(settings).dispose()  # fail fast with the migration hint
    if args.with_worker:
        settings = settings.model_copy(update={"embedded_worker": True})
    uvicorn.run(create_app(settings), host=settings.host, port=settings.port, log_level="info")
    return 0


def cmd_worker(args) -> int:
    import signal
    import threading

    from server.worker import run_forever

    settings = _settings(args)
    db = _database(settings)
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())  # finish the current job, then leave
    try:
        run_forever(db, settings, stop=stop, max_jobs=args.max_jobs)
    finally:
        db.dispose()
    return 0


def cmd_db_upgrade(args) -> int:
    from server.migrations import current_revisions, upgrade

    settings = _settings(args)
    _database(settings, check=False).dispose()  # creates the data directory for SQLite
    upgrade(settings.database_url, args.revision)
    print(f"database at revision {', '.join(sorted(current_revisions(settings.database_url)))}")
    return 0


def cmd_user_add(args) -> int:
    import getpass

    from server.errors import AppError
    from server.services import users

    password = args.password
    if password is None:
        password = sys.stdin.readline().rstrip("\n") if not sys.stdin.isatty() else getpass.getpass()
    settings = _settings(args)
    db = _database(settings)
    try:
        user = users.add_user(db, settings, username=args.username, password=password,
                              role=args.role, email=args.email or "", site=args.site)
    except AppError as exc:
        raise UsageError(str(exc)) from None
    finally:
        db.dispose()
    where = f", limited to site {user['site_id']}" if user["site_id"] is not None else ""
    print(f"user {user['username']} ({user['role']}{where}) added")
    return 0


def cmd_apikey_create(args) -> int:
    from server.errors import AppError
    from server.services import users

    settings = _settings(args)
    db = _database(settings)
    try:
        key, info = users.create_api_key(db, name=args.name, role=args.role, site=args.site,
                                         created_by="cli")
    except AppError as exc:
        raise UsageError(str(exc)) from None
    finally:
        db.dispose()
    print(f"api key {info['prefix']} ({info['role']}, site {info['site_id'] or 'all'}); shown once:")
    print(key)
    return 0


def cmd_reanalyze(args) -> int:
    import datetime as dt

    from server.services.jobs import requeue_report

    try:
        since = dt.datetime.fromisoformat(args.since)
    except ValueError:
        raise UsageError(f"--since {args.since!r} is not a date; use YYYY-MM-DD or ISO 8601") from None
    if since.tzinfo is None:
        since = since.replace(tzinfo=dt.UTC)
    settings = _settings(args)
    db = _database(settings)
    try:
        n, skipped = requeue_report(db, since, point_id=args.point)
    finally:
        db.dispose()
    print(f"{n} record(s) queued for analysis")
    if skipped:
        print(f"{skipped} record(s) skipped: retention removed their raw waveform (results and spectra kept)")
    return 0


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("serve", help="run the HTTP API (and, with --with-worker, the analysis worker)")
    p.add_argument("--with-worker", action="store_true", help="also run the analysis worker in this process")
    p.add_argument("--host", default=None, help="address to listen on (default: HALFWATCH_HOST)")
    p.add_argument("--port", type=int, default=None, help="HTTP port (default: HALFWATCH_PORT)")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("worker", help="run the analysis worker (claims queued jobs)")
    p.add_argument("--max-jobs", type=int, default=None, help="stop after this many jobs")
    p.set_defaults(func=cmd_worker)

    p = sub.add_parser("db", help="database schema")
    dsub = p.add_subparsers(dest="db_command", required=True, metavar="ACTION")
    u = dsub.add_parser("upgrade", help="apply the schema migrations")
    u.add_argument("revision", nargs="?", default="head", help="the schema revision to reach (default: head)")
    u.set_defaults(func=cmd_db_upgrade)

    p = sub.add_parser("user", help="user accounts")
    usub = p.add_subparsers(dest="user_command", required=True, metavar="ACTION")
    u = usub.add_parser("add", help="add a user (password from --password or stdin)")
    u.add_argument("username", help="the login name (no control characters)")
    u.add_argument("--role", choices=("viewer", "technician", "engineer", "admin"), default="viewer",
                   help="what the user may do (default: viewer)")
    u.add_argument("--email", default="", help="address for alert mail they subscribe to (optional)")
    u.add_argument("--password", default=None, help="the password (default: read from stdin or asked)")
    u.add_argument("--site", default=None, help="site name or id the user is limited to (default: all sites)")
    u.set_defaults(func=cmd_user_add)

    p = sub.add_parser("apikey", help="API keys for sensors and gateways")
    asub = p.add_subparsers(dest="apikey_command", required=True, metavar="ACTION")
    a = asub.add_parser("create", help="create a key (printed once)")
    a.add_argument("name", help="what the key is for, e.g. the gateway it sits in")
    a.add_argument("--role", choices=("viewer", "technician", "engineer", "admin"), default="technician",
                   help="what the key may do (default: technician, which may upload readings)")
    a.add_argument("--site", default=None, help="site name or id the key is limited to (default: all sites)")
    a.set_defaults(func=cmd_apikey_create)

    p = sub.add_parser("reanalyze", help="queue records measured since DATE for a fresh analysis")
    p.add_argument("--since", required=True, help="YYYY-MM-DD or ISO 8601 time (UTC if no zone)")
    p.add_argument("--point", type=int, default=None, help="only this point id")
    p.set_defaults(func=cmd_reanalyze)
