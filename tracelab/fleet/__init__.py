"""fleet layer."""
