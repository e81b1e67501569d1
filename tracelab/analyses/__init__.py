"""analyses layer."""
