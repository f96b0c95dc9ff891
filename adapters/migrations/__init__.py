"""Alembic migrations of the branchwatch results store (run by `adapters.store`)."""
