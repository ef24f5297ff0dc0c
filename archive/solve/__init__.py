"""solve layer."""
