"""Bounded loopback load: N simulated sensors post records while dashboard readers poll, for D seconds.

A real ``halfwatch serve`` process and one ``halfwatch worker`` process on a fresh database (SQLite file,
or PostgreSQL with --pg-url / HALFWATCH_TEST_POSTGRES_URL). Sensors post raw float32 records (16,384
samples of an invented pump) in a closed loop over keep-alive connections; a 503 with Retry-After is
honoured (the sensor waits, then sends the same record again). Readers fetch the dashboard overview and a
point's trend. Sampled each second: server and worker RSS, queue depth and the age of the oldest queued
job (worker lag). The run fails if the server stops answering, or answers anything other than 2xx/503.
Run: .venv/bin/python bench/load.py [--seconds 60] [--sensors 16] [--readers 2] [--max-inflight 32]
"""

from __future__ import annotations

import argparse
import datetime as dt
import http.client
import json
import os
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import urllib.parse
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
from benchdb import SPEED_HZ, fresh_database, migrated_plant  # noqa: E402

FS = 2560.0


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def rss_mib(pid: int) -> float:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except FileNotFoundError:
        pass
    return float("nan")


def pct(values: list[float], q: float) -> float:
    if not values:
        return float("nan")
    return float(np.percentile(np.asarray(values), q))


class Stats:
    def __init__(self):
        self.lock = threading.Lock()
        self.codes: dict[str, int] = {}
        self.ingest_ms: list[float] = []
        self.read_ms: list[float] = []

    def add(self, code, ms: float | None, kind: str):
        with self.lock:
            self.codes[f"{kind}:{code}"] = self.codes.get(f"{kind}:{code}", 0) + 1
            if ms is not None:
                (self.ingest_ms if kind == "ingest" else self.read_ms).append(ms)


def setup(url: str):
    from server.services.users import create_api_key

    db, points = migrated_plant(url, assets=4, points=("DE-H", "NDE-V"))
    sensor_key, _ = create_api_key(db, name="load sensors", role="technician")
    reader_key, _ = create_api_key(db, name="load dashboard", role="viewer")
    return db, points, sensor_key, reader_key


def exchange(conn, port, method, path, body, headers, stats, kind):
    """One timed request on a keep-alive connection; (response or None, the connection to use next)."""
    t0 = time.perf_counter()
    try:
        conn.request(method, path, body=body, headers=headers)
        r = conn.getresponse()
        r.read()
    except (OSError, http.client.HTTPException) as exc:
        stats.add(type(exc).__name__, None, kind)
        conn.close()
        time.sleep(0.2)
        return None, http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    stats.add(r.status, (time.perf_counter() - t0) * 1000, kind)
    return r, conn


def sensor_loop(port, key, point_id, payloads, stop, stats, sensor_no):
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    i = 0
    pending = None
    while not stop.is_set():
        if pending is None:
            i += 1
            measured = (dt.datetime(2026, 6, 1, tzinfo=dt.UTC) + dt.timedelta(seconds=i)).isoformat()
            q = urllib.parse.urlencode({"fs_hz": FS, "units": "m/s2", "measured_at": measured,
                                        "client_ref": f"s{sensor_no}-{i}"})
            pending = (f"/api/v1/points/{point_id}/records?{q}", payloads[i % len(payloads)])
        path, body = pending
        r, conn = exchange(conn, port, "POST", path, body, {"Authorization": f"Bearer {key}",
                                                            "Content-Type": "application/octet-stream"},
                           stats, "ingest")
        if r is None:
            continue
        if r.status == 503:
            wait = float(r.getheader("Retry-After") or 1)
            stop.wait(min(wait, 1.0))  # same record again after the advertised wait (capped for the bench)
        else:
            pending = None
    conn.close()


def reader_loop(port, key, point_ids, stop, stats):
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    paths = ["/api/v1/dashboard/overview", *(f"/api/v1/points/{p}/trend?metric=subharmonic.amplitude"
                                            for p in point_ids[:2])]
    k = 0
    while not stop.is_set():
        path = paths[k % len(paths)]
        k += 1
        _, conn = exchange(conn, port, "GET", path, None, {"Authorization": f"Bearer {key}"}, stats, "read")
        stop.wait(0.2)
    conn.close()


