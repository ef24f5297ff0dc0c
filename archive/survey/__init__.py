"""survey layer."""
