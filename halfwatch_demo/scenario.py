"""What each demo machine does over time: the ground truth that the simulator is asked to follow.

Time ``t`` is in days relative to the demo's anchor (0 = when the demo was first set up, negative in
the backfilled past, positive while the live sensors run). :func:`condition` returns the simulator kind,
its parameters and the shaft speed for one reading. All of it is invented for the demo.

The onset story (VP-102): the drive's speed setpoint is raised from 24.0 to 25.4 Hz at ``ONSET_CHANGE_DAY``.
That puts 0.5X (12.7 Hz) onto the motor stand's reed mode at 12.75 Hz (the damped Mathieu picture: a
stiffness modulated at 1X pumps a mode near half of it). The modulation keeps rising slowly with wear,
so the ratio to the instability threshold h/h_c passes 1 some days later and the limit-cycle amplitude
grows like sqrt(h/h_c - 1) (house model for the demo). One reading a day, just after the morning
restart, catches the growth from the noise inside the record (simulator kind ``parametric``).
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass

from halfwatch_demo.plant import AssetSpec, PointSpec

G = 9.80665
ONSET_CHANGE_DAY = -34.0
ONSET_SPEEDS_HZ = (24.0, 25.4)
ONSET_MODE_HZ = 12.75
ONSET_RATIO_START, ONSET_RATIO_PER_DAY, ONSET_RATIO_MAX = 0.90, 0.016, 1.6
ONSET_VELOCITY_SCALE = 8.2  # mm/s r.m.s. of 0.5X at h/h_c = 2
RESTART_HOUR = 6
WHIRL_START_DAY = -61.0  # the feed pump's bearing change
LOOSENESS_MM_S = 2.7
START_DAY = -90.0
# CT-3: +-4.5 % over the day, so every speed stays within the data-quality check's 10 % of the usual one
SWING = 0.045


@dataclass(frozen=True)
class Condition:
    kind: str
    speed_hz: float  # shaft speed
    params: dict  # keyword arguments for analysis.simulate.simulate (besides fs, duration, seed)
    note: str = ""


def g_peak(v_rms_mm_s: float, f_hz: float) -> float:
    """Acceleration peak (g) of a sine with the given velocity r.m.s. (mm/s) at f_hz."""
    return v_rms_mm_s * math.sqrt(2.0) * 1e-3 * 2 * math.pi * f_hz / G


def seed_for(point: str, when_iso: str) -> int:
    return zlib.crc32(f"{point}|{when_iso}".encode())


def _jitter(seed: int, salt: int, spread: float) -> float:
    """A repeatable pseudo-random factor 1 +- spread (uniform)."""
    u = (zlib.crc32(f"{seed}:{salt}".encode()) % 10_000) / 10_000.0
    return 1.0 + spread * (2.0 * u - 1.0)


def _background(asset: AssetSpec, point: PointSpec, forcing_hz: float, seed: int, scale: float = 1.0) -> dict:
    one_x = asset.one_x_mm_s * scale * _jitter(seed, 1, 0.05) * (0.85 if not point.online else 1.0)
    a1 = g_peak(one_x, forcing_hz)
    return {"forcing_hz": forcing_hz, "amp_1x_g": a1, "amp_2x_g": 0.6 * a1, "amp_3x_g": 0.3 * a1,
            "bearing_tone_g": 0.004, "noise_g": 0.008}


def condition(asset: AssetSpec, point: PointSpec, t_days: float, hour: int, seed: int) -> Condition:
    b = asset.behaviour
    speed = asset.nominal_hz * _jitter(seed, 2, 0.002)
    if b == "onset":
        return _onset(asset, point, t_days, hour, seed)
    if b == "variable":
        swing = 1.0 + SWING * math.sin(2 * math.pi * (hour - 9) / 24.0)
        speed = asset.nominal_hz * swing * _jitter(seed, 2, 0.003)
        p = _background(asset, point, speed, seed, scale=(speed / asset.nominal_hz) ** 2)
        return Condition("healthy", speed, p, "variable speed follows the day's temperature")
    forcing = speed * asset.multiplier
    if b == "whirl" and t_days >= WHIRL_START_DAY:
        p = _background(asset, point, forcing, seed)
        v = 1.7 * _jitter(seed, 3, 0.03) * (1.0 if point.online else 0.7)
        order = 0.43 * _jitter(seed, 4, 0.01)
        p.update(sub_amp_g=g_peak(v, order * forcing), whirl_order=order)
        return Condition("whirl", speed, p, "oil whirl after the bearing change")
    if b == "looseness":
        p = _background(asset, point, forcing, seed)
        v = LOOSENESS_MM_S * _jitter(seed, 3, 0.08) * (1.0 if "top" in point.location else 0.6)
        a = g_peak(v, 0.5 * forcing)
        p.update(sub_amp_g=a, amp_1p5x_g=0.6 * a, amp_2p5x_g=0.3 * a)
        return Condition("half-order", speed, p, "loose motor-stand bolt")
    scale = 1.0
    if asset.name.endswith("ID-1"):
        scale = 1.0 + 0.004 * (t_days - START_DAY)  # slow fouling of the impeller: 1X creeps up
    return Condition("healthy", speed, _background(asset, point, forcing, seed, scale))


def onset_ratio(t_days: float) -> float:
    """h / h_c of VP-102's motor-stand mode (0 before the speed change: far from the tongue)."""
    if t_days < ONSET_CHANGE_DAY:
        return 0.0
    return min(ONSET_RATIO_MAX, ONSET_RATIO_START + ONSET_RATIO_PER_DAY * (t_days - ONSET_CHANGE_DAY))


def onset_velocity_mm_s(ratio: float) -> float:
    return ONSET_VELOCITY_SCALE * math.sqrt(max(ratio - 1.0, 0.0))


def _onset(asset: AssetSpec, point: PointSpec, t_days: float, hour: int, seed: int) -> Condition:
    before = t_days < ONSET_CHANGE_DAY
    speed = ONSET_SPEEDS_HZ[0 if before else 1] * _jitter(seed, 2, 0.002)
    p = _background(asset, point, speed, seed, scale=1.0 if before else 1.1)
    ratio = onset_ratio(t_days)
    if ratio <= 1.0:
        return Condition("healthy", speed, p, f"h/h_c {ratio:.2f}" if ratio else "before the speed change")
    v = onset_velocity_mm_s(ratio) * _jitter(seed, 3, 0.05) * (1.0 if point.online else 0.8)
    sub = g_peak(v, 0.5 * speed)
    if point.online and hour == RESTART_HOUR:  # the morning restart: growth from the noise in the record
        p.update(f0_hz=ONSET_MODE_HZ, zeta=0.02, ratio=ratio, onset_s=0.3, sub_amp_g=sub, floor_g=sub / 6)
        return Condition("parametric", speed, p, f"restart, h/h_c {ratio:.2f}")
    p.update(sub_amp_g=sub, amp_1p5x_g=0.25 * sub, amp_2p5x_g=0.08 * sub)
    return Condition("half-order", speed, p, f"limit cycle, h/h_c {ratio:.2f}")
