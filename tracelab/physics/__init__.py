"""Bus physics: exact frame bit lengths and durations, fault-confinement rules. No I/O."""
