"""Review of a run's flags: the decisions that read a run (acknowledging a flag)."""
