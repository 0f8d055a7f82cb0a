"""Chart arrays of a result in one small blob, and the earlier forms read back the same way.

The compact form (``pack_chart``, written since migration 0006) stores each chart series (x, y) as:

- x: when the full series sits on a uniform grid ``x0 + k*dx`` (Welch frequencies, envelope times), only
  the grid and the kept bin numbers ``k`` (first differences, uint16); otherwise float32 values.
- y: max-hold decimated to the points the chart draws (``analysis.results.max_hold``: every bucket keeps
  its largest value at its own x, so peaks and their frequencies survive), then log-quantised against the
  series' largest value ``ref`` (stored as float64): ``q = round(ln(y/ref) / LOG_STEP)``. A decoded value is
  within ``MAX_REL_ERROR`` (0.5 %) of the stored one for every value above ``FLOOR`` x ``ref``; the largest
  value comes back exactly; zeros stay zero, smaller values read as the lowest level (``FLOOR`` x ``ref``
  to within one step), NaN stays NaN.
  Negative values (not expected in an amplitude) fall back to float32.
- codes are first-differenced (int16, the two byte planes apart), and everything is zlib-compressed.

Layout: ``MAGIC``, then one raw deflate stream of: a 4-byte little-endian header length, the JSON header
(meta, and per series its names, counts, grid and ref), the arrays back to back. ``unpack_arrays`` reads
this and the two earlier forms (JSON line + float32 arrays; the same zlib-compressed), so stored rows need no
rewrite. Both give ``(meta, {name: float64 array})``.
"""

from __future__ import annotations

import json
import math
import struct
import zlib

import numpy as np

MAGIC = b"HWC1"
LOG_STEP = 0.01  # natural-log step of the amplitude codes
MAX_REL_ERROR = math.exp(LOG_STEP / 2) - 1  # 0.5 %: half a step either way
FLOOR = 1e-9  # values below FLOOR x ref read back as FLOOR x ref
_QMAX = int(math.ceil(-math.log(FLOOR) / LOG_STEP))
_ZERO, _NAN = -_QMAX - 1, -_QMAX - 2
_LEVEL = 9


def pack_arrays(meta: dict, **arrays: np.ndarray) -> bytes:
    """The earlier plain form (JSON header line, float32 arrays); kept for tools that want exact floats."""
    parts, names = [], []
    for name, arr in arrays.items():
        a = np.ascontiguousarray(arr, dtype="<f4")
        names.append([name, int(a.size)])
        parts.append(a.tobytes())
    header = json.dumps({"meta": meta, "arrays": names}).encode()
    return header + b"\n" + b"".join(parts)


def _grid(x: np.ndarray) -> tuple[float, float] | None:
    """(x0, dx) when x is uniform (to float32 rounding of its values) with two points or more, else None."""
    if x.size < 2:
        return None
    x = x.astype(np.float64)
    dx = (x[-1] - x[0]) / (x.size - 1)
    if not math.isfinite(dx) or dx <= 0:
        return None
    k = np.arange(x.size)
    if np.max(np.abs(x - (x[0] + k * dx))) > max(1e-9 * dx, 2.0 ** -22 * float(np.max(np.abs(x)))):
        return None
    return float(x[0]), float(dx)


def _codes(y: np.ndarray, ref: float) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.rint(np.log(y / ref) / LOG_STEP)
    q = np.clip(np.nan_to_num(q, nan=0.0, neginf=-_QMAX, posinf=0.0), -_QMAX, 0).astype(np.int32)
    q[y == 0] = _ZERO
    q[~np.isfinite(y)] = _NAN
    return q


def _int16_planes(d: np.ndarray) -> bytes:
    """Small signed integers (|d| < 2**15) zigzag-coded to uint16 (0, -1, 1, -2 ... -> 0, 1, 2, 3 ...), the
    low bytes then the high bytes (mostly zero, so they compress to almost nothing)."""
    d = d.astype(np.int64)
    z = ((d << 1) ^ (d >> 63)).astype("<u2")
    b = np.ascontiguousarray(z).view(np.uint8).reshape(-1, 2)
    return b[:, 0].tobytes() + b[:, 1].tobytes()


