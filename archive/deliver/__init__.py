"""deliver layer."""
