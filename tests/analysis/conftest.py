"""Fixtures for the analysis tests: seeded synthetic records (test inputs only, never expected values)."""

from __future__ import annotations

import numpy as np
import pytest


def tone_record(fs, seconds, lines, noise=0.0, seed=0):
    """Sum of sines [(freq_hz, peak_amplitude, growth_per_s), ...] plus white noise of standard deviation
    ``noise``; a growing line reaches its amplitude at the end of the record."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(round(fs * seconds))) / fs
    x = noise * rng.standard_normal(len(t)) if noise else np.zeros(len(t))
    for f, a, lam in lines:
        x += a * np.exp(lam * (t - t[-1])) * np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi))
    return x


@pytest.fixture
def make_record():
    return tone_record
