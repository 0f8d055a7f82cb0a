"""Compact waveform storage: float32 little-endian, byte-shuffled, the top byte zlib-compressed.

Records arrive as raw float32 (``RAW_CODEC``, cheapest for the ingest path) and the worker compacts them
after the analysis, in the same transaction that stores the result. Shuffling puts the same byte of
every sample together. The top byte (sign and the high exponent bits) of a measured signal takes few
values and compresses to a fraction; the three lower bytes are close to random and are stored as they
are (compressing the third byte, the earlier codec, cost seven times as much zlib time for about 1 %).
Blobs of the earlier codecs stay readable. ``decode_waveform(*encode_waveform(x))`` returns exactly
``x.astype('<f4')``.
"""

from __future__ import annotations

import hashlib
import zlib

import numpy as np

CODEC = "f4le-shuffle-top-zlib1"
RAW_CODEC = "f4le"  # as received; the worker compacts it to CODEC after the analysis
_HI2_CODEC = "f4le-shuffle-hi-zlib1"  # written until the top-byte codec: two raw planes + zlib of two
_OLD_CODEC = "f4le-shuffle-zlib1"  # the first form: zlib of all four planes
_LEVEL = 1


def as_f4(samples: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(samples, dtype="<f4")


def checksum(samples_f4: np.ndarray) -> str:
    """sha256 of the stored float32 little-endian bytes."""
    return hashlib.sha256(memoryview(as_f4(samples_f4)).cast("B")).hexdigest()


def encode_waveform(samples: np.ndarray) -> tuple[str, bytes]:
    """(codec, blob): sample count (4 bytes LE), the three raw low byte planes, zlib of the top plane."""
    planes = as_f4(samples).view(np.uint8).reshape(-1, 4).T
    n = planes.shape[1]
    return CODEC, n.to_bytes(4, "little") + planes[:3].tobytes() + zlib.compress(planes[3].tobytes(), _LEVEL)


def encode_raw(samples: np.ndarray) -> tuple[str, bytes]:
    """(codec, blob) without compression: the cheapest form, for the ingest path."""
    return RAW_CODEC, as_f4(samples).tobytes()


def _planes(data, n: int, raw: int) -> np.ndarray:
    """The (n, 4) byte matrix from ``raw`` uncompressed planes after the count and zlib of the rest."""
    out = np.empty((n, 4), dtype=np.uint8)
    out[:, :raw] = np.frombuffer(data, dtype=np.uint8, count=raw * n, offset=4).reshape(raw, n).T
    high = np.frombuffer(zlib.decompress(memoryview(data)[4 + raw * n:]), dtype=np.uint8)
    if high.size != (4 - raw) * n:
        raise ValueError("damaged waveform blob")
    out[:, raw:] = high.reshape(4 - raw, n).T
    return out


def decode_waveform(codec: str, data: bytes) -> np.ndarray:
    """The float32 samples of a stored blob. ``RAW_CODEC`` gives a read-only view of ``data`` (no copy);
    callers that need to write take their own copy."""
    if codec == RAW_CODEC:
        return np.frombuffer(data, dtype="<f4")
    if codec in (CODEC, _HI2_CODEC):
        if len(data) < 4:
            raise ValueError("damaged waveform blob")
        out = _planes(data, int.from_bytes(data[:4], "little"), 3 if codec == CODEC else 2)
    elif codec == _OLD_CODEC:
        out = np.ascontiguousarray(np.frombuffer(zlib.decompress(data), dtype=np.uint8).reshape(4, -1).T)
    else:
        raise ValueError(f"unknown waveform codec {codec!r}")
    return out.view("<f4").reshape(-1)


def compress(data: bytes) -> bytes:
    return zlib.compress(data, _LEVEL)


def decompress(data: bytes) -> bytes:
    return zlib.decompress(data)
