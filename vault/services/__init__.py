"""The use cases (ingest, exports, withdrawal, budget ledger, report)."""
