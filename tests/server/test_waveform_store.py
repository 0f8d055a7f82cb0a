"""The waveform store (server/storage/waveforms.py): the database and the content-addressed files backends,
moving between them (halfwatch waveforms migrate), deletion of shared files, and crash safety of the files.

Every check of a file name is against hashlib's SHA-256 (FIPS 180-4) of the raw float32 little-endian bytes,
computed here, not by the store. Runs on SQLite and, with HALFWATCH_TEST_POSTGRES_URL, on PostgreSQL."""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest
from sqlalchemy import func, select
from support.fixtures import migrate, settings_for

from server import worker
from server.services.ingest import ingest_record
from server.storage import Database, blobs
from server.storage.tables import Record, Waveform
from server.storage.waveforms import FileBlobs, store_for

T0 = dt.datetime(2026, 3, 2, 8, tzinfo=dt.UTC)


def sha(x) -> str:
    return hashlib.sha256(np.asarray(x, "<f4").tobytes()).hexdigest()


def signal_of(rng, n=4096):
    t = np.arange(n) / 2560.0
    return (np.sin(2 * np.pi * 24.75 * t) + 0.1 * rng.standard_normal(n)).astype("<f4")


@pytest.fixture
def files_db(tmp_path, db_backend, migrated_template):
    settings = settings_for(tmp_path, waveform_store="files", waveform_dir=tmp_path / "wf")
    migrate(settings, migrated_template)
    db = Database.from_settings(settings)
    db.waveforms.unlink_grace_s = 0.0
    yield settings, db
    db.dispose()


def _ingest(db, plant, x, ref, i=0):
    return ingest_record(db, point_id=plant.point_id, samples=x, fs_hz=2560.0, units="m/s2",
                         measured_at=T0 + dt.timedelta(minutes=i), client_ref=ref)


def test_files_backend_keeps_samples_out_of_the_database_and_reads_them_back(files_db, rng):
    from support.plant import make_plant

    settings, db = files_db
    plant = make_plant(db)
    x = signal_of(rng)
    out = _ingest(db, plant, x, "a")
    path = settings.waveform_dir / sha(x)[:2] / sha(x)[2:4] / sha(x)
    assert path.is_file() and hashlib.sha256(path.read_bytes()).hexdigest() == sha(x)
    with db.read() as s:
        wf = s.get(Waveform, out.record_id)
        assert (wf.store, wf.digest, wf.data) == ("files", sha(x), b"")
        assert np.array_equal(store_for(s).samples(wf).view(np.uint32), x.view(np.uint32))
    # the worker analyses it from the file and leaves the file as named (no compaction of files)
    assert worker.run_once(db, settings, "t")
    with db.read() as s:
        wf = s.get(Waveform, out.record_id)
        from server.storage.queries import record_waveform

        got = record_waveform(s, out.record_id, 100_000)
    assert wf.codec == blobs.RAW_CODEC and wf.store == "files"
    assert np.allclose(got["value"], x.astype(float)) and got["n_samples"] == x.size
    # a file that goes missing is a damaged waveform for the worker, not an analysis of nothing
    path.unlink()
    with pytest.raises(worker.DamagedWaveform, match="missing"):
        worker.load(db, out.record_id)


def test_migrate_is_resumable_and_idempotent_both_ways(tmp_path, db_backend, migrated_template, rng):
    from support.plant import make_plant

    settings = settings_for(tmp_path, waveform_dir=tmp_path / "wf")  # new records go to the database
    migrate(settings, migrated_template)
    db = Database.from_settings(settings)
    try:
        plant = make_plant(db)
        xs = [signal_of(rng) for _ in range(5)]
        ids = [_ingest(db, plant, x, f"r{i}", i).record_id for i, x in enumerate(xs)]
        assert worker.run_once(db, settings, "t")  # one of them compacted by the worker first
        store = db.waveforms
        first = store.migrate(db, "files", batch=2, max_batches=1)  # stopped after one batch ...
        assert (first.moved, first.remaining) == (2, 3)
        rest = store.migrate(db, "files", batch=2)  # ... and resumed
        assert (rest.moved, rest.remaining) == (3, 0)
        assert store.migrate(db, "files").moved == 0  # idempotent
        names = sorted(p.name for p, d in FileBlobs(settings.waveform_dir).entries() if d)
        assert names == sorted(sha(x) for x in xs)
        with db.read() as s:
            rows = {w.record_id: w for w in s.scalars(select(Waveform))}
            assert all(rows[i].store == "files" and rows[i].data == b"" for i in ids)
            for rid, x in zip(ids, xs, strict=True):
                assert np.array_equal(store_for(s).samples(rows[rid]).view(np.uint32), x.view(np.uint32))
        back = store.migrate(db, "database")
        assert (back.moved, back.remaining, back.files_removed) == (5, 0, 5)
        assert not [d for _, d in FileBlobs(settings.waveform_dir).entries() if d]
        with db.read() as s:
            for rid, x in zip(ids, xs, strict=True):
                wf = s.get(Waveform, rid)
                assert wf.store == "database" and wf.digest is None
                got = blobs.decode_waveform(wf.codec, wf.data)
                assert np.array_equal(got.view(np.uint32), x.view(np.uint32))
    finally:
        db.dispose()


