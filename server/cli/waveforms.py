"""``halfwatch waveforms``: where raw waveforms are stored, moving them between backends (docs/scale.md)."""

from __future__ import annotations

import argparse
import json

from server.cli import UsageError


def _open():
    from server.settings import Settings
    from server.storage import Database, SchemaNotReady

    settings = Settings()
    db = Database.from_settings(settings)
    try:
        db.check_schema()
    except SchemaNotReady as exc:
        db.dispose()
        raise UsageError(str(exc)) from None
    return settings, db


def _counts(db) -> dict:
    from sqlalchemy import func, select

    from server.storage.tables import Waveform

    with db.read() as s:
        rows = s.execute(select(Waveform.store, func.count()).group_by(Waveform.store))
        return {store: n for store, n in rows}


def cmd_status(args) -> int:
    _, db = _open()
    try:
        counts = _counts(db)
    finally:
        db.dispose()
    store = db.waveforms
    print(json.dumps({"new_waveforms_go_to": store.backend, "waveform_dir": str(store.root),
                      "stored": {"database": counts.get("database", 0), "files": counts.get("files", 0)}}))
    return 0


def cmd_migrate(args) -> int:
    _, db = _open()
    try:
        def progress(out):
            if not args.json:
                print(f"batch {out.batches}: {out.moved} waveform(s) moved to {args.to}", flush=True)

        out = db.waveforms.migrate(db, args.to, batch=args.batch, max_batches=args.max_batches,
                                   on_batch=progress)
    finally:
        db.dispose()
    if args.json:
        print(json.dumps({"to": args.to, "moved": out.moved, "batches": out.batches,
                          "remaining": out.remaining, "files_removed": out.files_removed}))
    else:
        print(f"moved {out.moved} waveform(s) to {args.to} in {out.batches} batch(es); {out.remaining} "
              f"elsewhere still" + (f"; {out.files_removed} file(s) removed" if out.files_removed else ""))
        if args.to != db.waveforms.backend:
            print(f"new records still go to {db.waveforms.backend}: set HALFWATCH_WAVEFORM_STORE={args.to}")
    return 0 if out.remaining == 0 or args.max_batches is not None else 1


def cmd_sweep(args) -> int:
    _, db = _open()
    try:
        out = db.waveforms.sweep(db, grace_s=args.grace_s, dry_run=args.dry_run)
    finally:
        db.dispose()
    print(json.dumps({"dry_run": args.dry_run, "removed": out.removed, "freed_bytes": out.freed_bytes,
                      "temporary_removed": out.temporary, "younger_than_grace": out.young,
                      "referenced": out.kept}))
    return 0


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("waveforms", help="where raw waveforms are stored; move them between backends")
    wsub = p.add_subparsers(dest="waveforms_command", required=True, metavar="ACTION")
    s = wsub.add_parser("status", help="how many waveforms each backend holds (JSON)")
    s.set_defaults(func=cmd_status)
    m = wsub.add_parser("migrate", help="move every waveform to one backend (resumable, idempotent)")
    m.add_argument("--to", required=True, choices=("files", "database"),
                   help="the backend to move the waveforms to")
    m.add_argument("--batch", type=int, default=200, help="waveforms per transaction")
    m.add_argument("--max-batches", type=int, default=None, help="stop after this many batches")
    m.add_argument("--json", action="store_true", help="print one JSON object")
    m.set_defaults(func=cmd_migrate)
    w = wsub.add_parser("sweep", help="remove waveform files no record refers to (and crash leftovers)")
    w.add_argument("--grace-s", type=float, default=3600.0,
                   help="leave files younger than this (a record may be committing them)")
    w.add_argument("--dry-run", action="store_true", help="list what would be removed, remove nothing")
    w.set_defaults(func=cmd_sweep)
