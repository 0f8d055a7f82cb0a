"""Route uploads: a ZIP of a walked route, readings plus ``manifest.csv``; each row stands alone.

Manifest columns (header row required; names are case-insensitive): ``point`` (point name or id),
``measured_at`` (ISO 8601 with a zone), ``file`` (path inside the ZIP), and optionally ``units``,
``speed_hz``, ``speed_source``, ``fs_hz`` (for one-column CSV files), ``client_ref``, ``note``, and for a
file with a tach channel ``tach_channel`` (its channel, from 1), ``pulses_per_rev``, ``tach_level``.

Every row is stored in its own transaction (record, waveform and job together) or rejected with the
reason; a re-upload of the same ZIP finds the first records again (the default client reference is
``route-<id>/<file>/<measured_at>``). Nothing is written to disk: names are looked up inside the
archive, so path traversal cannot reach the file system, and names with ``..``, a leading ``/`` or a
drive are refused anyway. Size limits guard against ZIP bombs: total unpacked size, per-member
compression ratio, member count and manifest rows.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import posixpath
import struct
import zipfile
import zlib
from dataclasses import dataclass

from server.errors import AppError, PayloadTooLarge
from server.names import FIX as NAME_FIX
from server.names import name_problem
from server.services.access import point_site_id
from server.services.ingest import Limits
from server.services.ingest_files import ingest_file
from server.storage.tables import Point
from server.storage.tree import route_stop_points

REQUIRED = ("point", "measured_at", "file")
OPTIONAL = ("units", "speed_hz", "speed_source", "fs_hz", "client_ref", "note", "tach_channel",
            "pulses_per_rev", "tach_level")
MANIFEST_NAMES = ("manifest.csv",)
MAX_MANIFEST_BYTES = 4 * 1024 * 1024
RATIO_MIN_BYTES = 64 * 1024  # small members may compress very well without being bombs


@dataclass(frozen=True)
class UploadLimits:
    max_total_bytes: int
    max_ratio: float
    max_rows: int

    @classmethod
    def from_settings(cls, settings) -> UploadLimits:
        return cls(settings.max_upload_bytes, settings.max_upload_ratio, settings.max_manifest_rows)


def safe_name(name: str) -> str | None:
    """The archive path as given, if it is a plain relative path; None for anything suspicious."""
    name = name.strip()
    if not name or "\\" in name or "\x00" in name or name.startswith("/") or ":" in name.split("/")[0]:
        return None
    norm = posixpath.normpath(name)
    if norm.startswith("../") or norm == ".." or "/../" in f"/{name}/":
        return None
    return norm


class Archive:
    """A ZIP read in memory with bomb guards; ``read(name)`` returns a member's bytes."""

    def __init__(self, data, limits: UploadLimits):
        # bytes, or a seekable binary file (the route upload spools the body to a temporary file)
        self.fp = io.BytesIO(data) if isinstance(data, bytes | bytearray | memoryview) else data
        try:
            self.zf = zipfile.ZipFile(self.fp)
        except (zipfile.BadZipFile, ValueError):
            raise AppError("the upload is not a ZIP file; zip the readings and manifest.csv together",
                           field="file") from None
        infos = [i for i in self.zf.infolist() if not i.is_dir()]
        if len(infos) > limits.max_rows + 100:
            raise PayloadTooLarge(f"the ZIP holds {len(infos)} files; at most {limits.max_rows + 100}",
                                  field="file")
        total = sum(i.file_size for i in infos)
        if total > limits.max_total_bytes:
            raise PayloadTooLarge(f"the ZIP unpacks to {total} bytes; at most {limits.max_total_bytes}",
                                  field="file")
        for i in infos:
            ratio = i.file_size / max(i.compress_size, 1)
            if i.file_size > RATIO_MIN_BYTES and ratio > limits.max_ratio:
                raise PayloadTooLarge(f"{i.filename!r} is compressed {ratio:.0f}:1, above the "
                                      f"{limits.max_ratio:.0f}:1 allowed; this looks like a ZIP bomb",
                                      field="file")
        self.members = {}
        for i in infos:
            name = safe_name(i.filename)
            if name is not None:
                self.members[name] = i

    def read(self, name: str) -> bytes:
        """The member's bytes; a member that is damaged or larger than its header says is refused with
        the reason (field ``file``), so its row is rejected and the other rows go on."""
        info = self.members[name]
        try:
            return self._read(info, name)
        except PayloadTooLarge:
            raise
        except (zipfile.BadZipFile, zlib.error, EOFError) as exc:
            raise AppError(f"{name!r} is damaged in the ZIP ({_zip_reason(exc)}); zip the file again",
                           field="file", status=422, code="invalid") from None
        except (NotImplementedError, RuntimeError) as exc:  # unknown compression, encrypted member
            raise AppError(f"{name!r} cannot be unpacked ({exc}); zip it without a password using deflate "
                           "or no compression", field="file", status=422, code="invalid") from None

    def _read(self, info: zipfile.ZipInfo, name: str) -> bytes:
        # Never trust the header's size: unpack the raw stream (not the member reader, which stops at the
        # header's size) and refuse as soon as it gives more; then check the CRC over what it gave.
        too_big = PayloadTooLarge(f"{name!r} unpacks to more than the {info.file_size} bytes its ZIP header "
                                  "says; zip the file again", field="file")
        if info.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED):
            raise NotImplementedError(f"compression method {info.compress_type} is not supported")
        raw = self._raw(info)
        if info.compress_type == zipfile.ZIP_STORED:
            if len(raw) > info.file_size:
                raise too_big
            data = raw
        else:
            inflater = zlib.decompressobj(-15)  # raw deflate (RFC 1951), as ZIP stores it
            data = inflater.decompress(raw, info.file_size + 1)
            if len(data) > info.file_size or inflater.unconsumed_tail:
                raise too_big
            data += inflater.flush()
            if len(data) > info.file_size:
                raise too_big
            if not inflater.eof:
                raise zipfile.BadZipFile("the deflate stream ends early")
        if len(data) != info.file_size:
            raise zipfile.BadZipFile(f"it unpacks to {len(data)} bytes, its header says {info.file_size}")
        if zlib.crc32(data) & 0xFFFFFFFF != info.CRC:
            raise zipfile.BadZipFile("bad CRC-32")
        return data

    def _raw(self, info: zipfile.ZipInfo) -> bytes:
        """The member's compressed bytes: after its local header (PKWARE APPNOTE 4.3.7: 30 bytes, then
        the name and the extra field, whose lengths are at offsets 26 and 28)."""
        if info.flag_bits & 0x1:
            raise RuntimeError("it is encrypted")
        fp = self.fp
        fp.seek(info.header_offset)
        head = fp.read(30)
        if len(head) != 30 or head[:4] != b"PK\x03\x04":
            raise zipfile.BadZipFile("its local header is missing")
        name_len, extra_len = struct.unpack("<HH", head[26:30])
        fp.seek(info.header_offset + 30 + name_len + extra_len)
        raw = fp.read(info.compress_size)
        if len(raw) != info.compress_size:
            raise zipfile.BadZipFile("its data is cut short")
        return raw


