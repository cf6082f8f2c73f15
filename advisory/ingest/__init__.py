"""ingest package."""
