"""network layer."""
