"""MQTT bridge and /metrics benchmark. Prints tables of ratios measured in one run.

1. Ingest of 64 KiB records (16,384 float32 samples): the ingestion service called directly (the floor),
   then end to end through a real mosquitto and the bridge (publish QoS 1 -> stored), JSON and binary forms.
2. A /metrics scrape (``Metrics.render``) over a store of N records: the first scrape (full count),
   later scrapes (incremental by id), against a plain ``SELECT 1`` read and a full GROUP BY count.
3. The HTTP latency histogram: the cost of one labelled observe(), against the loopback HTTP floor of
   about 360 us per request (the shared performance notes, uvicorn + one SQLite insert).

    .venv/bin/python bench/mqtt_metrics.py [--records 200] [--store 20000]
"""

from __future__ import annotations

import argparse
import datetime as dt
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests"), str(ROOT / "examples")]

T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _setup(tmp: Path, name: str):
    from support.fixtures import settings_for
    from support.plant import make_plant

    from server.migrations import upgrade
    from server.storage import Database

    settings = settings_for(tmp / name)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    return settings, db, make_plant(db)


def _signals(n: int) -> list[np.ndarray]:
    rng = np.random.default_rng(7)
    t = np.arange(16384) / 2560.0
    base = 0.6 * np.sin(2 * np.pi * 24.75 * t)
    return [(base + 0.02 * rng.standard_normal(t.size)).astype("<f4") for _ in range(n)]


def bench_direct(tmp: Path, xs) -> float:
    from server.services.ingest import Limits, ingest_record

    settings, db, plant = _setup(tmp, "direct")
    t0 = time.perf_counter()
    for i, x in enumerate(xs):
        ingest_record(db, point_id=plant.point_id, samples=x, fs_hz=2560.0, units="m/s2",
                      measured_at=T0 + dt.timedelta(minutes=i), origin="mqtt", client_ref=f"d{i}",
                      limits=Limits.from_settings(settings))
    dt_s = time.perf_counter() - t0
    db.dispose()
    return dt_s / len(xs)


def bench_bridge(tmp: Path, xs, port: int, *, binary: bool) -> float:
    import gateway_publish as gw
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion
    from sqlalchemy import func, select

    from server.mqtt.bridge import Bridge
    from server.storage.tables import Record

    settings, db, plant = _setup(tmp, f"bridge-{binary}")
    settings = settings.model_copy(update={"mqtt_port": port, "mqtt_client_id": f"bench-{binary}",
                                           "mqtt_reply_accepted": False})
    bridge = Bridge(db, settings)
    bridge.start()
    assert bridge.subscribed.wait(10)
    acked, done = set(), threading.Event()
    pub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-pub-{binary}")
    pub.on_publish = lambda c, u, mid, rc, p: acked.add(mid)
    pub.connect("127.0.0.1", port)
    pub.loop_start()
    topic = f"halfwatch/{plant.site_id}/{plant.point_id}/records"
    payloads = [gw.payload(x, {"fs_hz": 2560.0, "units": "m/s2", "client_ref": f"b{i}",
                               "measured_at": (T0 + dt.timedelta(minutes=i)).isoformat()}, binary=binary)
                for i, x in enumerate(xs)]

    def stored() -> int:
        with db.read() as s:
            return s.scalar(select(func.count()).select_from(Record))

    t0 = time.perf_counter()
    for p in payloads:
        pub.publish(topic, p, qos=1)
    while stored() < len(xs):
        time.sleep(0.05)
    dt_s = time.perf_counter() - t0
    done.set()
    pub.disconnect()
    pub.loop_stop()
    bridge.stop()
    db.dispose()
    return dt_s / len(xs)


def bench_scrape(tmp: Path, n_store: int) -> dict[str, float]:
    from sqlalchemy import func, insert, select, text

    from server.metrics import Metrics
    from server.storage.tables import Record

    settings, db, plant = _setup(tmp, "scrape")
    rows = [dict(point_id=plant.point_id, measured_at=T0 + dt.timedelta(seconds=i), received_at=T0,
                 fs_hz=2560.0, n_samples=16384, units="m/s2", origin=("api", "mqtt", "route")[i % 3],
                 uploader="bench", checksum=f"{i:064x}") for i in range(n_store)]
    with db.unit_of_work() as s:
        s.execute(insert(Record), rows)
    metrics = Metrics(db, settings)

    def timed(fn, repeat=1) -> float:
        t0 = time.perf_counter()
        for _ in range(repeat):
            fn()
        return (time.perf_counter() - t0) / repeat

    def select1():
        with db.read() as s:
            s.execute(text("SELECT 1"))

    def full_count():
        with db.read() as s:
            s.execute(select(Record.origin, func.count()).group_by(Record.origin)).all()

    out = {"first": timed(lambda: metrics.render(None)), "later": timed(lambda: metrics.render(None), 20),
           "select1": timed(select1, 50), "full_count": timed(full_count, 5)}
    db.dispose()
    return out


def bench_observe() -> float:
    from prometheus_client import CollectorRegistry, Histogram

    h = Histogram("x_seconds", "x", ["method", "route", "status"], registry=CollectorRegistry())
    t0 = time.perf_counter()
    n = 100_000
    for i in range(n):
        h.labels("POST", "/api/v1/points/{point_id}/records", "201").observe(i * 1e-6)
    return (time.perf_counter() - t0) / n


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--records", type=int, default=200)
    ap.add_argument("--store", type=int, default=20000)
    args = ap.parse_args()
    binary = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    tmp = Path(tempfile.mkdtemp(prefix="hw-bench-"))
    port = _free_port()
    conf = tmp / "mosquitto.conf"
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n")
    broker = subprocess.Popen([binary, "-c", str(conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        for _ in range(100):
            try:
                socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
                break
            except OSError:
                time.sleep(0.05)
        xs = _signals(args.records)
        bench_direct(tmp / "warm-up", xs[:20])  # imports, first-use costs
        direct = bench_direct(tmp, xs)
        js = bench_bridge(tmp, xs, port, binary=False)
        bn = bench_bridge(tmp, xs, port, binary=True)
    finally:
        broker.terminate()
        broker.wait(10)
    print(f"\nIngest of {args.records} records of 16,384 float32 samples (64 KiB each), per record")
    print(f"{'path':<44}{'ms/record':>12}{'records/s':>12}{'vs direct':>12}")
    for name, v in (("ingestion service called directly (floor)", direct),
                    ("MQTT bridge, JSON form (base64)", js), ("MQTT bridge, binary form", bn)):
        print(f"{name:<44}{v * 1e3:>12.2f}{1 / v:>12.0f}{v / direct:>11.2f}x")

    sc = bench_scrape(tmp, args.store)
    print(f"\n/metrics render over a store of {args.store:,} records")
    print(f"{'what':<44}{'ms':>12}{'vs SELECT 1':>14}")
    for name, key in (("SELECT 1 read (floor)", "select1"), ("full GROUP BY origin count", "full_count"),
                      ("first scrape (counts everything once)", "first"),
                      ("later scrapes (incremental by id)", "later")):
        print(f"{name:<44}{sc[key] * 1e3:>12.2f}{sc[key] / sc['select1']:>13.1f}x")
    ob = bench_observe()
    print("\nHTTP latency histogram: observe() with labels, per request")
    print(f"{'cost':<44}{ob * 1e6:>10.2f} us  (loopback HTTP floor ~360 us/request: "
          f"{ob / 360e-6 * 100:.2f} %)")
    shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
