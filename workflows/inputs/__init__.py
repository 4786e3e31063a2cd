"""What a run reads: flight lines (ingest), spectral library tables, ground reference samples."""
