"""Review of a run's flags: acknowledging one flag (``acknowledge``), the stations waiting
for a decision and the flag counts (``queue``), bulk decisions (``bulk``)."""
