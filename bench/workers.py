"""Analysis throughput of 1 vs 2 (or more) ``halfwatch worker`` processes on one queue.

For each backend (SQLite file; PostgreSQL when HALFWATCH_TEST_POSTGRES_URL or --pg-url is given) and each
worker count: a fresh database, N records of 65,536 float32 samples (fs 25.6 kHz, an invented pump) queued
with their jobs held back until every worker process has started, then the workers run until the queue
is empty. Rate = N / (last job finished - jobs released). Runs interleave (1, 2, 1, 2, ...) so host drift
hits both; the table gives medians and the 2-worker / 1-worker ratio measured in the same run.
Goal on a 2-core machine: >= 1.7x. Other load on the machine lowers the ratio; the "busy" column is the
machine's CPU use outside this benchmark during the run (cores), from /proc/stat.
Run: .venv/bin/python bench/workers.py [--records 120] [--rounds 2] [--workers 1,2]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
from benchdb import SPEED_HZ, fresh_database, migrated_plant  # noqa: E402

FS = 25600.0


def cpu_times() -> tuple[float, float]:
    """(busy, total) jiffies of the whole machine."""
    parts = [float(v) for v in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]]
    idle = parts[3] + parts[4]
    return sum(parts) - idle, sum(parts)


def children_cpu(pids: list[int]) -> float:
    total = 0.0
    for pid in pids:
        try:
            fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
            total += (float(fields[11]) + float(fields[12])) / os.sysconf("SC_CLK_TCK")
        except (FileNotFoundError, IndexError):
            pass
    return total


def seed(url: str, n: int, n_samples: int, hold_s: float):
    from server.services.ingest import Limits, ingest_record
    from server.storage.tables import Job

    db, (point_id,) = migrated_plant(url)
    rng = np.random.default_rng(7)
    t = np.arange(n_samples) / FS
    base = np.sin(2 * np.pi * SPEED_HZ * t)
    t0 = dt.datetime(2026, 5, 4, 6, 0, tzinfo=dt.UTC)
    for i in range(n):
        half = 0.02 * (i % 5) * np.sin(2 * np.pi * SPEED_HZ / 2 * t)
        x = base + half + 0.05 * rng.standard_normal(n_samples)
        ingest_record(db, point_id=point_id, samples=x.astype(np.float32), fs_hz=FS, units="m/s2",
                      measured_at=t0 + dt.timedelta(minutes=10 * i), origin="api", uploader="bench",
                      limits=Limits(max_samples=max(n_samples, 4_194_304)))
    release = dt.datetime.now(dt.UTC) + dt.timedelta(seconds=hold_s)
    from sqlalchemy import update

    with db.unit_of_work() as s:
        s.execute(update(Job).values(not_before=release))
    return db, release


def run_case(backend: str, k: int, args, tmp: Path) -> dict:
    from sqlalchemy import func, select

    from server.storage.tables import Job

    url, cleanup = fresh_database(tmp, args.pg_url if backend == "postgresql" else None)
    db, release = seed(url, args.records, args.samples, args.hold_s)
    env = {key: v for key, v in os.environ.items() if not key.startswith("HALFWATCH_")}
    env.update(HALFWATCH_DATABASE_URL=url, HALFWATCH_WORKER_POLL_S="0.05", HALFWATCH_DATA_DIR=str(tmp),
               PYTHONPATH=str(REPO), OPENBLAS_NUM_THREADS="1")
    procs = [subprocess.Popen([sys.executable, "-m", "server", "worker"], env=env, cwd=REPO,
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL) for _ in range(k)]
    try:
        while dt.datetime.now(dt.UTC) < release:
            time.sleep(0.02)
        busy0, total0 = cpu_times()
        own0 = children_cpu([p.pid for p in procs])
        w0 = time.monotonic()
        while True:
            with db.read() as s:
                done = s.scalar(select(func.count()).select_from(Job)
                                .where(Job.state.in_(("done", "failed"))))
            if done >= args.records or time.monotonic() - w0 > args.max_seconds:
                break
            time.sleep(0.05)
        wall = time.monotonic() - w0
        busy1, total1 = cpu_times()
        own = children_cpu([p.pid for p in procs]) - own0
        with db.read() as s:
            last = s.scalar(select(func.max(Job.finished_at)))
            failed = s.scalar(select(func.count()).select_from(Job).where(Job.state == "failed"))
            per_worker = sorted(n for _, n in s.execute(select(Job.worker_id, func.count())
                                                        .group_by(Job.worker_id)).all())
    finally:
        for p in procs:
            p.terminate()
        for p in procs:
            try:
                p.wait(20)
            except subprocess.TimeoutExpired:
                p.kill()
        db.dispose()
        cleanup()
    seconds = max(1e-6, (last - release).total_seconds()) if last else wall
    ncpu = os.cpu_count() or 1
    machine = (busy1 - busy0) / max(1.0, total1 - total0) * ncpu  # cores busy on the whole machine
    foreign = max(0.0, machine - own / max(wall, 1e-6))
    return {"rate": done / seconds, "seconds": seconds, "failed": failed, "split": per_worker,
            "foreign": foreign, "done": done}


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    p.add_argument("--records", type=int, default=120)
    p.add_argument("--samples", type=int, default=65536)
    p.add_argument("--rounds", type=int, default=2)
    p.add_argument("--workers", default="1,2")
    p.add_argument("--backend", choices=("sqlite", "postgresql", "both"), default="both")
    p.add_argument("--pg-url", default=os.environ.get("HALFWATCH_TEST_POSTGRES_URL"))
    p.add_argument("--hold-s", type=float, default=6.0, help="time for the worker processes to start")
    p.add_argument("--max-seconds", type=float, default=300.0)
    args = p.parse_args()
    counts = [int(v) for v in args.workers.split(",")]
    backends = ["sqlite", "postgresql"] if args.backend == "both" else [args.backend]
    if "postgresql" in backends and not args.pg_url:
        print("postgresql skipped: set HALFWATCH_TEST_POSTGRES_URL or --pg-url")
        backends = [b for b in backends if b != "postgresql"]
    print(f"machine: {os.cpu_count()} CPU, {args.records} records x {args.samples} samples per run")
    rows = []
    with tempfile.TemporaryDirectory(prefix="hw-bench-workers-") as tmpdir:
        for backend in backends:
            runs = {k: [] for k in counts}
            for _ in range(args.rounds):
                for k in counts:
                    runs[k].append(run_case(backend, k, args, Path(tmpdir)))
            base = statistics.median(r["rate"] for r in runs[counts[0]])
            for k in counts:
                rates = [r["rate"] for r in runs[k]]
                med = statistics.median(rates)
                rows.append((backend, k, med, min(rates), max(rates), med / base,
                             statistics.median(r["foreign"] for r in runs[k]),
                             sum(r["failed"] for r in runs[k]), runs[k][-1]["split"]))
    print(f"{'backend':<11}{'workers':>8}{'records/s':>11}{'min':>8}{'max':>8}{'ratio':>7}{'busy':>6}"
          f"{'failed':>8}  jobs per worker (last run)")
    for backend, k, med, lo, hi, ratio, foreign, failed, split in rows:
        print(f"{backend:<11}{k:>8}{med:>11.1f}{lo:>8.1f}{hi:>8.1f}{ratio:>6.2f}x{foreign:>6.2f}"
              f"{failed:>8}  {split}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
