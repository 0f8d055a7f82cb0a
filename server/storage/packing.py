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


def max_hold(x: np.ndarray, y: np.ndarray, max_points: int) -> tuple[np.ndarray, np.ndarray]:
    """At most max_points (x, y) pairs: each bucket's maximum at its own x (vectorised; peaks survive)."""
    x, y = np.asarray(x), np.asarray(y)
    n = y.size
    if n <= max_points:
        return x.copy(), y.copy()
    edges = np.linspace(0, n, max_points + 1).astype(np.intp)
    starts, lengths = edges[:-1], np.diff(edges)
    grid = starts[:, None] + np.arange(lengths.max())[None, :]
    vals = np.where(grid < edges[1:, None], y[np.minimum(grid, n - 1)], -np.inf)
    idx = starts + np.argmax(vals, axis=1)
    return x[idx], y[idx]
