"""Readers: WAV, CSV and UFF dataset 58 -> Recording. The only module of ``analysis`` that touches files."""

from __future__ import annotations

import csv
import io
import os
import struct
import tempfile
import warnings
import wave
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from analysis.errors import SignalError
from analysis.record.validate import normalize_units, validate_sample_rate, validate_samples

#: Relative spread of time steps accepted in a CSV time column (common practice: logger clocks jitter).
TIME_STEP_TOLERANCE = 1e-3


@dataclass(frozen=True)
class Recording:
    samples: np.ndarray
    fs_hz: float
    units: str
    meta: dict = field(default_factory=dict)
    #: the tach channel's raw samples (any unit) when a reader was asked for ``tach_channel``
    tach: np.ndarray | None = None


def _pick_channels(y: np.ndarray, tach_channel: int | None) -> tuple[np.ndarray, np.ndarray | None]:
    """(acceleration, tach) from samples x channels: channels count from 1; the acceleration is the first
    channel that is not the tach."""
    y = y.reshape(len(y), -1)
    if tach_channel is None:
        return y[:, 0], None
    nch = y.shape[1]
    try:
        n = int(tach_channel)
        ok = n == float(tach_channel)
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok or not 1 <= n <= nch or nch < 2:
        raise SignalError(
            f"tach channel {tach_channel!r} is not in this file: it has {nch} channel(s), counted from 1; "
            "a tach needs a second channel beside the acceleration", field="tach_channel")
    accel = 1 if n == 1 else 0
    return y[:, accel], np.asarray(y[:, n - 1], dtype=np.float64)


def _as_bytes(data: bytes | str | os.PathLike) -> bytes:
    if isinstance(data, bytes | bytearray | memoryview):
        return bytes(data)
    try:
        return Path(data).read_bytes()
    except OSError as exc:
        raise SignalError(f"cannot read {data}: {exc.strerror}; check the path", field="file") from None


def _finish(samples, fs, units, meta, tach: np.ndarray | None = None) -> Recording:
    x, fs = validate_samples(samples, fs)
    return Recording(samples=x, fs_hz=fs, units=normalize_units(units), meta=meta, tach=tach)


def read_wav(
    data: bytes | str | os.PathLike, *, units: str | None = None, full_scale: float = 1.0,
    tach_channel: int | None = None,
) -> Recording:
    """WAV, PCM 8/16/24/32-bit or IEEE float; sample rate from the header, first channel (with
    ``tach_channel``: that channel as the tach, the first other channel as the acceleration).

    PCM values are scaled to ±1 at full scale and multiplied by ``full_scale`` (the sensor's acceleration at
    digital full scale, in ``units``); float files are taken as acceleration values.
    """
    raw = _as_bytes(data)
    if not raw:
        raise SignalError("the WAV file is empty; upload a recorded file", field="file")
    _check_wav_data_size(raw)
    from scipy.io import wavfile

    try:
        with warnings.catch_warnings():  # extra chunks (PEAK, cue, ...) are harmless: skip them quietly
            warnings.simplefilter("ignore", wavfile.WavFileWarning)
            fs, y = wavfile.read(io.BytesIO(raw))
    except (ValueError, EOFError, OSError, struct.error, wave.Error,
            # scipy's parser trips over some damaged headers with these (found by tests/ops/test_fuzz.py)
            UnboundLocalError, ZeroDivisionError, IndexError, TypeError, KeyError) as exc:
        raise SignalError(
            f"not a readable WAV file ({exc}); export PCM or float WAV, or use CSV", field="file"
        ) from None
    y, tach = _pick_channels(np.asarray(y), tach_channel)
    if y.dtype.kind in "iu":
        if y.dtype == np.uint8:
            y = (y.astype(np.float64) - 128.0) / 128.0
        else:
            y = y.astype(np.float64) / float(-np.iinfo(y.dtype).min)
        y = y * float(full_scale)
    return _finish(y, fs, units or "g", {"format": "wav", "sample_rate_source": "header"}, tach)


def _check_wav_data_size(raw: bytes) -> None:
    """Refuse a WAV whose ``data`` chunk claims more bytes than the file holds (a cut-short file, or a
    streaming writer that never filled in the size): reading on would silently analyse a shorter record.
    RIFF layout: 12-byte header, then chunks of a 4-byte id and a little-endian 32-bit size (Microsoft
    RIFF/WAVE specification, 1991; from memory)."""
    if len(raw) < 12 or raw[:4] != b"RIFF" or raw[8:12] != b"WAVE":
        return  # not RIFF/WAVE at all: scipy's reader says what is wrong
    pos = 12
    while pos + 8 <= len(raw):
        chunk, size = raw[pos:pos + 4], struct.unpack("<I", raw[pos + 4:pos + 8])[0]
        if chunk == b"data":
            held = len(raw) - (pos + 8)
            if size > held:
                raise SignalError(
                    f"the WAV header says its data holds {size} bytes but the file has only {held} after the "
                    "header; the file is cut short or was not finished: export or copy it again",
                    field="file")
            return
        pos += 8 + size + (size & 1)  # chunks are padded to an even length


