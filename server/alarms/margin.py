"""Margin to the instability threshold, from the operating-window fit when one exists.

The margin is ``1 - h/h_c`` (1 far from the threshold, 0 on it, negative beyond it). It is read from
the result's ``window.margin`` (written when an operating-window fit exists for the point, see
``analysis/window.py``); without it the rule stays inactive with the reason :data:`NO_FIT`.
"""

from __future__ import annotations

import math

NO_FIT = "no operating-window fit for this point"


def threshold_margin(session, point, data: dict) -> tuple[float | None, str | None]:
    """``(margin, None)`` when a fit is available, else ``(None, reason)``."""
    window_data = data.get("window")
    value = window_data.get("margin") if isinstance(window_data, dict) else None
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        return float(value), None
    return None, NO_FIT
