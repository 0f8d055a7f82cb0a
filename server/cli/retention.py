"""``halfwatch retention``: delete raw waveforms past the horizon that no keep rule holds (docs/data.md)."""

from __future__ import annotations

import argparse
import json

from server.cli import UsageError


def _mb(n: int) -> str:
    return f"{n / 1e6:.1f} MB"


def cmd_retention(args) -> int:
    from server.retention.apply import run
    from server.settings import Settings
    from server.storage import Database, SchemaNotReady

    settings = Settings()
    db = Database.from_settings(settings)
    try:
        def progress(out):
            if not args.json:
                print(f"batch {out.batches}: {out.deleted} waveform(s) deleted so far, "
                      f"{_mb(out.freed_bytes)} freed", flush=True)

        try:
            out = run(db, settings, dry_run=args.dry_run, max_batches=args.max_batches, actor="cli retention",
                      on_batch=progress)
        except SchemaNotReady as exc:
            raise UsageError(f"refusing to apply retention: {exc}") from None
    finally:
        db.dispose()
    p = out.plan
    if args.json:
        print(json.dumps({"dry_run": args.dry_run, **p.summary(), "deleted": out.deleted,
                          "freed_bytes": out.freed_bytes, "batches": out.batches, "skipped": out.skipped}))
        return 0
    verb = "would delete" if args.dry_run else "planned to delete"
    print(f"raw waveforms measured before {p.horizon.isoformat()} "
          f"({settings.retention_waveform_days:g} days): {verb} {len(p.delete)} ({_mb(p.delete_bytes)} of "
          "stored samples); results and chart spectra are kept")
    for reason in ("pinned", "alarm", "daily-first", "route-walk"):
        print(f"  kept, {reason}: {p.kept.get(reason, 0)} ({_mb(p.kept_bytes.get(reason, 0))})")
    for reason, n in sorted(p.not_candidates.items()):
        print(f"  kept, {reason}: {n}")
    if not args.dry_run:
        print(f"deleted {out.deleted} waveform(s) in {out.batches} batch(es), {_mb(out.freed_bytes)} freed"
              + (f"; {out.skipped} kept at delete time (pinned or queued since the plan)" if out.skipped
                 else ""))
        print("SQLite reuses the freed pages; `VACUUM` gives them back to the file system (docs/data.md).")
    return 0


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("retention", help="delete raw waveforms past the horizon that no keep rule holds")
    p.add_argument("--dry-run", action="store_true",
                   help="only say what would be deleted and the bytes freed")
    p.add_argument("--max-batches", type=int, default=None, help="stop after this many batches")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=cmd_retention)
