"""Readers: round trips of files written by general-purpose libraries, and bad files."""

from __future__ import annotations

import csv

import numpy as np
import pytest
import pyuff
import soundfile
from scipy.io import wavfile

from analysis import SignalError, normalize_units, validate_samples
from analysis.record.io import read_any, read_csv, read_uff58, read_wav

FS = 2560


@pytest.fixture
def wave_data(rng):
    t = np.arange(8192) / FS
    return 0.6 * np.sin(2 * np.pi * 29.0 * t) + 0.05 * rng.standard_normal(len(t))


@pytest.mark.parametrize(
    ("dtype", "scale", "tol"),
    [("int16", 32767, 1 / 32767), ("int32", 2**31 - 1, 1e-9), ("float32", None, 1e-7)],
)
def test_wav_round_trip_scipy(tmp_path, wave_data, dtype, scale, tol):
    # writer: scipy.io.wavfile (PCM16, PCM32, IEEE float32); PCM is read back as a fraction of full scale
    path = tmp_path / f"rec_{dtype}.wav"
    data = np.round(wave_data * scale).astype(dtype) if scale else wave_data.astype(dtype)
    wavfile.write(path, FS, data)
    rec = read_wav(path, units="m/s2")
    assert rec.fs_hz == FS and rec.units == "m/s2" and rec.meta["format"] == "wav"
    np.testing.assert_allclose(rec.samples, wave_data, atol=2 * tol)


def test_wav_full_scale_multiplies_pcm(tmp_path, wave_data):
    path = tmp_path / "rec.wav"
    wavfile.write(path, FS, np.round(wave_data * 32767).astype("int16"))
    rec = read_wav(path.read_bytes(), units="g", full_scale=50.0)  # a ±50 g sensor range
    np.testing.assert_allclose(rec.samples, wave_data * 50.0 * 32767 / 32768, atol=50 / 32767)


@pytest.mark.parametrize("subtype", ["PCM_24", "FLOAT", "PCM_16"])
def test_wav_round_trip_soundfile(tmp_path, wave_data, subtype):
    # writer: soundfile (libsndfile)
    path = tmp_path / "rec.wav"
    soundfile.write(path, wave_data, FS, subtype=subtype)
    rec = read_any(path.read_bytes(), "rec.wav", units="g")
    np.testing.assert_allclose(rec.samples, wave_data, atol=1e-4 if subtype == "PCM_16" else 1e-6)
    assert rec.fs_hz == FS


def test_csv_round_trip_time_and_acceleration(tmp_path, wave_data):
    # writer: Python's csv module, header naming the units
    path = tmp_path / "rec.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time_s", "accel [m/s^2]"])
        for i, v in enumerate(wave_data):
            w.writerow([f"{i / FS:.9f}", repr(float(v))])
    rec = read_any(path, "rec.csv")
    assert rec.units == "m/s2" and rec.fs_hz == pytest.approx(FS, rel=1e-6)
    assert rec.meta["sample_rate_source"] == "time column"
    np.testing.assert_array_equal(rec.samples, wave_data)


def test_csv_one_column_needs_rate(tmp_path, wave_data):
    path = tmp_path / "one.csv"
    path.write_text("\n".join(repr(float(v)) for v in wave_data))
    with pytest.raises(SignalError, match="sample rate"):
        read_csv(path)
    rec = read_csv(path.read_bytes(), sample_rate_hz=FS, units="mm/s2")
    assert rec.units == "mm/s2" and rec.fs_hz == FS
    np.testing.assert_array_equal(rec.samples, wave_data)


def test_csv_uneven_time_steps(tmp_path):
    t = np.arange(1000) / FS
    t[500:] += 0.01
    path = tmp_path / "uneven.csv"
    path.write_text("\n".join(f"{a},{b}" for a, b in zip(t, np.sin(t), strict=True)))
    with pytest.raises(SignalError, match="uneven time steps.*resample"):
        read_csv(path)


