"""Alembic revision scripts of the store (one per schema version)."""