def _from_planes(raw: bytes, n: int) -> np.ndarray:
    b = np.frombuffer(raw, dtype=np.uint8, count=2 * n)
    z = np.ascontiguousarray(np.stack([b[:n], b[n:]], axis=1)).view("<u2").reshape(-1).astype(np.int64)
    return (z >> 1) ^ -(z & 1)


def pack_chart(meta: dict, series: dict[tuple[str, str], tuple[np.ndarray, np.ndarray, int]]) -> bytes:
    """The compact form of chart series: ``{(x name, y name): (x, y, max_points)}`` (full arrays in)."""
    from analysis.results import max_hold

    heads, body = [], []
    for (xname, yname), (x, y, max_points) in series.items():
        x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
        grid = _grid(x)
        k, yd = max_hold(np.arange(y.size), y, max_points)
        head = {"x": xname, "y": yname, "n": int(k.size), "grid": grid}
        if grid is None:
            body.append(np.ascontiguousarray(x[k], dtype="<f4").tobytes())
        else:
            body.append(_int16_planes(np.diff(k, prepend=0)) if k.size and k.max() < 32768 else
                        np.ascontiguousarray(k, dtype="<u4").tobytes())
            head["k32"] = bool(k.size and k.max() >= 32768)
        finite = yd[np.isfinite(yd)]
        if finite.size and finite.min() < 0:
            head["ref"] = None
            body.append(np.ascontiguousarray(yd, dtype="<f4").tobytes())
        else:
            ref = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
            head["ref"] = ref
            body.append(_int16_planes(np.diff(_codes(yd, ref), prepend=0)))
        heads.append(head)
    header = json.dumps({"meta": meta, "series": heads}, separators=(",", ":")).encode()
    packer = zlib.compressobj(_LEVEL, zlib.DEFLATED, -15)  # raw deflate: the magic says what it is
    return MAGIC + packer.compress(struct.pack("<I", len(header)) + header + b"".join(body)) + packer.flush()


def _unpack_chart(blob: bytes) -> tuple[dict, dict[str, np.ndarray]]:
    raw = zlib.decompress(blob[len(MAGIC):], -15)
    (hlen,) = struct.unpack_from("<I", raw, 0)
    header = json.loads(raw[4:4 + hlen])
    body, pos, out = raw[4 + hlen:], 0, {}
    for head in header["series"]:
        n = head["n"]
        if head["grid"] is None:
            out[head["x"]] = np.frombuffer(body, "<f4", n, pos).astype(np.float64)
            pos += 4 * n
        else:
            if head.get("k32"):
                k = np.frombuffer(body, "<u4", n, pos).astype(np.int64)
                pos += 4 * n
            else:
                k = np.cumsum(_from_planes(body[pos:pos + 2 * n], n))
                pos += 2 * n
            x0, dx = head["grid"]
            out[head["x"]] = x0 + k * dx
        if head["ref"] is None:
            out[head["y"]] = np.frombuffer(body, "<f4", n, pos).astype(np.float64)
            pos += 4 * n
        else:
            q = np.cumsum(_from_planes(body[pos:pos + 2 * n], n))
            pos += 2 * n
            y = head["ref"] * np.exp(np.maximum(q, -_QMAX) * LOG_STEP)
            y[q == _ZERO] = 0.0
            y[q == _NAN] = np.nan
            out[head["y"]] = y
    return header["meta"], out


def unpack_arrays(blob: bytes) -> tuple[dict, dict[str, np.ndarray]]:
    """``(meta, arrays)`` of any stored form: compact (``MAGIC``), plain, or zlib of the plain form."""
    blob = bytes(blob)
    if blob[:len(MAGIC)] == MAGIC:
        return _unpack_chart(blob)
    raw = blob if blob[:1] == b"{" else zlib.decompress(blob)
    head, _, body = raw.partition(b"\n")
    header = json.loads(head)
    out, offset = {}, 0
    for name, size in header["arrays"]:
        out[name] = np.frombuffer(body, dtype="<f4", count=size, offset=offset).astype(np.float64)
        offset += 4 * size
    return header["meta"], out
