"""halfwatch service: ingestion API, storage, analysis worker, alarms, email and dashboard."""
