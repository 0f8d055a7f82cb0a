"""What the analysis knows about a machine when one of its rules changes level, for the cause ranking.

Gathered once per record that changes a level (never for a calm record) and kept in the event's
details, so the email is rendered from a snapshot:

* today's forcing speed and 1X acceleration peak;
* the operating-window conclusion at that speed and amplitude (unstable band, the nearest stable speeds,
  the band to skip on a variable-speed drive) from :func:`analysis.window.conclusion`, the one home of
  that conclusion (computed here from the stored fit, not recomputed);
* the last step in the point's speed, from :func:`server.services.machine_view.speed_changes` (the
  same steps the machine page marks).
"""

from __future__ import annotations

import datetime as dt
import logging
import math

log = logging.getLogger(__name__)

SPEED_LOOKBACK_DAYS = 120


def _num(value) -> float | None:
    return float(value) if isinstance(value, (int, float)) and math.isfinite(value) else None


def window_conclusion(fit: dict | None, amp_1x, speed_hz, *, forcing_per_rev: float = 1.0,
                      units: str = "g") -> dict | None:
    """The window conclusion as a dict, or ``None`` without a usable fit (or before the function exists)."""
    if not fit or fit.get("status") != "fit" or _num(amp_1x) is None or _num(speed_hz) is None:
        return None
    import analysis.physics.window as window

    conclude = getattr(window, "conclusion", None)
    if conclude is None:
        return None
    try:
        out = conclude(fit, float(amp_1x), float(speed_hz), fit.get("observed_hz") or [float(speed_hz)],
                       forcing_per_rev=forcing_per_rev, units=units)
    except (TypeError, ValueError, KeyError) as exc:  # an older stored fit: the email goes without it
        log.info("no window conclusion: %s", exc)
        return None
    return out.to_dict() if hasattr(out, "to_dict") else dict(out)


def last_speed_change(session, point_id: int, now: dt.datetime) -> dict | None:
    """The newest speed step of the point in the last SPEED_LOOKBACK_DAYS (``t``, ``from_hz``, ``to_hz``)."""
    try:
        from server.services.machine_view import speed_changes
    except ImportError:  # pragma: no cover - the machine page's module is part of the product
        return None
    steps = speed_changes(session, point_id, now - dt.timedelta(days=SPEED_LOOKBACK_DAYS), now)
    return steps[-1] if steps else None


def evidence_for(session, point_id: int, typed, window_fit: dict | None, now: dt.datetime) -> dict:
    """The evidence snapshot of one record (see the module docstring)."""
    from sqlalchemy import select

    from server.storage.tables import Asset, Point

    one_x = typed.orders.get("1X")
    amp = None if one_x is None else _num(one_x.amplitude)
    speed = _num(typed.forcing.frequency_hz)
    row = session.execute(select(Asset.forcing_multiplier, Asset.kind).join(Point, Point.asset_id == Asset.id)
                          .where(Point.id == point_id)).first()
    per_rev = float(row[0] or 1.0) if row else 1.0
    return {
        "speed_hz": speed, "forcing_per_rev": per_rev, "machine_kind": row[1] if row else None,
        "one_x_accel_peak": amp, "units": typed.units,
        "window": window_conclusion(window_fit, amp, speed, forcing_per_rev=per_rev,
                                    units=typed.units or "g"),
        "speed_change": last_speed_change(session, point_id, now),
    }
