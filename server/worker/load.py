"""Reading a claimed job's record: its row, its machine's row and the checked samples; and its analysis.

Reads only. The samples are checked against the checksum taken at ingest, so a damaged blob is reported
(``DamagedWaveform``) instead of being analysed as if it were a measurement.
"""

from __future__ import annotations

import zlib

from sqlalchemy import bindparam, select

from server.storage import blobs
from server.storage.tables import Asset, Point, Record, Waveform
from server.storage.waveforms import MissingWaveformFile
from server.tach.tables import RecordTach


class DamagedWaveform(RuntimeError):
    """The stored samples of a record are unreadable or differ from the checksum taken at ingest."""


def forcing_args(record: Record, asset: Asset) -> dict:
    """The asset says what the forcing is (shaft speed x multiplier); a measured speed is exact."""
    mult = asset.forcing_multiplier or 1.0
    if record.speed_hz:
        return {"forcing_hz": record.speed_hz * mult}
    return {"nominal_hz": asset.nominal_speed_hz * mult}


_RT = Record.__table__
_LOAD = (select(_RT, Waveform.codec.label("wf_codec"), Waveform.data.label("wf_data"),
                Waveform.store.label("wf_store"), Waveform.digest.label("wf_digest"),
                RecordTach.pulses.label("tach_pulses"), RecordTach.pulses_per_rev.label("tach_per_rev"))
         .join(Waveform, Waveform.record_id == _RT.c.id)
         .outerjoin(RecordTach, RecordTach.record_id == _RT.c.id)  # tach pulses, if any (server/tach)
         .where(_RT.c.id.in_(bindparam("rids", expanding=True))))
_ASSETS = (select(Point.id.label("of_point"), Asset.__table__).join(Point, Point.asset_id == Asset.id)
           .where(Point.id.in_(bindparam("pids", expanding=True))))


def load_many(db, record_ids) -> dict[int, tuple | Exception]:
    """{record id: (record row, asset row, samples) or the DamagedWaveform/ValueError that load raises}.

    Two reads for the whole batch (records with their waveforms, then the assets of their points). Raw
    samples are a read-only view of the stored bytes (no copy); compacted ones are decoded once."""
    with db.read_engine.connect() as conn:
        records = conn.execute(_LOAD, {"rids": list(record_ids)}).all()
        pids = sorted({r.point_id for r in records})
        assets = {a.of_point: a for a in conn.execute(_ASSETS, {"pids": pids})}
    out: dict[int, tuple | Exception] = {}
    for record in records:
        try:
            out[record.id] = (record, assets[record.point_id], _samples(record, db.waveforms))
        except (DamagedWaveform, ValueError) as exc:
            out[record.id] = exc
    return out


def _samples(record, store):
    """The checked samples of a row with ``wf_codec``/``wf_data``/``wf_store``/``wf_digest`` (see ``load``);
    ``store`` (server/storage/waveforms.py) reads those kept as files."""
    try:
        samples = blobs.decode_waveform(*store.blob(record.wf_store, record.wf_digest, record.wf_codec,
                                                    record.wf_data))
    except MissingWaveformFile as exc:
        raise DamagedWaveform(f"record {record.id}: {exc}; restore the file from a backup") from None
    except (ValueError, zlib.error) as exc:
        if str(exc).startswith("unknown waveform codec"):
            raise  # written by a newer version, perhaps: retried, another worker may know the codec
        raise DamagedWaveform(f"record {record.id}: the stored waveform cannot be decoded ({exc})") from None
    if record.checksum and blobs.checksum(samples) != record.checksum:
        raise DamagedWaveform(f"record {record.id}: the stored waveform does not match its ingest checksum "
                              "(damaged in storage); re-send the record or restore it from a backup")
    return samples


def load(db, record_id: int):
    """(record row, asset row, samples); rows have the tables' column names as attributes.

    The samples are checked against the checksum taken at ingest: a damaged blob raises DamagedWaveform
    instead of being analysed as if it were a measurement."""
    got = load_many(db, [record_id]).get(record_id)
    if got is None:
        raise LookupError(f"record {record_id} or its waveform is missing")
    if isinstance(got, Exception):
        raise got
    return got


def analyse(record: Record, asset: Asset, samples):
    import numpy as np

    from analysis import analyze_record

    tach = {}
    pulses = getattr(record, "tach_pulses", None)  # stored with the record (server/tach): track by tach
    if pulses is not None:
        tach = dict(tach_pulses_s=np.frombuffer(pulses, dtype="<f8"),
                    pulses_per_rev=getattr(record, "tach_per_rev", 1))
    return analyze_record(samples, record.fs_hz, units=record.units, machine_group=asset.machine_group,
                          foundation=asset.foundation, **forcing_args(record, asset), **tach)


