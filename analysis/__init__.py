"""Pure signal analysis for subharmonic (0.5X) onset: numpy and scipy only, no I/O outside ``analysis.io``."""

__version__ = "0.1.0"
