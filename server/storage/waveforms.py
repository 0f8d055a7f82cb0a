"""Where the raw samples of each record live: one small interface, two backends.

``database`` (the default): the samples are in ``waveforms.data`` (raw float32 at ingest, compacted by
the worker after the analysis; server/storage/blobs.py). ``files``: the samples are a file in a directory
of content-addressed files, named by the SHA-256 of their bytes (the raw float32 little-endian samples,
the same digest as ``records.checksum``), ``<dir>/ab/cd/abcd...``; the ``waveforms`` row stays (codec,
uploaded source file) with ``store = 'files'``, ``digest`` set and ``data`` empty, so a PostgreSQL
deployment keeps bulk samples out of the database.

A file is written to a temporary name in its directory, fsynced, renamed to its digest and the directory
fsynced, all before the caller's transaction commits (and so before the API's 201). A crash at any point
leaves either no file under the digest or the whole file; a stray temporary file or a file whose record
never committed is removed by :meth:`WaveformStore.sweep` after a grace period. Several records with the
same samples share one file; it is unlinked only when no row refers to it any more.

Interface (used by ingest, the worker, the reading page, retention and ``halfwatch waveforms``):

- ``FileBlobs``: ``put(digest, data)``, ``get(digest)``, ``exists(digest)``, ``delete(digest)`` by content
  digest.
- ``WaveformStore``: ``row(digest, samples, ...)`` (the ``waveforms`` row of a new record; for ``files`` the
  file is durable when it returns), ``samples(row)`` (the stored float32 samples of a row), ``exists(conn,
  record_id)``, ``delete_many(s, record_ids) -> bytes freed`` (inside the caller's transaction; files are
  unlinked after it commits), ``migrate(db, to)`` and ``sweep(db)``.
- ``store_for(session_or_connection)`` finds the store of the database a session or connection belongs to
  (``Database.from_settings`` attaches it; a plain ``Database(url)`` reads both backends' rows only if
  its files directory is attached too).
"""

from __future__ import annotations

import logging
import os
import re
import threading
import time
import uuid
import weakref
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from sqlalchemy import bindparam, delete, func, select, update
from sqlalchemy.orm import Session

from server.storage import blobs
from server.storage.tables import Record, Waveform

log = logging.getLogger("halfwatch.waveforms")

BACKENDS = ("database", "files")
_DIGEST = re.compile(r"^[0-9a-f]{64}$")
_TMP_PREFIX = ".tmp-"
SWEEP_GRACE_S = 3600.0  # an unreferenced file younger than this may belong to a commit still in flight


