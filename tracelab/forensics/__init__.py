"""forensics layer."""
