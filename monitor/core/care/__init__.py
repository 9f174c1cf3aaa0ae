"""Care of animals on water restriction: water earned per session and the daily ledger (advisory)."""
