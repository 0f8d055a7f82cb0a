"""Compact waveform storage: float32 little-endian, byte-shuffled, zlib-compressed.

Shuffling puts the exponent bytes of all samples together, which compresses much better than the
interleaved float bytes. ``decode_waveform(encode_waveform(x))`` returns exactly ``x.astype('<f4')``.
"""

from __future__ import annotations

import hashlib
import zlib

import numpy as np

CODEC = "f4le-shuffle-zlib1"
_LEVEL = 1


def as_f4(samples: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(samples, dtype="<f4")


def checksum(samples_f4: np.ndarray) -> str:
    """sha256 of the stored float32 little-endian bytes."""
    return hashlib.sha256(as_f4(samples_f4).tobytes()).hexdigest()


def encode_waveform(samples: np.ndarray) -> tuple[str, bytes]:
    x = as_f4(samples)
    planes = x.view(np.uint8).reshape(-1, 4).T.tobytes()
    return CODEC, zlib.compress(planes, _LEVEL)


def decode_waveform(codec: str, data: bytes) -> np.ndarray:
    if codec != CODEC:
        raise ValueError(f"unknown waveform codec {codec!r}")
    planes = np.frombuffer(zlib.decompress(data), dtype=np.uint8)
    return np.ascontiguousarray(planes.reshape(4, -1).T).view("<f4").reshape(-1)


def compress(data: bytes) -> bytes:
    return zlib.compress(data, _LEVEL)


def decompress(data: bytes) -> bytes:
    return zlib.decompress(data)
