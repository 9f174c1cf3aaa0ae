"""The lab database's migrations (Alembic revision files in `versions/`, applied by monitor.store.lab_schema)."""
