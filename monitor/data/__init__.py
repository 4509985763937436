"""Data: the store (the only layer that speaks SQL), input tables, ingestion."""
