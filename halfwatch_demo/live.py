"""Simulated online sensors: every few seconds one new reading goes through the HTTP API with an API key.

The sensors take turns (one point per tick; each record as long as the hourly ones), follow the
same scenario as the backfill (the onset on VP-102 keeps its level, the feed pump keeps whirling) and post
raw float32 samples exactly as a gateway would: ``POST /api/v1/points/{id}/records`` with
``Authorization: Bearer <key>``.
"""

from __future__ import annotations

import datetime as dt
import logging
import threading
import time

from halfwatch_demo import plant as demo_plant
from halfwatch_demo.scenario import condition, seed_for

log = logging.getLogger("halfwatch.demo")


def reading(asset, point, when: dt.datetime, anchor: dt.datetime):
    """(float32 samples, query parameters) of one simulated reading at ``when``."""
    from analysis.sim.simulate import simulate
    from server.storage.blobs import as_f4

    iso = when.strftime("%Y%m%dT%H%M%S.%f")
    seed = seed_for(point.name, iso)
    c = condition(asset, point, (when - anchor).total_seconds() / 86400.0, when.hour, seed)
    n = demo_plant.record_samples(asset)
    rec = simulate(c.kind, seed=seed, fs_hz=asset.fs_hz, duration_s=n / asset.fs_hz, **c.params)
    params = {"fs_hz": asset.fs_hz, "units": "g", "measured_at": when.isoformat(),
              "speed_hz": round(c.speed_hz, 4), "speed_source": "drive",
              "client_ref": f"live:{point.name}:{iso}"}
    return as_f4(rec.samples), params


class LiveSensors(threading.Thread):
    """Posts one reading per ``interval_s`` until ``stop`` is set; counts what the API answered."""

    def __init__(self, base_url: str, api_key: str, point_ids: dict[str, int], anchor: dt.datetime, *,
                 interval_s: float = 3.0, stop: threading.Event | None = None):
        super().__init__(name="halfwatch-demo-sensors", daemon=True)
        self.base_url, self.api_key, self.anchor = base_url, api_key, anchor
        self.points = [(a, p, point_ids[p.name]) for a, p in demo_plant.all_points() if p.online]
        self.interval_s = interval_s
        self.stop = stop or threading.Event()
        self.sent = 0
        self.refused = 0

    def run(self) -> None:
        import httpx

        headers = {"Authorization": f"Bearer {self.api_key}", "Content-Type": "application/octet-stream"}
        i = 0
        last_warning = 0.0
        with httpx.Client(base_url=self.base_url, headers=headers, timeout=15.0) as client:
            while not self.stop.wait(self.interval_s):
                asset, point, pid = self.points[i % len(self.points)]
                i += 1
                x, params = reading(asset, point, dt.datetime.now(dt.UTC), self.anchor)
                try:
                    r = client.post(f"/api/v1/points/{pid}/records", params=params, content=x.tobytes())
                    ok = r.status_code in (200, 201)
                    detail = "" if ok else r.text[:300]
                except httpx.HTTPError as exc:
                    ok, detail = False, str(exc)
                if ok:
                    self.sent += 1
                    continue
                self.refused += 1
                if time.monotonic() - last_warning > 60:
                    log.warning("live sensor %s: the API did not take the reading: %s", point.name, detail)
                    last_warning = time.monotonic()
