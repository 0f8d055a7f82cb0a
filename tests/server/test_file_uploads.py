"""Upload of each file kind through the analysis core's readers: WAV, CSV and UFF-58.

The files are written with general-purpose libraries (scipy.io.wavfile, soundfile, csv, pyuff), so the
check is that what those libraries wrote is what the service stored.
"""

from __future__ import annotations

import csv
import io

import numpy as np
import pytest
from support.signals import tone_record

from server.storage import blobs
from server.storage.tables import Record, Waveform

WHEN = "2026-03-02T08:00:00Z"


def stored(db, record_id):
    with db.read() as s:
        rec, wf = s.get(Record, record_id), s.get(Waveform, record_id)
    return rec, blobs.decode_waveform(wf.codec, wf.data), blobs.decompress(wf.source_bytes)


def upload(client, headers, point_id, name, data, **form):
    return client.post(f"/api/v1/points/{point_id}/records/file", headers=headers,
                       files={"file": (name, data, "application/octet-stream")},
                       data={"measured_at": WHEN, **form})


def test_wav_float32_written_by_scipy(client, plant, plant_key_headers, rng, migrated_db):
    from scipy.io import wavfile

    x = tone_record(rng, fs_hz=5120, n=8192)
    buf = io.BytesIO()
    wavfile.write(buf, 5120, x)  # scipy.io.wavfile: IEEE float WAV
    r = upload(client, plant_key_headers, plant.point_id, "de-h.wav", buf.getvalue(), units="m/s2")
    assert r.status_code == 201, r.text
    rec, samples, original = stored(migrated_db, r.json()["record_id"])
    assert rec.fs_hz == 5120 and rec.origin == "upload" and rec.units == "m/s2"
    np.testing.assert_array_equal(samples, x)
    assert original == buf.getvalue()  # the uploaded file is kept as received


def test_wav_pcm16_written_by_soundfile(client, plant, plant_key_headers, rng, migrated_db):
    import soundfile as sf

    x = 0.5 * tone_record(rng, n=4096, noise=0.0)
    buf = io.BytesIO()
    sf.write(buf, x, 2560, format="WAV", subtype="PCM_16")
    r = upload(client, plant_key_headers, plant.point_id, "de-h.wav", buf.getvalue(), units="g")
    assert r.status_code == 201, r.text
    _, samples, _ = stored(migrated_db, r.json()["record_id"])
    # soundfile reads the same file back as float in [-1, 1): the reference for the PCM scaling
    ref, fs = sf.read(io.BytesIO(buf.getvalue()), dtype="float64")
    assert fs == 2560
    np.testing.assert_allclose(samples, ref, atol=1e-6)


def test_csv_with_time_column(client, plant, plant_key_headers, rng, migrated_db):
    x = tone_record(rng, n=4096)
    text = io.StringIO()
    w = csv.writer(text)
    w.writerow(["time_s", "accel [m/s^2]"])
    for i, v in enumerate(x):
        w.writerow([f"{i / 2560:.9f}", f"{v:.9g}"])
    r = upload(client, plant_key_headers, plant.point_id, "walk.csv", text.getvalue().encode())
    assert r.status_code == 201, r.text
    rec, samples, _ = stored(migrated_db, r.json()["record_id"])
    assert rec.fs_hz == pytest.approx(2560, rel=1e-6) and rec.units == "m/s2"
    np.testing.assert_allclose(samples, x, rtol=1e-6)


def test_uff58_written_by_pyuff(client, plant, plant_key_headers, rng, migrated_db, tmp_path):
    import pyuff

    fs = 2560.0
    x = tone_record(rng, n=4096).astype(np.float64)
    t = np.arange(x.size) / fs
    d = pyuff.prepare_58(binary=0, id1="test record", func_type=1, rsp_node=1, rsp_dir=3, ref_node=1,
                         ref_dir=3, abscissa_spacing=1, abscissa_spec_data_type=17,
                         abscissa_axis_units_lab="s", ordinate_spec_data_type=12,
                         ordinate_axis_units_lab="m/s^2", orddenom_spec_data_type=0, z_axis_spec_data_type=0,
                         data=x, x=t)
    fn = tmp_path / "rec.uff"
    pyuff.UFF(str(fn)).write_sets([d], mode="add")
    r = upload(client, plant_key_headers, plant.point_id, "rec.uff", fn.read_bytes(), units="m/s2")
    assert r.status_code == 201, r.text
    rec, samples, _ = stored(migrated_db, r.json()["record_id"])
    back = pyuff.UFF(str(fn)).read_sets()  # pyuff's own reading of its file is the reference
    assert rec.fs_hz == pytest.approx(1 / back["abscissa_inc"], rel=1e-9)
    np.testing.assert_allclose(samples, back["data"], rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("name, data, field", [
    ("x.wav", b"RIFF....not a wav", "file"),
    ("x.xlsx", b"PK\x03\x04", "file"),
    ("x.csv", b"", "file"),
    ("x.csv", b"1.0\n2.0\n" * 200, "fs_hz"),  # one column and no sample rate
], ids=["not-wav", "spreadsheet", "empty-csv", "csv-without-rate"])
def test_bad_files_are_rejected_naming_the_field(client, plant, plant_key_headers, name, data, field):
    r = upload(client, plant_key_headers, plant.point_id, name, data)
    assert r.status_code in (400, 422), r.text
    assert r.json()["error"]["field"] == field


def test_file_without_time_needs_measured_at(client, plant, plant_key_headers, rng):
    x = tone_record(rng, n=2048)
    r = client.post(f"/api/v1/points/{plant.point_id}/records/file", headers=plant_key_headers,
                    files={"file": ("a.csv", "\n".join(f"{v:.6g}" for v in x).encode())},
                    data={"fs_hz": "2560"})
    assert r.status_code == 422 and r.json()["error"]["field"] == "measured_at"
