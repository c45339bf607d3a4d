"""Hand-off files: atomic, deterministic writers (tables), BIDS files (bids), provenance."""
