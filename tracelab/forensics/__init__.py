"""forensics layer: fault-confinement counter replay, hypotheses and the verdict."""

from tracelab.forensics.verdict import FaultsResult, replay_faults, wall_time

__all__ = ["FaultsResult", "replay_faults", "wall_time"]
