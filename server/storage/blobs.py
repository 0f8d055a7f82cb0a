"""Compact waveform storage: float32 little-endian, byte-shuffled, the high bytes zlib-compressed.

Records arrive as raw float32 (``RAW_CODEC``, cheapest for the ingest path) and the worker compacts them
after the analysis, in the same transaction that stores the result. Shuffling puts the same byte of
every sample together. The two high bytes (sign, exponent, top of the mantissa) compress well; the two
low mantissa bytes of a measured signal are close to random, so they are stored as they are
(compressing them costs time and saves almost nothing).
``decode_waveform(*encode_waveform(x))`` returns exactly ``x.astype('<f4')``.
"""

from __future__ import annotations

import hashlib
import zlib

import numpy as np

CODEC = "f4le-shuffle-hi-zlib1"
RAW_CODEC = "f4le"  # as received; the worker compacts it to CODEC after the analysis
_OLD_CODEC = "f4le-shuffle-zlib1"
_LEVEL = 1


def as_f4(samples: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(samples, dtype="<f4")


def checksum(samples_f4: np.ndarray) -> str:
    """sha256 of the stored float32 little-endian bytes."""
    return hashlib.sha256(as_f4(samples_f4).tobytes()).hexdigest()


def encode_waveform(samples: np.ndarray) -> tuple[str, bytes]:
    """(codec, blob): sample count (4 bytes LE), the two raw low byte planes, zlib of the two high planes."""
    planes = as_f4(samples).view(np.uint8).reshape(-1, 4).T
    n = planes.shape[1]
    return CODEC, n.to_bytes(4, "little") + planes[:2].tobytes() + zlib.compress(planes[2:].tobytes(), _LEVEL)


def encode_raw(samples: np.ndarray) -> tuple[str, bytes]:
    """(codec, blob) without compression: the cheapest form, for the ingest path."""
    return RAW_CODEC, as_f4(samples).tobytes()


def decode_waveform(codec: str, data: bytes) -> np.ndarray:
    if codec == RAW_CODEC:
        return np.frombuffer(data, dtype="<f4").copy()
    if codec == CODEC:
        n = int.from_bytes(data[:4], "little")
        low = np.frombuffer(data, dtype=np.uint8, count=2 * n, offset=4)
        high = np.frombuffer(zlib.decompress(data[4 + 2 * n:]), dtype=np.uint8)
        if high.size != 2 * n:
            raise ValueError("damaged waveform blob")
        planes = np.concatenate([low, high]).reshape(4, n)
    elif codec == _OLD_CODEC:
        planes = np.frombuffer(zlib.decompress(data), dtype=np.uint8).reshape(4, -1)
    else:
        raise ValueError(f"unknown waveform codec {codec!r}")
    return np.ascontiguousarray(planes.T).view("<f4").reshape(-1)


def compress(data: bytes) -> bytes:
    return zlib.compress(data, _LEVEL)


def decompress(data: bytes) -> bytes:
    return zlib.decompress(data)
