"""Data-quality flags: measurement-chain faults the alarm engine must not take for the machine."""

from __future__ import annotations

import numpy as np

#: Pearson kurtosis above this marks the record impulsive (common practice: Gaussian noise 3, a sine 1.5;
#: cable knocks and connector faults give values far above 10).
IMPULSIVE_KURTOSIS = 10.0
CLIP_FRACTION = 1e-3  # samples pinned at the extremes (common practice)


def flat_line(x: np.ndarray) -> bool:
    """No signal: zero spread, or at least half the record in runs of one repeated value.

    Parameters
    ----------
    x : ndarray
        The raw record (before detrending), any units.

    Returns
    -------
    bool
        True when the record shows the fault.
    """
    if float(np.ptp(x)) == 0.0:
        return True
    same = np.count_nonzero(np.diff(x) == 0.0)
    return same >= 0.5 * (len(x) - 1)


def clipping(x: np.ndarray) -> bool:
    """Samples pinned at the range limits: runs of ≥ 3 equal values at the maximum or minimum
    (at least ``CLIP_FRACTION`` of the record; common practice).

    Parameters
    ----------
    x : ndarray
        The raw record (before detrending), any units.

    Returns
    -------
    bool
        True when the record shows the fault.
    """
    hi, lo = float(np.max(x)), float(np.min(x))
    if hi == lo:
        return False
    pinned = 0
    for v in (hi, lo):
        at = x == v
        run = at[2:] & at[1:-1] & at[:-2]
        pinned += int(np.count_nonzero(run))
    return pinned >= max(3, CLIP_FRACTION * len(x))


def dc_jump(x: np.ndarray, n_blocks: int = 32) -> bool:
    """A step in the mean (sensor bias shift, cable fault): an outlying jump between adjacent block means
    that is also large against the signal r.m.s.

    Parameters
    ----------
    x : ndarray
        The raw record (before detrending), any units.
    n_blocks : int
        Number of blocks whose means are compared.

    Returns
    -------
    bool
        True when the record shows the fault.
    """
    n = len(x) // n_blocks
    if n < 8:
        return False
    means = x[: n * n_blocks].reshape(n_blocks, n).mean(axis=1)
    jumps = np.abs(np.diff(means))
    rms = float(np.std(x))
    typical = float(np.median(jumps)) / 0.6745
    biggest = float(np.max(jumps))
    return biggest > 0.25 * rms and biggest > 8.0 * typical


def impulsive(x: np.ndarray, n_blocks: int = 32) -> bool:
    """Impacts: the Pearson kurtosis of some block exceeds IMPULSIVE_KURTOSIS. Blocks keep a growing or
    beating tone (high kurtosis over the whole record, but smooth) from being taken for impacts.

    Parameters
    ----------
    x : ndarray
        The raw record (before detrending), any units.
    n_blocks : int
        Number of blocks (each at least 256 samples).

    Returns
    -------
    bool
        True when the record shows the fault.
    """
    n = max(len(x) // n_blocks, min(len(x), 256))
    nb = len(x) // n
    blocks = x[: nb * n].reshape(nb, n)
    blocks = blocks - blocks.mean(axis=1, keepdims=True)
    sq = blocks * blocks
    ms = np.mean(sq, axis=1)
    ok = ms > 0
    kurt = np.mean(sq[ok] * sq[ok], axis=1) / ms[ok] ** 2
    return bool(np.any(kurt > IMPULSIVE_KURTOSIS))


def quality_flags(raw: np.ndarray, resolution_ok: bool) -> tuple[str, ...]:
    """The measurement-chain flags of one record.

    Parameters
    ----------
    raw : ndarray
        The raw record as received.
    resolution_ok : bool
        Whether the record is long enough to tell 0.48X from 0.5X.

    Returns
    -------
    tuple of str
        Some of ``flat-line``, ``clipping``, ``dc-jump``, ``impulsive``, ``too-short-for-resolution``;
        a flat line hides the other signal checks.
    """
    flags = []
    if flat_line(raw):
        flags.append("flat-line")
    else:
        if clipping(raw):
            flags.append("clipping")
        if dc_jump(raw):
            flags.append("dc-jump")
        if impulsive(raw):
            flags.append("impulsive")
    if not resolution_ok:
        flags.append("too-short-for-resolution")
    return tuple(flags)