class MissingWaveformFile(RuntimeError):
    """A row says its samples are in the files backend, but the file is not there (or no directory is set)."""


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class FileBlobs:
    """A directory of content-addressed files: the name of each is the SHA-256 of its bytes."""

    def __init__(self, root: Path):
        self.root = Path(root)

    def path(self, digest: str) -> Path:
        if not _DIGEST.match(digest or ""):
            raise ValueError(f"not a SHA-256 digest: {digest!r}")
        return self.root / digest[:2] / digest[2:4] / digest

    def exists(self, digest: str) -> bool:
        return self.path(digest).is_file()

    def _make_dirs(self, folder: Path) -> None:
        """Create ``folder`` (two levels under the root) and fsync each parent that got a new entry."""
        if folder.is_dir():
            return
        if not self.root.is_dir():
            self.root.mkdir(parents=True, exist_ok=True)
            _fsync_dir(self.root.parent)
        made = []
        for level in (folder.parent, folder):
            try:
                level.mkdir()
                made.append(level)
            except FileExistsError:
                pass
        for level in made:
            _fsync_dir(level.parent)

    def put(self, digest: str, data: bytes | memoryview) -> bool:
        """Store ``data`` under ``digest`` durably; False if it was already there (its time is refreshed,
        which keeps :meth:`WaveformStore.sweep` away from it while the caller commits)."""
        path = self.path(digest)
        if path.is_file():
            try:
                os.utime(path)
                return False
            except FileNotFoundError:  # unlinked in between: write it again
                pass
        self._make_dirs(path.parent)
        tmp = path.parent / f"{_TMP_PREFIX}{digest[:16]}-{os.getpid()}-{uuid.uuid4().hex[:12]}"
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        try:
            view = memoryview(data).cast("B")
            while view:
                view = view[os.write(fd, view):]
            os.fsync(fd)
        except BaseException:
            os.close(fd)
            tmp.unlink(missing_ok=True)
            raise
        os.close(fd)
        os.replace(tmp, path)
        _fsync_dir(path.parent)
        return True

    def get(self, digest: str) -> bytes:
        try:
            return self.path(digest).read_bytes()
        except FileNotFoundError:
            raise MissingWaveformFile(f"waveform file {self.path(digest)} is missing") from None

    def size(self, digest: str) -> int:
        try:
            return self.path(digest).stat().st_size
        except FileNotFoundError:
            return 0

    def delete(self, digest: str) -> int:
        """Unlink the file; the bytes freed (0 if it was not there)."""
        path = self.path(digest)
        try:
            n = path.stat().st_size
            path.unlink()
        except FileNotFoundError:
            return 0
        _fsync_dir(path.parent)
        return n

    def entries(self) -> Iterator[tuple[Path, str | None]]:
        """(path, digest) of every file; digest None for a temporary file left by a crash."""
        if not self.root.is_dir():
            return
        for a in sorted(self.root.iterdir()):
            if not a.is_dir():
                continue
            for b in sorted(a.iterdir()):
                if not b.is_dir():
                    continue
                for f in sorted(b.iterdir()):
                    if f.name.startswith(_TMP_PREFIX):
                        yield f, None
                    elif _DIGEST.match(f.name):
                        yield f, f.name


_W = Waveform.__table__.c
_REFERENCED = (select(_W.digest)
               .where(_W.store == "files", _W.digest.in_(bindparam("digests", expanding=True))).distinct())


@dataclass
class MigrateOutcome:
    moved: int = 0
    batches: int = 0
    remaining: int = 0
    files_removed: int = 0


@dataclass
class SweepOutcome:
    removed: int = 0
    freed_bytes: int = 0
    temporary: int = 0
    young: int = 0
    kept: int = 0


