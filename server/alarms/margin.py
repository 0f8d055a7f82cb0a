"""Margin to the instability threshold from the point's operating-window fit.

The fit (``analysis.window.fit_operating_window``, the same one the dashboard shows) takes about a
tenth of a second, too slow for every record inside the worker's transaction. So it is refreshed in
the background (:func:`refresh_window_fits`, run by the mailer/housekeeping loop) and its parameters
f0, zeta and k are kept in ``alarm_point_status.window_fit``. Each record then gets today's margin in
closed form from the first-order threshold used by that fit:

    a_c(f) = 2 sqrt(((f - 2 f0) / f0)^2 + 4 zeta^2) / k,     margin = 1 - a_1X / a_c(f)

(1 far from the threshold, 0 on it, negative beyond it), computed by
:func:`analysis.window.threshold_margin` (the one home of a_c(f)). Only a fit with status ``fit`` is
used; a weakly constrained one leaves the rule inactive with the fit's own message as the reason.
"""

from __future__ import annotations

import datetime as dt
import logging

from sqlalchemy import func, select

from analysis.physics.window import threshold_margin as _threshold_margin

log = logging.getLogger(__name__)

NO_FIT = "no operating-window fit for this point"
MIN_RECORDS = 10  # analysis.window needs at least this many labelled records
REFIT_AFTER = 5  # new results since the last fit
HISTORY_LIMIT = 2000


def margin_from_fit(fit: dict, speed_hz, amp_1x) -> float | None:
    return _threshold_margin(speed_hz, amp_1x, fit.get("f0_hz"), fit.get("zeta"), fit.get("k_per_unit"))


def threshold_margin(status, result) -> tuple[float | None, str | None]:
    """``(margin, None)`` when a usable fit exists, else ``(None, reason)``; ``result`` is typed or a
    stored dict of any version."""
    from .rules import typed_result

    fit = (status.window_fit if status is not None else None) or {}
    if not fit:
        return None, NO_FIT
    if fit.get("status") != "fit":
        return None, f"{NO_FIT}: {fit.get('message') or fit.get('status')}"
    r = typed_result(result)
    one_x = r.orders.get("1X")
    value = margin_from_fit(fit, r.forcing.frequency_hz, None if one_x is None else one_x.amplitude)
    return (value, None) if value is not None else (None, f"{NO_FIT}: no 1X reading in this record")


def refresh_window_fits(db, *, now: dt.datetime | None = None) -> int:
    """Refit the points with enough new results; returns how many fits were stored."""
    from server.services.window import fitted_window, history_rows, readings
    from server.storage.tables import Result, utcnow

    from .tables import AlarmPointStatus

    now = now or utcnow()
    with db.read() as s:
        counts = dict(s.execute(select(Result.point_id, func.count()).where(Result.current.is_(True))
                                .group_by(Result.point_id)).all())
        fitted = {p: (f or {}).get("n_results", 0) for p, f in
                  s.execute(select(AlarmPointStatus.point_id, AlarmPointStatus.window_fit))}
    due = [p for p, n in counts.items() if p in fitted and n >= MIN_RECORDS and n - fitted[p] >= REFIT_AFTER]
    stored = 0
    for point_id in due:
        with db.read() as s:
            pts = readings(history_rows(s, point_id, limit=HISTORY_LIMIT))
        try:
            fit = fitted_window(pts) if len(pts) >= MIN_RECORDS else {"status": "not_enough_data"}
        except Exception as exc:  # a failed fit must not stop the loop; the rule stays inactive
            log.warning("window fit for point %s failed: %s", point_id, exc)
            fit = {"status": "failed", "message": str(exc)}
        keep = {k: fit.get(k) for k in ("status", "message", "f0_hz", "zeta", "k_per_unit", "margin_pct",
                                        "unstable_band_hz", "param_cov")}
        speeds = [p["forcing_hz"] for p in pts]
        # the speeds the fit saw: the window conclusion says where the tongue is extrapolated beyond them
        keep.update(n_results=counts[point_id], fitted_at=now.isoformat(),
                    observed_hz=[min(speeds), max(speeds)] if speeds else None)
        with db.unit_of_work() as s:
            status = s.get(AlarmPointStatus, point_id)
            if status is not None:
                status.window_fit = keep
                stored += 1
    return stored