def _zip_reason(exc: Exception) -> str:
    text = str(exc)
    if isinstance(exc, zlib.error):
        return f"bad deflate data: {text}"
    return text or type(exc).__name__


def read_manifest(archive: Archive, limits: UploadLimits) -> list[dict]:
    name = next((n for n in archive.members if posixpath.basename(n).lower() in MANIFEST_NAMES), None)
    if name is None:
        raise AppError("the ZIP has no manifest.csv; add one with the columns point, measured_at, file "
                       "(and optionally units, speed_hz, fs_hz, client_ref)", field="manifest")
    if archive.members[name].file_size > MAX_MANIFEST_BYTES:
        raise PayloadTooLarge(f"manifest.csv is larger than {MAX_MANIFEST_BYTES} bytes", field="manifest")
    try:
        text = archive.read(name).decode("utf-8-sig")
    except UnicodeDecodeError:
        raise AppError("manifest.csv is not UTF-8 text; save it as UTF-8 CSV", field="manifest") from None
    try:
        return _manifest_rows(name, text, limits)
    except csv.Error as exc:  # e.g. a stray carriage return inside a field (found by tests/ops/test_fuzz.py)
        raise AppError(f"manifest.csv cannot be parsed ({exc}); save it as plain CSV text",
                       field="manifest") from None


def _manifest_rows(name: str, text: str, limits: UploadLimits) -> list[dict]:
    reader = csv.DictReader(io.StringIO(text))
    header = [h.strip().lower() for h in (reader.fieldnames or [])]
    missing = [c for c in REQUIRED if c not in header]
    if missing:
        raise AppError(f"manifest.csv lacks the column(s) {', '.join(missing)}; the header must name "
                       "point, measured_at, file", field="manifest")
    reader.fieldnames = header
    rows = []
    for row in reader:
        if len(rows) >= limits.max_rows:
            raise PayloadTooLarge(f"manifest.csv has more than {limits.max_rows} rows; split the upload",
                                  field="manifest")
        if any((v or "").strip() for k, v in row.items() if k is not None):
            rows.append({k: (v or "").strip() for k, v in row.items() if k is not None})
    if not rows:
        raise AppError("manifest.csv has no rows", field="manifest")
    base = posixpath.dirname(name)
    for r in rows:
        r["_base"] = base
    return rows