def test_uff58_round_trip_pyuff(tmp_path, wave_data):
    # writer: pyuff (open Universal File Format, dataset 58, ASCII: 11 significant digits)
    t = np.arange(len(wave_data)) / FS
    d = pyuff.prepare_58(
        binary=0, id1="demo pump DE", func_type=1, rsp_node=1, rsp_dir=3, ref_node=1, ref_dir=3,
        abscissa_spacing=1, abscissa_spec_data_type=17, abscissa_axis_units_lab="s",
        ordinate_spec_data_type=12, ordinate_axis_units_lab="m/s^2", orddenom_spec_data_type=0,
        z_axis_spec_data_type=0, data=wave_data, x=t,
    )  # fmt: skip
    path = tmp_path / "rec.uff"
    pyuff.UFF(str(path)).write_sets([d], mode="add")
    rec = read_any(path.read_bytes(), "rec.uff")
    assert rec.units == "m/s2" and rec.fs_hz == pytest.approx(FS, rel=1e-6)
    np.testing.assert_allclose(rec.samples, wave_data, rtol=1e-9, atol=1e-10)


def test_uff_without_dataset_58(tmp_path):
    with pytest.raises(SignalError, match="dataset 58"):
        read_uff58(b"this is not a universal file\n" * 5)


@pytest.mark.parametrize(
    ("data", "name", "match"),
    [
        (b"", "rec.wav", "empty"),
        (b"RIFF....WAVEjunk", "rec.wav", "not a readable WAV"),
        (b"", "rec.csv", "empty"),
        (b"time,accel\n", "rec.csv", "no samples"),
        (b"0,1\n0.1,abc\n", "rec.csv", "not a number"),
        (b"1,2,3\n4,5,6\n", "rec.csv", "columns"),
        (b"", "rec.uff", "empty"),
        (b"data", "rec.xlsx", "unknown file type"),
    ],
)
def test_bad_files_raise_signal_error_naming_the_problem(data, name, match):
    with pytest.raises(SignalError, match=match) as exc:
        read_any(data, name, sample_rate_hz=None)
    assert exc.value.field in ("file", "samples")


def test_non_finite_values_are_rejected(tmp_path):
    path = tmp_path / "nan.csv"
    path.write_text("\n".join(["0.1"] * 300 + ["nan"] + ["0.2"] * 300))
    with pytest.raises(SignalError, match="non-finite.*index 300"):
        read_csv(path, sample_rate_hz=FS)


def test_unknown_units():
    with pytest.raises(SignalError, match="unknown units 'in/s'"):
        normalize_units("in/s")
    for spelling in ("m/s^2", "m/s2", "M/S²", "m/s**2"):
        assert normalize_units(spelling) == "m/s2"
    assert normalize_units("mm/s^2") == "mm/s2" and normalize_units(" G ") == "g"


@pytest.mark.parametrize(
    ("samples", "fs", "field", "match"),
    [
        ([], 1000, "samples", "empty"),
        (np.zeros((3, 400)), 1000, "samples", "1-D"),
        (np.zeros(10), 1000, "samples", "only 10 samples"),
        (np.zeros(1000), 0, "sample_rate_hz", "out of range"),
        (np.zeros(1000), float("nan"), "sample_rate_hz", "out of range"),
        (["a"] * 1000, 1000, "samples", "not numbers"),
    ],
)
def test_validate_samples(samples, fs, field, match):
    with pytest.raises(SignalError, match=match) as exc:
        validate_samples(samples, fs)
    assert exc.value.field == field


def test_csv_semicolon_and_tab_delimiters(tmp_path, wave_data):
    # writer: Python's csv module with the delimiters loggers use besides the comma
    for delim in (";", "\t"):
        path = tmp_path / "rec.csv"
        with path.open("w", newline="") as fh:
            w = csv.writer(fh, delimiter=delim)
            w.writerow(["t", "acc_g"])
            w.writerows([f"{i / FS:.9f}", repr(float(v))] for i, v in enumerate(wave_data))
        rec = read_csv(path)
        assert rec.units == "g" and rec.fs_hz == pytest.approx(FS, rel=1e-6)
        np.testing.assert_array_equal(rec.samples, wave_data)
