"""store layer."""
