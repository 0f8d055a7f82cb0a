"""Chart arrays in one blob: a JSON header line, then float32 arrays back to back.

Not compressed: decimated spectra hardly compress and compressing them cost more than the rest of storing
a result. ``unpack_arrays`` also reads the zlib-compressed form of earlier versions."""

from __future__ import annotations

import json
import zlib

import numpy as np


def pack_arrays(meta: dict, **arrays: np.ndarray) -> bytes:
    parts, names = [], []
    for name, arr in arrays.items():
        a = np.ascontiguousarray(arr, dtype="<f4")
        names.append([name, int(a.size)])
        parts.append(a.tobytes())
    header = json.dumps({"meta": meta, "arrays": names}).encode()
    return header + b"\n" + b"".join(parts)


def unpack_arrays(blob: bytes) -> tuple[dict, dict[str, np.ndarray]]:
    raw = blob if blob[:1] == b"{" else zlib.decompress(blob)
    head, _, body = raw.partition(b"\n")
    header = json.loads(head)
    out, offset = {}, 0
    for name, size in header["arrays"]:
        out[name] = np.frombuffer(body, dtype="<f4", count=size, offset=offset).astype(np.float64)
        offset += 4 * size
    return header["meta"], out
