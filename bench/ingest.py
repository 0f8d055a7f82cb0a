"""Ingest and worker throughput against a real server over loopback, beside floors measured in the same run.

Phases (interleaved in rounds, medians reported):
  floor   a minimal FastAPI endpoint (plain ``def``) that stores the same body in SQLite (WAL, NORMAL)
  ingest  ``POST /api/v1/points/{id}/records`` of the real service (uvicorn, one process, no worker)
  bare    ``analysis.analyze_record`` on the same records, in this process
  worker  ``server.worker.run_forever`` on the queued jobs (claim, load, analyse, store result + alarm rules)
  worker-na  the same loop with ``alarms=False`` (this process only): the worker's own share without the
          alarm rules, which belong to server/alarms

Every request carries 16,384 float32 samples (64 KiB). Bounded by --count per round and --max-seconds.
Goals: ingest >= 50 % of the floor's records/s; worker >= 80 % of the bare analysis rate.
Ratios are taken per round (the phases of a round run back to back, their order alternating), then the
median and the range over rounds are printed: the machine is shared, so absolute rates drift.
Run: .venv/bin/python bench/ingest.py [--rounds 5] [--count 400] [--conns 8] [--jobs 100]
"""

from __future__ import annotations

import argparse
import datetime as dt
import http.client
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
N_SAMPLES = 16_384
FS = 2560.0

