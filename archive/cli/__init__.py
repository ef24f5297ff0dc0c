"""cli layer."""
