"""Alembic revisions of the lab database, one file per step, never edited once shipped."""
