"""The analysis worker: claim a job with a lease -> analyse outside any transaction -> store + alarms.

Three layers, each in its own module:

* ``claim`` — taking jobs (one atomic ``UPDATE ... RETURNING``; ``FOR UPDATE SKIP LOCKED`` on PostgreSQL),
  attempts, leases, the heartbeat row, and the fencing token (job id, worker, attempt) every later write
  about a job must match, so no job is ever stored twice; ``fail`` records a failure or a retry.
* ``load`` — reading a job's record, machine and checked samples, and the analysis (reads only).
* ``store`` — writing results: the ``results`` row and chart arrays, compacting raw waveforms,
  superseding an earlier result, and the alarm rules, in the same transaction as the fence.
* ``loop`` — ``run_once`` / ``run_forever`` (the service loop and its background threads); it writes
  nothing itself (tests/ops/test_layers.py checks it).

Every name is importable from ``server.worker`` as before the split.
"""

from server.worker.claim import (
    CLOCK_SLACK,
    Claim,
    LeaseLost,
    claim,
    claim_batch,
    default_worker_id,
    fail,
    start_heartbeat,
)
from server.worker.load import DamagedWaveform, analyse, forcing_args, load, load_many
from server.worker.loop import process, process_batch, run_forever, run_once
from server.worker.store import (
    ENVELOPE_POINTS,
    SPECTRUM_POINTS,
    Analysed,
    chart_blob,
    result_row,
    result_values,
    store,
    store_batch,
)

__all__ = [
    "CLOCK_SLACK", "ENVELOPE_POINTS", "SPECTRUM_POINTS", "Analysed", "Claim", "DamagedWaveform", "LeaseLost",
    "analyse", "chart_blob", "claim", "claim_batch", "default_worker_id", "fail", "forcing_args", "load",
    "load_many", "process", "process_batch", "result_row", "result_values", "run_forever", "run_once",
    "start_heartbeat", "store", "store_batch",
]
