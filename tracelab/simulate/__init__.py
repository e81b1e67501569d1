"""simulate layer."""
