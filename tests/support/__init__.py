"""Helpers shared by test modules (not fixtures): kept here, not in conftest files."""
