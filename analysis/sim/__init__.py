"""The simulator of invented records and histories with their ground truth, and its scoring (for demos,
tests and benchmarks; never measurements)."""
