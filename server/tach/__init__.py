"""Tachometer pulses stored with a record: checked at ingest, read by the worker for order tracking.

A record may come with once-per-revolution (or P-per-revolution) pulse times: sent as a list of times in
s from the first sample (``tach_pulses_s``), or found in a pulse channel sent beside the samples (the
times are then taken from it at ingest by ``analysis.tach.pulses_from_channel``). Either way they are
checked at ingest (``analysis.tach.check_pulses``: a bad tach is a 4xx naming the field, never stored)
and kept in ``record_tach`` (one row per record, the times as little-endian float64), in the same
transaction as the record. The worker hands them to ``analysis.analyze_record``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: largest relative gap between a speed_hz sent with a tach and the tach's mean speed (the half-order
#: window, 2 %: beyond it the two disagree and one of them is wrong)
SPEED_AGREEMENT = 0.02


@dataclass(frozen=True)
class Tach:
    """Checked pulse times of one record."""

    times_s: np.ndarray
    pulses_per_rev: int
    source: str  # "times" (sent as times) | "channel" (found in a pulse channel at ingest)

    @property
    def mean_speed_hz(self) -> float:
        from analysis.record.tach import mean_speed_hz

        return mean_speed_hz(self.times_s, self.pulses_per_rev)

    def row(self) -> dict:
        """Column values of ``record_tach`` (without record_id)."""
        return dict(pulses_per_rev=self.pulses_per_rev, n_pulses=int(self.times_s.size),
                    pulses=np.asarray(self.times_s, dtype="<f8").tobytes(), source=self.source)

    @classmethod
    def from_row(cls, row) -> Tach:
        return cls(np.frombuffer(row.pulses, dtype="<f8").copy(), int(row.pulses_per_rev), row.source)


def tach_from_input(*, n_samples: int, fs_hz: float, pulses_s=None, channel=None, pulses_per_rev=None,
                    level=None, field_prefix: str = "", channel_field: str = "tach_samples") -> Tach | None:
    """The checked Tach of a record from pulse times or a pulse channel (``SignalError`` naming the field),
    or None when neither is given. ``field_prefix`` goes before messages (e.g. a ZIP row);
    ``channel_field`` names the pulse channel in refusals."""
    from analysis.errors import SignalError
    from analysis.record.tach import check_pulses, pulses_from_channel

    if pulses_s is None and channel is None:
        if pulses_per_rev not in (None, 1) or level is not None:
            raise SignalError(f"{field_prefix}pulses_per_rev / tach_level need tach pulses: send "
                              "tach_pulses_s or a tach channel too, or leave them out",
                              field="pulses_per_rev")
        return None
    if pulses_s is not None and channel is not None:
        raise SignalError(f"{field_prefix}give tach pulses either as times (tach_pulses_s) or as a channel, "
                          "not both", field="tach_pulses_s")
    ppr = 1 if pulses_per_rev is None else pulses_per_rev
    field, source = "tach_pulses_s", "times"
    if channel is not None:
        ch = np.asarray(channel, dtype=np.float64).ravel()
        if ch.size != n_samples:
            raise SignalError(f"{field_prefix}the tach channel has {ch.size} samples but the record has "
                              f"{n_samples}; sample both together", field=channel_field)
        field, source = channel_field, "channel"
    try:
        if channel is not None:
            pulses_s = pulses_from_channel(ch, fs_hz, level=level)
        times = check_pulses(pulses_s, ppr, n_samples / float(fs_hz), field=field)
    except SignalError as exc:
        name = channel_field if exc.field == "tach_channel" else exc.field
        raise SignalError(f"{field_prefix}{exc}", field=name) from None
    return Tach(times, int(ppr), source)


def check_speed_agrees(speed_hz: float | None, tach: Tach | None) -> None:
    """A speed sent with a tach must match the tach's mean speed (``SPEED_AGREEMENT``)."""
    if speed_hz is None or tach is None:
        return
    mean = tach.mean_speed_hz
    if abs(speed_hz / mean - 1.0) > SPEED_AGREEMENT:
        from server.errors import AppError

        raise AppError(f"speed_hz {speed_hz:g} disagrees with the tach pulses' mean speed {mean:.4g} Hz "
                       f"(more than {100 * SPEED_AGREEMENT:g} %); check pulses_per_rev, or leave speed_hz "
                       "out (the tach gives it)", field="speed_hz")


def tach_summary(s, record_id: int) -> dict | None:
    """What a record's tach says (for the record answer): pulses, their source, the speed range in Hz."""
    from analysis.record.tach import speed_from_pulses
    from server.tach.tables import RecordTach

    row = s.get(RecordTach, record_id)
    if row is None:
        return None
    tach = Tach.from_row(row)
    _, speed = speed_from_pulses(tach.times_s, tach.pulses_per_rev)
    return {"pulses_per_rev": tach.pulses_per_rev, "n_pulses": int(tach.times_s.size), "source": tach.source,
            "speed_mean_hz": tach.mean_speed_hz, "speed_min_hz": float(speed.min()),
            "speed_max_hz": float(speed.max())}
