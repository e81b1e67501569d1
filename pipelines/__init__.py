"""Scheduled entry points (thin shells over the library)."""