def _parse_float(cell: str, line: int) -> float:
    try:
        return float(cell)
    except ValueError:
        raise SignalError(
            f"CSV line {line}: {cell!r} is not a number; keep one header line at most and numbers below it",
            field="file",
        ) from None


def _parse_rows(rows: list[list[str]], ncol: int, has_header: bool) -> np.ndarray:
    values = np.empty((len(rows), ncol))
    for i, r in enumerate(rows):
        cells = [c for c in r if c.strip()]
        if len(cells) != ncol:
            raise SignalError(
                f"CSV line {i + 1 + has_header} has {len(cells)} values, expected {ncol}",
                field="file",
            )
        for j, c in enumerate(cells):
            values[i, j] = _parse_float(c, i + 1 + has_header)
    return values


def read_csv(
    data: bytes | str | os.PathLike, *, units: str | None = None, sample_rate_hz: float | None = None,
    tach_channel: int | None = None,
) -> Recording:
    """CSV with one acceleration column, or time [s] + acceleration; an optional header line.

    With ``tach_channel`` the file has two or more channel columns, after a time column when the first
    column increases in even steps; channels count from 1 after the time column.

    With a time column the sample rate comes from the (even) time steps; otherwise give ``sample_rate_hz``.
    A header naming units in brackets or after an underscore ("accel [m/s^2]", "acc_g") sets the units when
    ``units`` is not given.
    """
    raw = _as_bytes(data)
    text = raw.decode("utf-8-sig", errors="replace").strip()
    if not text:
        raise SignalError("the CSV file is empty; upload at least a few seconds of samples", field="file")
    sample = text[:4096]
    try:
        dialect = csv.Sniffer().sniff(sample, delimiters=",;\t ")
    except csv.Error:
        dialect = csv.excel
    try:
        rows = [r for r in csv.reader(io.StringIO(text), dialect) if any(c.strip() for c in r)]
    except csv.Error as exc:  # e.g. a stray carriage return inside a field
        raise SignalError(f"the CSV file cannot be parsed ({exc}); save it as plain CSV text",
                          field="file") from None
    header: list[str] | None = None
    try:
        float(rows[0][0])
    except ValueError:
        header, rows = rows[0], rows[1:]
    if not rows:
        raise SignalError("the CSV file has a header but no samples", field="file")
    ncol = len([c for c in rows[0] if c.strip()])
    if ncol not in (1, 2) and tach_channel is None:
        raise SignalError(
            f"the CSV has {ncol} columns; give one (acceleration) or two (time, acceleration)", field="file"
        )
    try:  # fast path; the loop below finds and names the bad line
        values = np.array([[c for c in r if c.strip()] for r in rows], dtype=np.float64)
        if values.ndim != 2 or values.shape[1] != ncol:
            raise ValueError
    except ValueError:
        values = _parse_rows(rows, ncol, header is not None)
    accel_col = ncol - 1
    tach = None
    if tach_channel is not None:
        has_time = len(values) > 1 and bool(np.all(np.diff(values[:, 0]) > 0))
        y, tach = _pick_channels(values[:, int(has_time):], tach_channel)
        accel_col = int(has_time) + (1 if tach_channel == 1 else 0)
        values = np.column_stack([values[:, 0], y]) if has_time else y[:, None]
        ncol = 2 if has_time else 1
    if units is None and header and len(header) > accel_col:
        units = _units_from_header(header[accel_col])
    meta = {"format": "csv"}
    if ncol == 2:
        t = values[:, 0]
        if not np.all(np.isfinite(t)):
            raise SignalError("the CSV time column has non-finite values; fix the time stamps", field="file")
        steps = np.diff(t)
        if len(steps) == 0 or np.any(steps <= 0):
            raise SignalError(
                "CSV time stamps do not increase; sort the rows or fix the time column", field="file"
            )
        dt = float(np.median(steps))
        if np.max(np.abs(steps - dt)) > TIME_STEP_TOLERANCE * dt:
            raise SignalError(
                f"uneven time steps in the CSV (from {steps.min():.6g} s to {steps.max():.6g} s); "
                "resample to a constant rate before upload",
                field="file",
            )
        fs = 1.0 / dt
        if sample_rate_hz is not None and abs(validate_sample_rate(sample_rate_hz) - fs) > 1e-3 * fs:
            raise SignalError(
                f"the given sample rate {sample_rate_hz} Hz disagrees with the CSV time column "
                f"({fs:.6g} Hz); drop one of them",
                field="sample_rate_hz",
            )
        meta["sample_rate_source"] = "time column"
        y = values[:, 1]
    else:
        if sample_rate_hz is None:
            raise SignalError(
                "a one-column CSV has no time axis; give the sample rate (--sample-rate HZ) "
                "or add a time column",
                field="sample_rate_hz",
            )
        fs = sample_rate_hz
        meta["sample_rate_source"] = "given"
        y = values[:, 0]
    return _finish(y, fs, units or "g", meta, tach)


