"""Where the demo backfill's time goes, per reading, and what the analysis pool buys.

    .venv/bin/python bench/demo_backfill.py [--readings 200]

Part 1 runs one day of the demo plant's readings stage by stage in this process: simulate, analyse
(the worker's own ``analyse``), and store (ingest service, claim, load, ``worker.store`` with the alarm
rules). Part 2 backfills the same day with ``run_backfill`` with one and with two analysis processes.
Everything is measured in one run on a scratch SQLite file; compare the ratios, not the absolute times.
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
import tempfile
import time
from pathlib import Path

# run as a script: the repository root first, so bench/analysis.py does not shadow the analysis package
sys.path[0:1] = [str(Path(__file__).resolve().parents[1])]


def _setup(folder: Path):
    from halfwatch_demo import plant as demo_plant
    from halfwatch_demo.run import demo_settings, load_state
    from server.migrations import upgrade
    from server.storage import Database

    folder.mkdir(parents=True, exist_ok=True)
    state = load_state(folder)
    settings = demo_settings(folder, state, port=8000, smtp_port=1025).model_copy(update={"smtp_host": ""})
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    return settings, state, db, demo_plant.ensure_plant(db)


def stages(n: int) -> list[tuple[str, float]]:
    from halfwatch_demo.backfill import compute, make_tasks, store_one
    from halfwatch_demo.schedule import backfill_slots

    with tempfile.TemporaryDirectory() as tmp:
        settings, state, db, ids = _setup(Path(tmp) / "demo")
        anchor = state.anchor_time
        tasks = make_tasks(ids, backfill_slots(anchor - dt.timedelta(days=3), anchor), anchor)[:n]
        from analysis.sim.simulate import simulate
        from halfwatch_demo.scenario import seed_for

        t0 = time.perf_counter()
        for t in tasks:
            simulate(t.kind, seed=seed_for(t.point, t.when.strftime("%Y%m%dT%H%M%S")), fs_hz=t.fs_hz,
                     duration_s=t.n_samples / t.fs_hz, **t.params)
        t_sim = time.perf_counter() - t0
        t0 = time.perf_counter()
        results = [compute(t) for t in tasks]  # simulate + analyse
        t_both = time.perf_counter() - t0
        t0 = time.perf_counter()
        for t, r in zip(tasks, results, strict=True):
            store_one(db, settings, t, *r)
        t_store = time.perf_counter() - t0
        db.dispose()
    per = 1e3 / len(tasks)
    return [("simulate", t_sim * per), ("analyse (worker.analyse)", (t_both - t_sim) * per),
            ("store (ingest, claim, load, store + alarms)", t_store * per)]


def pool(days: float, jobs: int) -> tuple[int, float]:
    from halfwatch_demo.backfill import run_backfill

    with tempfile.TemporaryDirectory() as tmp:
        settings, state, db, ids = _setup(Path(tmp) / "demo")
        report = run_backfill(db, settings, ids, anchor=state.anchor_time, days=days, jobs=jobs,
                              say=lambda *_: None)
        db.dispose()
    return report.readings, report.seconds


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--readings", type=int, default=200)
    ap.add_argument("--days", type=float, default=1.0)
    args = ap.parse_args()
    rows = stages(args.readings)
    total = sum(ms for _, ms in rows)
    print(f"demo backfill, per reading ({args.readings} readings, one process)")
    print(f"{'stage':<46}{'ms':>8}{'share':>8}")
    for name, ms in rows:
        print(f"{name:<46}{ms:>8.1f}{ms / total:>8.0%}")
    print(f"{'all':<46}{total:>8.1f}")
    print()
    print(f"run_backfill over {args.days:g} day(s) of the plant")
    print(f"{'analysis processes':<22}{'readings':>10}{'seconds':>10}{'readings/s':>12}{'vs 1':>8}")
    base = None
    for jobs in (1, 2):
        n, s = pool(args.days, jobs)
        rate = n / s
        base = base or rate
        print(f"{jobs:<22}{n:>10}{s:>10.1f}{rate:>12.1f}{rate / base:>8.2f}")
    print("(pool seconds include starting the processes; the 90-day demo is about 8,900 readings)")


if __name__ == "__main__":
    main()
