"""Seeded test signals made with numpy directly (no simulator)."""

from __future__ import annotations

import numpy as np


def tone_record(rng: np.random.Generator, *, fs_hz: float = 2560.0, n: int = 16384, forcing_hz: float = 24.75,
                amp_1x: float = 1.0, amp_half: float = 0.0, growth_per_s: float = 0.0,
                noise: float = 0.02) -> np.ndarray:
    """Acceleration (m/s2): a 1X tone, an optional 0.5X tone growing as exp(growth*t), white noise."""
    t = np.arange(n) / fs_hz
    x = amp_1x * np.sin(2 * np.pi * forcing_hz * t)
    if amp_half:
        x = x + amp_half * np.exp(growth_per_s * t) * np.sin(2 * np.pi * 0.5 * forcing_hz * t + 0.3)
    return (x + noise * rng.standard_normal(n)).astype(np.float32)