@dataclass
class WaveformStore:
    """The backend new records go to (``backend``) and the files directory (``root``; rows of either backend
    stay readable whatever ``backend`` says)."""

    backend: str = "database"
    root: Path | None = None
    unlink_grace_s: float = 60.0  # a file put() touched this recently may belong to a commit in flight
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def __post_init__(self):
        if self.backend not in BACKENDS:
            raise ValueError(f"waveform store {self.backend!r} is not one of {', '.join(BACKENDS)}")
        if self.backend == "files" and self.root is None:
            raise ValueError("the files waveform store needs a directory (waveform_dir)")

    @property
    def files(self) -> FileBlobs:
        if self.root is None:
            raise MissingWaveformFile("this waveform is stored as a file, but no waveform directory is set "
                                      "(HALFWATCH_WAVEFORM_DIR, default <data_dir>/waveforms)")
        return FileBlobs(self.root)

    # -- writing -------------------------------------------------------------------------------------
    def row(self, digest: str, samples_f4: np.ndarray, *, source_name: str | None = None,
            source_bytes: bytes | None = None, backend: str | None = None) -> dict:
        """The ``waveforms`` row values (without ``record_id``) of a new record. For ``files`` the file is
        durable on return; call this before the transaction that inserts the row."""
        backend = backend or self.backend
        if backend == "files":
            self.files.put(digest, memoryview(blobs.as_f4(samples_f4)).cast("B"))
            return dict(codec=blobs.RAW_CODEC, data=b"", source_name=source_name, source_bytes=source_bytes,
                        store="files", digest=digest)
        codec, data = blobs.encode_raw(samples_f4)
        return dict(codec=codec, data=data, source_name=source_name, source_bytes=source_bytes,
                    store="database", digest=None)

    # -- reading -------------------------------------------------------------------------------------
    def blob(self, store: str | None, digest: str | None, codec: str, data: bytes) -> tuple[str, bytes]:
        """(codec, bytes) of a stored row's samples, wherever they are."""
        if store == "files":
            return blobs.RAW_CODEC, self.files.get(digest or "")
        return codec, data

    def samples(self, row) -> np.ndarray:
        """The float32 samples of a ``waveforms`` row (an ORM object or a row with its column names)."""
        store, digest = getattr(row, "store", None), getattr(row, "digest", None)
        codec, data = self.blob(store, digest, row.codec, row.data)
        return blobs.decode_waveform(codec, data)

    @staticmethod
    def exists(conn, record_id: int) -> bool:
        return conn.execute(select(_W.record_id).where(_W.record_id == record_id)).first() is not None

    # -- deleting ------------------------------------------------------------------------------------
    def delete_many(self, s, record_ids) -> int:
        """Delete the waveforms of these records inside the caller's transaction (``s``: a Session or a
        Connection); the bytes freed. Files no other row refers to are unlinked once a Session commits (with
        a bare Connection, by the next :meth:`sweep`)."""
        ids = list(record_ids)
        if not ids:
            return 0
        is_session = isinstance(s, Session)
        conn = s.connection() if is_session else s
        rows = conn.execute(select(_W.record_id, _W.store, _W.digest,
                                   func.length(_W.data) + func.coalesce(func.length(_W.source_bytes), 0))
                            .where(_W.record_id.in_(ids))).all()
        conn.execute(delete(Waveform).where(Waveform.record_id.in_(ids)))
        freed = sum(int(r[3] or 0) for r in rows)
        digests = sorted({r[2] for r in rows if r[1] == "files" and r[2]})
        if digests:
            still = set(conn.execute(_REFERENCED, {"digests": digests}).scalars())
            gone = [d for d in digests if d not in still]
            freed += sum(self.files.size(d) for d in gone)
            if gone and is_session:
                self._unlink_after_commit(s, gone)
        return freed

    def _unlink_after_commit(self, session, digests: list[str]) -> None:
        from sqlalchemy import event

        def unlink(_session):
            self.unlink_unreferenced(session.get_bind(), digests)

        event.listen(session, "after_commit", unlink, once=True)

    def unlink_unreferenced(self, engine, digests) -> int:
        """Unlink those of ``digests`` that no committed row refers to; files touched within the grace
        period (a record being stored with the same samples) wait for :meth:`sweep`."""
        digests = list(digests)
        if not digests:
            return 0
        with engine.connect() as conn:
            still = set(conn.execute(_REFERENCED, {"digests": digests}).scalars())
        freed = 0
        for d in digests:
            if d in still:
                continue
            try:
                if time.time() - self.files.path(d).stat().st_mtime < self.unlink_grace_s:
                    continue
            except FileNotFoundError:
                continue
            freed += self.files.delete(d)
        return freed

    # -- moving between backends ---------------------------------------------------------------------
    def migrate(self, db, to: str, *, batch: int = 200, max_batches: int | None = None,
                on_batch=None) -> MigrateOutcome:
        """Move every waveform to backend ``to``, ``batch`` records per transaction. Resumable (a batch
        commits whole; rows already moved are skipped) and idempotent (a second run moves nothing)."""
        if to not in BACKENDS:
            raise ValueError(f"--to must be one of {', '.join(BACKENDS)}")
        out = MigrateOutcome()
        files = self.files  # both directions need the directory
        last = 0
        while max_batches is None or out.batches < max_batches:
            with db.read_engine.connect() as conn:
                rows = conn.execute(
                    select(_W.record_id, _W.codec, _W.data, _W.store, _W.digest, Record.checksum)
                    .join(Record, Record.id == _W.record_id)
                    .where(_W.store != to, _W.record_id > last).order_by(_W.record_id).limit(batch)).all()
            if not rows:
                break
            last = rows[-1][0]
            updates, dropped = [], []
            for rid, codec, data, store, digest, checksum in rows:
                x = blobs.decode_waveform(*self.blob(store, digest, codec, data))
                if blobs.checksum(x) != checksum:
                    raise RuntimeError(f"record {rid}: the stored waveform does not match its ingest "
                                       "checksum; restore it from a backup before moving it")
                if to == "files":
                    files.put(checksum, memoryview(blobs.as_f4(x)).cast("B"))
                    updates.append({"rid": rid, "was": store, "codec": blobs.RAW_CODEC, "data": b"",
                                    "store": "files", "digest": checksum})
                else:
                    codec, packed = blobs.encode_waveform(x)  # compact, as the worker leaves analysed ones
                    updates.append({"rid": rid, "was": store, "codec": codec, "data": packed,
                                    "store": "database", "digest": None})
                    dropped.append(digest)
            with db.write() as conn:
                done = conn.execute(update(Waveform.__table__)
                                    .where(_W.record_id == bindparam("rid"), _W.store == bindparam("was"))
                                    .values(codec=bindparam("codec"), data=bindparam("data"),
                                            store=bindparam("store"), digest=bindparam("digest")), updates)
                out.moved += int(done.rowcount if done.rowcount is not None and done.rowcount >= 0
                                 else len(updates))
            if dropped:  # the samples are in the database now; their files go once nothing refers to them
                with db.read_engine.connect() as conn:
                    still = set(conn.execute(_REFERENCED, {"digests": sorted(set(dropped))}).scalars())
                for d in sorted(set(dropped) - still):
                    out.files_removed += int(files.delete(d) > 0)
            out.batches += 1
            if on_batch is not None:
                on_batch(out)
        with db.read_engine.connect() as conn:
            out.remaining = int(conn.scalar(select(func.count()).select_from(Waveform)
                                            .where(_W.store != to)) or 0)
        return out

    def sweep(self, db, *, grace_s: float = SWEEP_GRACE_S, dry_run: bool = False) -> SweepOutcome:
        """Remove files no row refers to (a record that never committed, a deletion whose unlink was lost in a
        crash) and temporary files, if older than ``grace_s``."""
        out = SweepOutcome()
        now = time.time()
        batch: list[tuple[Path, str]] = []

        def flush():
            with db.read_engine.connect() as conn:
                still = set(conn.execute(_REFERENCED, {"digests": [d for _, d in batch]}).scalars())
            for _path, d in batch:
                if d in still:
                    out.kept += 1
                elif not dry_run:
                    out.freed_bytes += self.files.delete(d)
                    out.removed += 1
                else:
                    out.removed += 1
            batch.clear()

        for path, digest in self.files.entries():
            try:
                age = now - path.stat().st_mtime
            except FileNotFoundError:
                continue
            if age < grace_s:
                out.young += 1
                continue
            if digest is None:
                out.temporary += 1
                if not dry_run:
                    path.unlink(missing_ok=True)
                continue
            batch.append((path, digest))
            if len(batch) >= 500:
                flush()
        if batch:
            flush()
        return out



def from_settings(settings) -> WaveformStore:
    root = Path(settings.waveform_dir) if settings.waveform_dir else Path(settings.data_dir) / "waveforms"
    return WaveformStore(settings.waveform_store, root)


_STORES: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
DEFAULT = WaveformStore()


def attach(db, store: WaveformStore) -> None:
    """Make ``store`` the waveform store of ``db`` (and of sessions and connections of its engines)."""
    db.waveforms = store
    for engine in {db.write_engine, db.read_engine}:
        _STORES[engine] = store


def store_for(bind) -> WaveformStore:
    """The store of the database a Session, Connection or Engine belongs to (the default if none attached)."""
    engine = getattr(bind, "engine", None)
    if engine is None and hasattr(bind, "get_bind"):
        engine = bind.get_bind()
        engine = getattr(engine, "engine", engine)
    return _STORES.get(engine, DEFAULT) if engine is not None else DEFAULT
