"""The MQTT record payload: two forms, both of our own design, both carrying one record.

JSON form (UTF-8, no NUL byte anywhere): the same object as the HTTP API's JSON body
(:class:`server.schemas.RecordJson`)::

    {"fs_hz": 2560, "units": "m/s2", "measured_at": "2026-03-01T08:00:00Z",
     "samples_b64": "<base64 of little-endian float32>", "speed_hz": 24.75,
     "client_ref": "gw7-000123"}

Binary form: the same JSON object without ``samples_b64``/``samples`` (the header), one NUL byte
(0x00), then the raw little-endian samples (``dtype`` float32 by default, or float64). It saves the
third that base64 adds. A payload is taken as binary exactly when it contains a NUL byte, which
valid JSON text never does.

``client_ref`` makes redelivery safe: a repeat with the same reference for the same point is not
stored twice. When a gateway sends none, :func:`derived_ref` makes one from the point, the start
time and the samples, so a record redelivered after a broker or bridge restart is still stored once.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
from dataclasses import dataclass

import numpy as np
from pydantic import ValidationError

from server.errors import AppError, PayloadTooLarge

SEPARATOR = b"\x00"


@dataclass(frozen=True)
class Decoded:
    """One decoded payload: validated metadata (a RecordJson) and the samples."""

    meta: object
    samples: np.ndarray
    form: str  # "json" or "binary"


def invalid(message: str, field: str) -> AppError:
    return AppError(message, field=field, status=422, code="invalid")


def _validation_message(exc: ValidationError, where: str) -> AppError:
    # the HTTP API's wording for the same problems (server.errors)
    from server.errors import _FIXES, _field_of

    first = exc.errors()[0]
    field = _field_of(first.get("loc", ())) or where
    fix = _FIXES.get(first.get("type", ""), "correct it")
    msg = str(first.get("msg", "invalid")).removeprefix("Value error, ")
    more = f" (and {len(exc.errors()) - 1} more problem(s))" if len(exc.errors()) > 1 else ""
    return invalid(f"{field}: {msg}; {fix}{more}", field)


def _model(text: bytes, where: str):
    from server.schemas import RecordJson

    try:
        return RecordJson.model_validate_json(text)
    except ValidationError as exc:
        raise _validation_message(exc, where) from None


def _from_bytes(raw: bytes, dtype: str, field: str) -> np.ndarray:
    width = 4 if dtype == "float32" else 8
    if len(raw) % width:
        raise invalid(f"{field} holds {len(raw)} bytes, not a whole number of little-endian {dtype} "
                      "values", field)
    return np.frombuffer(raw, dtype="<f4" if width == 4 else "<f8")


def decode(payload: bytes, *, max_bytes: int) -> Decoded:
    """Decode one payload or raise an AppError whose message names the field and the fix."""
    if len(payload) > max_bytes:
        raise PayloadTooLarge(f"payload of {len(payload)} bytes is larger than {max_bytes}; send shorter "
                              "records", field="payload")
    if not payload:
        raise invalid("the payload is empty; send a JSON record or a JSON header + NUL + float32 samples",
                      "payload")
    header, sep, raw = payload.partition(SEPARATOR)
    if sep:
        meta = _model(header, "header")
        if meta.samples_b64 is not None or meta.samples is not None:
            raise invalid("a binary payload carries its samples after the NUL byte; remove samples_b64 "
                          "and samples from the header", "samples_b64")
        return Decoded(meta, _from_bytes(raw, meta.dtype, "binary samples"), "binary")
    meta = _model(payload, "payload")
    if (meta.samples_b64 is None) == (meta.samples is None):
        raise invalid("give exactly one of samples_b64 (base64 float32) or samples (list of numbers)",
                      "samples_b64")
    if meta.samples is not None:
        return Decoded(meta, np.asarray(meta.samples, dtype=np.float64), "json")
    try:
        raw = base64.b64decode(meta.samples_b64, validate=True)
    except (binascii.Error, ValueError):
        raise invalid("samples_b64 is not valid base64", "samples_b64") from None
    return Decoded(meta, _from_bytes(raw, meta.dtype, "samples_b64"), "json")


def derived_ref(point_id: int, measured_at, samples: np.ndarray) -> str:
    """A reference for a record sent without ``client_ref`` (same record -> same reference)."""
    h = hashlib.sha256(f"{point_id}|{measured_at.isoformat()}|".encode())
    h.update(np.ascontiguousarray(samples, dtype="<f4").tobytes())
    return "mqtt:" + h.hexdigest()[:40]