def test_cli_migrate_and_status(tmp_path, db_backend, migrated_template, rng):
    from ops.helpers import ROOT, child_env
    from support.plant import make_plant

    settings = settings_for(tmp_path, waveform_dir=tmp_path / "wf")
    migrate(settings, migrated_template)
    db = Database.from_settings(settings)
    plant = make_plant(db)
    _ingest(db, plant, signal_of(rng), "c1")
    db.dispose()
    env = child_env(settings)
    env["HALFWATCH_WAVEFORM_DIR"] = str(settings.waveform_dir)
    run = [sys.executable, "-m", "server", "waveforms"]
    done = subprocess.run(run + ["migrate", "--to", "files", "--json"], env=env, cwd=ROOT,
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert '"moved": 1' in done.stdout and '"remaining": 0' in done.stdout
    done = subprocess.run(run + ["status"], env=env, cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert '"files": 1' in done.stdout and '"database": 0' in done.stdout, done.stdout


def test_shared_file_is_unlinked_only_when_its_last_record_goes(files_db, rng):
    from support.plant import make_plant

    settings, db = files_db
    plant = make_plant(db)
    x = signal_of(rng)
    a = _ingest(db, plant, x, "a").record_id
    b = _ingest(db, plant, x, "b", 1).record_id  # the same samples under another reference: one file
    path = FileBlobs(settings.waveform_dir).path(sha(x))
    with db.unit_of_work() as s:
        assert store_for(s).delete_many(s, [a]) == 0  # b still refers to the file
    assert path.is_file()
    with db.unit_of_work() as s:
        assert store_for(s).delete_many(s, [b]) == x.nbytes
        assert path.is_file()  # not before the commit ...
    assert not path.exists()  # ... but after it
    with db.read() as s:
        assert s.scalar(select(func.count()).select_from(Waveform)) == 0
    # a rolled-back deletion keeps the file
    c = _ingest(db, plant, x, "c", 2).record_id
    with pytest.raises(RuntimeError), db.unit_of_work() as s:
        store_for(s).delete_many(s, [c])
        raise RuntimeError("abort")
    assert path.is_file()


CHILD = textwrap.dedent("""
    import datetime as dt, sys
    import numpy as np
    from server.settings import Settings
    from server.storage import Database
    from server.services.ingest import ingest_record
    settings = Settings(data_dir=sys.argv[1], database_url=sys.argv[2], waveform_store="files",
                        waveform_dir=sys.argv[3])
    db = Database.from_settings(settings)
    rng = np.random.default_rng(int(sys.argv[5]))
    t0 = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)
    print("ready", flush=True)
    for i in range(100000):
        x = rng.standard_normal(262144).astype("<f4")  # 1 MiB per record: the kill lands mid-write
        ingest_record(db, point_id=int(sys.argv[4]), samples=x, fs_hz=2560.0, units="m/s2",
                      measured_at=t0 + dt.timedelta(seconds=i), client_ref=f"k{sys.argv[5]}-{i}")
        print("stored", i, flush=True)
""")


def test_sigkill_during_ingest_leaves_every_committed_record_with_its_whole_file(tmp_path, db_backend,
                                                                                migrated_template):
    from support.plant import make_plant

    settings = settings_for(tmp_path, waveform_store="files", waveform_dir=tmp_path / "wf")
    migrate(settings, migrated_template)
    db = Database.from_settings(settings)
    plant = make_plant(db)
    root = settings.waveform_dir
    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    for seed, delay in ((1, 0.004), (2, 0.017)):  # kills at different points of a write
        proc = subprocess.Popen([sys.executable, "-c", CHILD, str(settings.data_dir), settings.database_url,
                                 str(root), str(plant.point_id), str(seed)], env=env,
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        for line in proc.stdout:  # wait until it has stored a few, then kill it mid-stream
            if line.startswith(b"stored 2"):
                break
        else:
            pytest.fail(proc.stderr.read().decode()[-2000:])
        time.sleep(delay)
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
    with db.read() as s:
        rows = s.execute(select(Record.checksum, Waveform.store, Waveform.digest)
                         .join(Waveform, Waveform.record_id == Record.id)).all()
    assert rows, "the child stored nothing before the kill; the test proves nothing"
    blobs_ = FileBlobs(root)
    for checksum, store, digest in rows:  # committed => its file is whole and named by its SHA-256
        assert store == "files" and digest == checksum
        assert hashlib.sha256(blobs_.path(digest).read_bytes()).hexdigest() == digest
    named = [(p, d) for p, d in blobs_.entries() if d]
    for p, d in named:  # no file under a digest name is partial, committed or not
        assert hashlib.sha256(p.read_bytes()).hexdigest() == d
    # the sweep removes what the kills left: temporary files and files of records that never committed
    out = db.waveforms.sweep(db, grace_s=0.0)
    assert out.kept == len({r[0] for r in rows})
    left = sorted(d for _, d in blobs_.entries())
    assert left == sorted({r[0] for r in rows})
    db.dispose()