def _units_from_header(name: str) -> str | None:
    name = name.strip().lower()
    for open_, close in (("[", "]"), ("(", ")")):
        if open_ in name and close in name:
            inner = name[name.index(open_) + 1 : name.index(close)]
            try:
                return normalize_units(inner)
            except SignalError:
                return None
    if "_" in name:
        try:
            return normalize_units(name.rsplit("_", 1)[1])
        except SignalError:
            return None
    return None


def read_uff58(data: bytes | str | os.PathLike, *, units: str | None = None,
               tach_channel: int | None = None) -> Recording:
    """The first time-response record (function type 1) of a Universal File Format dataset 58, via pyuff.

    With ``tach_channel`` the file's datasets 58 are its channels, counted from 1 in file order; they must
    share the length and the time increment.

    Units come from the ordinate axis label when not given; the sample rate from the abscissa increment.
    """
    import pyuff

    raw = _as_bytes(data)
    if not raw:
        raise SignalError("the UFF file is empty; upload a file with a dataset 58", field="file")
    fd, name = tempfile.mkstemp(suffix=".uff")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(raw)
        try:
            uff = pyuff.UFF(name)
            types = list(uff.get_set_types())
        except Exception as exc:  # pyuff raises many kinds of errors on malformed files
            raise SignalError(
                f"not a readable UFF file ({exc}); export dataset 58 (time data)", field="file"
            ) from None
        if 58 not in types:
            raise SignalError(
                "the file holds no UFF dataset 58 (time data); export the record as dataset 58", field="file"
            )
        idx = [i for i, k in enumerate(types) if k == 58][: None if tach_channel is not None else 1]
        try:
            sets = [uff.read_sets(i) for i in idx]
        except Exception as exc:
            raise SignalError(
                f"the UFF dataset 58 cannot be read ({exc}); re-export it", field="file"
            ) from None
    finally:
        os.unlink(name)
    s = sets[0]
    tach = None
    if tach_channel is not None:
        if len({len(np.asarray(k["data"])) for k in sets}) > 1 or len(
                {float(k.get("abscissa_inc") or 0.0) for k in sets}) > 1:
            raise SignalError("the UFF datasets 58 differ in length or time increment; a tach channel must "
                              "be sampled with the acceleration", field="tach_channel")
        both = np.column_stack([np.real(np.asarray(k["data"])) for k in sets])
        _, tach = _pick_channels(both, tach_channel)
        s = sets[1 if int(tach_channel) == 1 else 0]
    y = np.asarray(s["data"])
    if np.iscomplexobj(y):
        raise SignalError(
            "the UFF dataset 58 holds complex data (a spectrum or FRF), not a time record", field="file"
        )
    inc = float(s.get("abscissa_inc") or 0.0)
    if inc <= 0:
        x = np.asarray(s.get("x", []), dtype=float)
        inc = float(np.median(np.diff(x))) if len(x) > 1 else 0.0
    if inc <= 0:
        raise SignalError(
            "the UFF record has no time increment; re-export with even abscissa spacing", field="file"
        )
    if units is None:
        try:
            units = normalize_units(str(s.get("ordinate_axis_units_lab", "")).strip() or None)
        except SignalError:
            units = None
    meta = {
        "format": "uff58",
        "sample_rate_source": "abscissa increment",
        "id1": str(s.get("id1", "")).strip(),
    }
    return _finish(y.astype(np.float64), 1.0 / inc, units or "g", meta, tach)


def read_any(
    data: bytes | str | os.PathLike,
    filename: str | None = None,
    *,
    units: str | None = None,
    sample_rate_hz: float | None = None,
    tach_channel: int | None = None,
) -> Recording:
    """Read bytes (an upload) or a path; the format comes from the file name's extension. With
    ``tach_channel`` (counted from 1) that channel comes back raw in ``Recording.tach``."""
    name = str(filename if filename is not None else data if not isinstance(data, bytes | bytearray) else "")
    ext = Path(name).suffix.lower()
    if units is not None:
        units = normalize_units(units)
    if ext == ".wav":
        rec = read_wav(data, units=units, tach_channel=tach_channel)
    elif ext in (".csv", ".txt", ".tsv"):
        return read_csv(data, units=units, sample_rate_hz=sample_rate_hz, tach_channel=tach_channel)
    elif ext in (".uff", ".unv", ".uf"):
        rec = read_uff58(data, units=units, tach_channel=tach_channel)
    else:
        raise SignalError(
            f"unknown file type {ext or '(no extension)'!r}; use .wav, .csv or .uff (dataset 58)",
            field="file",
        )
    if (
        sample_rate_hz is not None
        and abs(validate_sample_rate(sample_rate_hz) - rec.fs_hz) > 1e-6 * rec.fs_hz
    ):
        raise SignalError(
            f"the given sample rate {sample_rate_hz} Hz disagrees with the file ({rec.fs_hz:g} Hz); drop it",
            field="sample_rate_hz",
        )
    return rec
