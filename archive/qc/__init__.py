"""qc layer."""
