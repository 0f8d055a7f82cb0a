"""Pure signal analysis for subharmonic (0.5X) onset: numpy and scipy only, no I/O outside ``analysis.io``.

Three rooms: :mod:`analysis.record` (one record's analysis), :mod:`analysis.physics` (the instability
physics across readings) and :mod:`analysis.sim` (the simulator and its scoring); the result contract
(``results``, ``result_compat``) and ``errors`` stay here. The earlier flat names (``analysis.pipeline``,
``analysis.window``, ...) stay importable: ``MOVED`` maps each to its module, which is the same object.
"""

from __future__ import annotations

import importlib
import importlib.abc
import importlib.machinery
import sys

MOVED = {
    **{m: "record" for m in ("io", "validate", "conditioning", "spectrum", "segments", "forcing", "orders",
                             "tach", "detect", "known_look", "precursor", "slow_flow", "growth", "growth_fit",
                             "growth_onset", "quality", "severity", "pipeline")},
    **{m: "physics" for m in ("stability", "tongue", "window", "window_fit", "window_stats", "modal",
                              "trend")},
    **{m: "sim" for m in ("simulate", "sim_models", "sim_history", "sim_scoring")},
}


class _FlatNames(importlib.abc.MetaPathFinder, importlib.abc.Loader):
    """``import analysis.<old name>`` gives the moved module itself (one module object, two names)."""

    def find_spec(self, fullname, path=None, target=None):
        head, _, name = fullname.partition(".")
        if head != __name__ or name not in MOVED:
            return None
        return importlib.machinery.ModuleSpec(fullname, self)

    def create_module(self, spec):
        name = spec.name.partition(".")[2]
        module = importlib.import_module(f"{__name__}.{MOVED[name]}.{name}")
        spec.loader_state = module.__spec__  # the import system sets __spec__ to the alias; put it back
        return module

    def exec_module(self, module):
        module.__spec__ = module.__spec__.loader_state or module.__spec__


if not any(isinstance(f, _FlatNames) for f in sys.meta_path):
    sys.meta_path.insert(0, _FlatNames())

from analysis.errors import SignalError  # noqa: E402
from analysis.record.pipeline import analyze_record  # noqa: E402
from analysis.record.validate import normalize_units, validate_samples  # noqa: E402
from analysis.results import ANALYSIS_VERSION, RecordAnalysis  # noqa: E402

__version__ = "0.1.0"

__all__ = [
    "ANALYSIS_VERSION",
    "MOVED",
    "RecordAnalysis",
    "SignalError",
    "analyze_record",
    "normalize_units",
    "validate_samples",
]
