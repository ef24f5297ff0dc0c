"""Alembic scripts of the nodekeep catalog (shipped as ``archive.migrations``)."""
