"""Waveform retention that keeps the evidence: which raw readings to keep, and deleting the rest in batches.

``policy.plan`` decides (pure reads), ``apply.run`` deletes in short transactions, each batch audited;
``tables`` holds engineers' pins and the markers of removed waveforms. Results and chart spectra are never
deleted. See docs/data.md.
"""
