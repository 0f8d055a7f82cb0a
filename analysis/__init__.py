"""Pure signal analysis for subharmonic (0.5X) onset: numpy and scipy only, no I/O outside ``analysis.io``."""

from .errors import SignalError
from .pipeline import analyze_record
from .results import ANALYSIS_VERSION, RecordAnalysis
from .validate import normalize_units, validate_samples

__version__ = "0.1.0"

__all__ = [
    "ANALYSIS_VERSION",
    "RecordAnalysis",
    "SignalError",
    "analyze_record",
    "normalize_units",
    "validate_samples",
]
