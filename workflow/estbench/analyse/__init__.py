"""Stage 3, analyse: the store (ingest, read-only access), the measure catalogue
with Monte Carlo SEs, checks and planning."""