def _float(value: str, field: str) -> float | None:
    if not value:
        return None
    try:
        return float(value)
    except ValueError:
        raise AppError(f"{field} {value!r} is not a number", field=field) from None


def _int(value: str, field: str) -> int | None:
    number = _float(value, field)
    if number is None:
        return None
    if number != int(number) or number < 1:
        raise AppError(f"{field} {value!r} is not a whole number from 1", field=field)
    return int(number)


def _row(db, route, archive: Archive, row: dict, points: dict[str, int], *, uploader: str,
         limits: Limits, site_scope) -> dict:
    name = safe_name(row["file"])
    if name is None:
        raise AppError(f"file {row['file']!r} is not a plain path inside the ZIP", field="file")
    candidates = [name, posixpath.normpath(posixpath.join(row["_base"], name))] if row["_base"] else [name]
    member = next((c for c in candidates if c in archive.members), None)
    if member is None:
        raise AppError(f"file {row['file']!r} is not in the ZIP", field="file")
    problem = name_problem(row["point"])  # the one name rule (server/names.py)
    if problem is not None:
        raise AppError(f"point {problem}; {NAME_FIX}", field="point", status=422, code="invalid")
    point_id = points.get(row["point"])
    off_route = False
    if point_id is None:
        with db.read() as s:
            pid = int(row["point"]) if row["point"].isdigit() else None
            if pid is not None and s.get(Point, pid) is not None and point_site_id(s, pid) == route.site_id:
                point_id, off_route = pid, True
    if point_id is None:
        raise AppError(f"point {row['point']!r} is not on route {route.name!r}", field="point")
    try:
        measured_at = dt.datetime.fromisoformat(row["measured_at"].replace("Z", "+00:00"))
    except ValueError:
        raise AppError(f"measured_at {row['measured_at']!r} is not ISO 8601, e.g. 2026-03-01T08:00:00Z",
                       field="measured_at") from None
    ref = row.get("client_ref") or f"route-{route.id}/{name}/{measured_at.isoformat()}"
    outcome = ingest_file(db, point_id=point_id, data=archive.read(member), filename=name,
                          measured_at=measured_at, units=row.get("units") or None,
                          fs_hz=_float(row.get("fs_hz", ""), "fs_hz"),
                          speed_hz=_float(row.get("speed_hz", ""), "speed_hz"),
                          speed_source=row.get("speed_source") or None, client_ref=ref, origin="route",
                          uploader=uploader, limits=limits, site_scope=site_scope,
                          tach_file_channel=_int(row.get("tach_channel", ""), "tach_channel"),
                          pulses_per_rev=_int(row.get("pulses_per_rev", ""), "pulses_per_rev"),
                          tach_level=_float(row.get("tach_level", ""), "tach_level"))
    return {"status": "accepted" if outcome.created else "duplicate", "point_id": point_id,
            "record_id": outcome.record_id, "job_id": outcome.job_id, "off_route": off_route}


def upload_route(db, route, data, *, uploader: str, limits: Limits, upload_limits: UploadLimits,
                 site_scope: int | None) -> dict:
    """Store every row of the ZIP that is good; report each row (accepted, duplicate or rejected)."""
    from analysis.errors import SignalError

    archive = Archive(data, upload_limits)
    rows = read_manifest(archive, upload_limits)
    with db.read() as s:
        points = route_stop_points(s, route.id)
    report = []
    for i, row in enumerate(rows, start=2):  # line 1 is the header
        entry = {"row": i, "point": row.get("point"), "file": row.get("file"),
                 "measured_at": row.get("measured_at")}
        try:
            entry.update(_row(db, route, archive, row, points, uploader=uploader, limits=limits,
                              site_scope=site_scope))
        except AppError as exc:
            entry.update(status="rejected",
                         error={"code": exc.code, "message": exc.message, "field": exc.field})
        except SignalError as exc:
            entry.update(status="rejected", error={"code": "bad_signal", "message": str(exc),
                                                   "field": getattr(exc, "field", "file")})
        report.append(entry)
    counts = {k: sum(1 for e in report if e["status"] == k) for k in ("accepted", "duplicate", "rejected")}
    return {"ok": True, "route_id": route.id, **counts, "rows": report}