FLOOR_APP = '''
import sqlite3, threading
from fastapi import FastAPI, Request
from fastapi.responses import JSONResponse
DB = {db!r}
app = FastAPI()
local = threading.local()
def conn():
    c = getattr(local, "c", None)
    if c is None:
        c = local.c = sqlite3.connect(DB, isolation_level=None, check_same_thread=False)
        c.execute("PRAGMA journal_mode=WAL"); c.execute("PRAGMA synchronous=NORMAL")
        c.execute("PRAGMA busy_timeout=10000")
        c.execute("CREATE TABLE IF NOT EXISTS rec "
                  "(id INTEGER PRIMARY KEY, point INT, ts TEXT, ref TEXT, body BLOB)")
    return c
def store(point, ts, ref, body):
    conn().execute("INSERT INTO rec (point, ts, ref, body) VALUES (?,?,?,?)", (point, ts, ref, body))
@app.post("/p/{{point}}", status_code=201)
async def post(request: Request, point: int, measured_at: str, client_ref: str):
    from starlette.concurrency import run_in_threadpool
    body = await request.body()
    await run_in_threadpool(store, point, measured_at, client_ref, body)
    return JSONResponse({{"ok": True}}, status_code=201)
'''


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start(cmd: list[str], env: dict, port: int, cwd: Path) -> subprocess.Popen:
    proc = subprocess.Popen(cmd, cwd=cwd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    t0 = time.monotonic()
    while time.monotonic() - t0 < 60:
        if proc.poll() is not None:
            raise RuntimeError(f"server exited: {proc.stderr.read().decode()[-2000:]}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return proc
        except OSError:
            time.sleep(0.05)
    proc.kill()
    raise RuntimeError("server did not start")


def load(port: int, path_of, body: bytes, headers: dict, count: int, conns: int, max_s: float):
    """POST `count` requests over `conns` keep-alive connections; returns (seconds, latencies, statuses)."""
    lat, statuses, lock = [], {}, threading.Lock()
    next_i = iter(range(count))
    deadline = time.monotonic() + max_s

    def run():
        c = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
        while time.monotonic() < deadline:
            with lock:
                i = next(next_i, None)
            if i is None:
                break
            t = time.perf_counter()
            c.request("POST", path_of(i), body=body, headers=headers)
            r = c.getresponse()
            r.read()
            dtl = time.perf_counter() - t
            with lock:
                lat.append(dtl)
                statuses[r.status] = statuses.get(r.status, 0) + 1
        c.close()

    threads = [threading.Thread(target=run) for _ in range(conns)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return time.perf_counter() - t0, lat, statuses


def pct(values, q):
    return float(np.percentile(np.asarray(values) * 1000, q)) if values else float("nan")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--count", type=int, default=400, help="requests per round and phase")
    ap.add_argument("--conns", type=int, default=8)
    ap.add_argument("--jobs", type=int, default=100, help="worker / bare analyses per round")
    ap.add_argument("--max-seconds", dest="max_s", type=float, default=30.0, help="bound per phase and round")
    args = ap.parse_args()

    sys.path.insert(0, str(REPO))
    sys.path.insert(0, str(REPO / "tests"))
    from support.plant import make_plant

    from analysis import analyze_record
    from server import worker
    from server.migrations import upgrade
    from server.services.users import create_api_key
    from server.settings import Settings
    from server.storage import Database

    tmp = Path(tempfile.mkdtemp(prefix="halfwatch-bench-"))
    settings = Settings(data_dir=tmp / "data", worker_poll_s=0.01, argon2_time_cost=1,
                        argon2_memory_cost_kib=1024, argon2_parallelism=1)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    plant = make_plant(db)
    key, _ = create_api_key(db, name="bench", site=plant.site_id)
    rng = np.random.default_rng(7)
    t = np.arange(N_SAMPLES) / FS
    x = (np.sin(2 * np.pi * 24.75 * t) + 0.2 * np.sin(2 * np.pi * 12.375 * t)
         + 0.05 * rng.standard_normal(N_SAMPLES)).astype("<f4")
    body = x.tobytes()

    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    env.update(HALFWATCH_DATABASE_URL=settings.database_url, HALFWATCH_DATA_DIR=str(settings.data_dir))
    p_port, f_port = free_port(), free_port()
    floor_file = tmp / "floor_app.py"
    floor_file.write_text(FLOOR_APP.format(db=str(tmp / "floor.db")))
    uv = [sys.executable, "-m", "uvicorn", "--host", "127.0.0.1", "--no-access-log", "--log-level", "warning"]
    project = start(uv + ["--factory", "server.app:create_app", "--port", str(p_port)], env, p_port, REPO)
    floor = start(uv + ["floor_app:app", "--port", str(f_port)], env, f_port, tmp)

    import server.alarms

    alarm_time = {"s": 0.0, "n": 0}
    evaluate = server.alarms.evaluate_result

    def timed_evaluate(*a, **kw):  # the worker looks the function up on every store
        t = time.perf_counter()
        try:
            return evaluate(*a, **kw)
        finally:
            alarm_time["s"] += time.perf_counter() - t
            alarm_time["n"] += 1

    server.alarms.evaluate_result = timed_evaluate
    t0 = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)
    counter = {"i": 0}
    rows = {"floor": [], "ingest": [], "bare": [], "worker": [], "worker-na": []}
    try:
        for rnd in range(args.rounds):
            base = counter["i"]

            def p_path(i, base=base):
                when = (t0 + dt.timedelta(seconds=base + i)).strftime("%Y-%m-%dT%H:%M:%SZ")
                return (f"/api/v1/points/{plant.point_id}/records?fs_hz={FS}&units=m/s2&measured_at={when}"
                        f"&client_ref=b{base + i}")

            def f_path(i, base=base):
                return f"/p/{plant.point_id}?measured_at=2026-01-01T00:00:00Z&client_ref=b{base + i}"

            phases = [("floor", f_port, f_path), ("ingest", p_port, p_path)]
            if rnd % 2:
                phases.reverse()
            for name, port, path_of in phases:
                headers = {"Content-Type": "application/octet-stream", "X-API-Key": key}
                secs, lat, st = load(port, path_of, body, headers, args.count, args.conns, args.max_s)
                ok = st.get(201, 0)
                rows[name].append((ok / secs, pct(lat, 50), pct(lat, 99), st))
            counter["i"] += args.count
            # analysis: the bare function vs the worker on queued jobs, same record, same count
            order = ["bare", "worker", "worker-na"]
            order = order[rnd % 3:] + order[:rnd % 3]
            for name in order:
                start_t, done = time.perf_counter(), 0
                if name.startswith("worker"):  # the real loop: batched claims, heartbeat, store (+ alarms)
                    done = worker.run_forever(db, settings, max_jobs=args.jobs, worker_id="bench",
                                              alarms=name == "worker")
                while name == "bare" and done < args.jobs and time.perf_counter() - start_t < args.max_s:
                    analyze_record(x, FS, units="m/s2", nominal_hz=24.75, machine_group=2, foundation="rigid")
                    done += 1
                secs = time.perf_counter() - start_t
                rows[name].append((done / secs, float("nan"), float("nan"), {"done": done}))
    finally:
        for proc in (project, floor):
            proc.terminate()
            proc.wait(10)
        db.dispose()
        shutil.rmtree(tmp, ignore_errors=True)

    def med(name, k):
        return statistics.median(r[k] for r in rows[name])

    print(f"halfwatch ingest benchmark: {N_SAMPLES} float32 samples per record ({len(body)} bytes), "
          f"{args.conns} connections, {args.rounds} rounds x {args.count} requests, {os.cpu_count()} cores")
    print(f"{'phase':<8} {'records/s (median)':>19} {'per round':>28} {'p50 ms':>8} {'p99 ms':>8}")
    for name in ("floor", "ingest", "bare", "worker", "worker-na"):
        per = ", ".join(f"{r[0]:.0f}" for r in rows[name])
        p50 = med(name, 1)
        p99 = med(name, 2)
        print(f"{name:<9} {med(name, 0):>18.1f} {per:>28} {p50:>8.2f} {p99:>8.2f}")
    def ratio(num, den, goal):
        per = [n[0] / d[0] for n, d in zip(rows[num], rows[den], strict=True)]
        print(f"{num + ' / ' + den:<18} = {statistics.median(per):.2f}  "
              f"(rounds {min(per):.2f}-{max(per):.2f}; goal >= {goal:.2f})")

    ratio("ingest", "floor", 0.50)
    ratio("worker", "bare", 0.80)
    ratio("worker-na", "bare", 0.80)
    if alarm_time["n"]:
        per_alarm = alarm_time["s"] / alarm_time["n"]
        print(f"the alarm rules (server.alarms.evaluate_result) took {per_alarm * 1000:.1f} ms per record "
              f"(mean of {alarm_time['n']}); the worker without them: {1000 / med('worker-na', 0):.1f} ms "
              f"per record, the bare analysis {1000 / med('bare', 0):.1f} ms")
    bad = {k: v for r in rows["ingest"] + rows["floor"] for k, v in r[3].items() if k != 201}
    if bad:
        print(f"non-201 answers: {bad}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