def wait_ready(port: int, server, timeout_s: float = 180.0) -> None:
    """Until /readyz says 200: the API answers and a worker has reported in (its heartbeat)."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout_s:
        if server.poll() is not None:
            raise SystemExit(f"the server exited with {server.returncode}")
        try:
            c = http.client.HTTPConnection("127.0.0.1", port, timeout=2)
            c.request("GET", "/readyz")
            if c.getresponse().status == 200:
                return
        except OSError:
            pass
        time.sleep(0.2)
    raise SystemExit("the server or the worker did not become ready")


def queue_state(db):
    from sqlalchemy import func, select

    from server.storage.tables import Job

    with db.read() as s:
        depth = s.scalar(select(func.count()).select_from(Job).where(Job.state == "queued"))
        oldest = s.scalar(select(func.min(Job.created_at)).where(Job.state == "queued"))
        done = s.scalar(select(func.count()).select_from(Job).where(Job.state == "done"))
    lag = (dt.datetime.now(dt.UTC) - oldest).total_seconds() if oldest else 0.0
    return depth, lag, done


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    p.add_argument("--seconds", type=float, default=60.0)
    p.add_argument("--sensors", type=int, default=16)
    p.add_argument("--readers", type=int, default=2)
    p.add_argument("--samples", type=int, default=16384)
    p.add_argument("--max-inflight", type=int, default=32, help="server setting max_inflight_ingests")
    p.add_argument("--pg-url", default=None, help="PostgreSQL URL (default: a SQLite file)")
    args = p.parse_args()
    with tempfile.TemporaryDirectory(prefix="hw-bench-load-") as tmpdir:
        tmp = Path(tmpdir)
        url, cleanup = fresh_database(tmp, args.pg_url)
        db, points, sensor_key, reader_key = setup(url)
        port = free_port()
        env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
        env.update(HALFWATCH_DATABASE_URL=url, HALFWATCH_DATA_DIR=str(tmp), PYTHONPATH=str(REPO),
                   HALFWATCH_MAX_INFLIGHT_INGESTS=str(args.max_inflight), HALFWATCH_WORKER_POLL_S="0.1")
        logs = open(tmp / "server.log", "wb")  # noqa: SIM115 - closed below
        server = subprocess.Popen([sys.executable, "-m", "server", "serve", "--host", "127.0.0.1", "--port",
                                   str(port)], env=env, cwd=REPO, stdout=logs, stderr=subprocess.STDOUT)
        worker = subprocess.Popen([sys.executable, "-m", "server", "worker"], env=env, cwd=REPO,
                                  stdout=logs, stderr=subprocess.STDOUT)
        try:
            wait_ready(port, server)
            rng = np.random.default_rng(3)
            t = np.arange(args.samples) / FS
            payloads = [(np.sin(2 * np.pi * SPEED_HZ * t) + 0.03 * k * np.sin(np.pi * SPEED_HZ * t)
                         + 0.05 * rng.standard_normal(t.size)).astype("<f4").tobytes() for k in range(8)]
            stats, stop = Stats(), threading.Event()
            threads = [threading.Thread(target=sensor_loop, args=(port, sensor_key, points[i % len(points)],
                                                                  payloads, stop, stats, i))
                       for i in range(args.sensors)]
            threads += [threading.Thread(target=reader_loop, args=(port, reader_key, points, stop, stats))
                        for _ in range(args.readers)]
            _, _, done0 = queue_state(db)
            t_start = time.monotonic()
            for th in threads:
                th.start()
            samples = []
            while time.monotonic() - t_start < args.seconds:
                time.sleep(1.0)
                depth, lag, done = queue_state(db)
                samples.append((rss_mib(server.pid), rss_mib(worker.pid), depth, lag, done))
            stop.set()
            for th in threads:
                th.join(40)
            elapsed = time.monotonic() - t_start
            c = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
            c.request("GET", "/healthz")
            alive = c.getresponse().status == 200
        finally:
            for proc in (server, worker):
                proc.terminate()
                try:
                    proc.wait(20)
                except subprocess.TimeoutExpired:
                    proc.kill()
            logs.close()
            db.dispose()
            cleanup()
    codes = stats.codes
    accepted = codes.get("ingest:201", 0) + codes.get("ingest:200", 0)
    shed = codes.get("ingest:503", 0)
    odd = {k: v for k, v in codes.items() if k.split(":")[1] not in ("200", "201", "503")}
    analysed = samples[-1][4] - done0 if samples else 0
    backend = "postgresql" if args.pg_url else "sqlite"
    print(f"machine: {os.cpu_count()} vCPU; {backend}; {args.sensors} sensors x {args.samples} samples, "
          f"{args.readers} readers, {elapsed:.0f} s, max_inflight_ingests {args.max_inflight}")
    rows = [
        ("records accepted (2xx)", f"{accepted}", f"{accepted / elapsed:.1f} /s"),
        ("ingest refused 503 + Retry-After", f"{shed}", f"{100 * shed / max(1, accepted + shed):.1f} %"),
        ("ingest latency p50 / p99 (ms)", f"{pct(stats.ingest_ms, 50):.1f}",
         f"{pct(stats.ingest_ms, 99):.1f}"),
        ("dashboard reads", f"{sum(v for k, v in codes.items() if k.startswith('read:2'))}",
         f"p50 {pct(stats.read_ms, 50):.1f} / p99 {pct(stats.read_ms, 99):.1f} ms"),
        ("analysed by 1 worker", f"{analysed}", f"{analysed / elapsed:.1f} /s"),
        ("queue depth end / max", f"{samples[-1][2] if samples else 0}",
         f"{max((s[2] for s in samples), default=0)}"),
        ("worker lag (oldest queued) end / max (s)", f"{samples[-1][3]:.1f}" if samples else "-",
         f"{max((s[3] for s in samples), default=0):.1f}"),
        ("server RSS median / max (MiB)", f"{statistics.median(s[0] for s in samples):.0f}",
         f"{max(s[0] for s in samples):.0f}"),
        ("worker RSS median / max (MiB)", f"{statistics.median(s[1] for s in samples):.0f}",
         f"{max(s[1] for s in samples):.0f}"),
        ("other answers / client errors", json.dumps(odd) if odd else "none", ""),
        ("server alive at the end", "yes" if alive else "NO", ""),
    ]
    for name, a, b in rows:
        print(f"{name:<44}{a:>14}  {b}")
    return 0 if alive and not odd else 1


if __name__ == "__main__":
    raise SystemExit(main())
