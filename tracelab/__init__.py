"""tracelab: timing, bus-load and fault-confinement forensics for CAN / CAN FD frame logs.

Layers (imports only point down):
    format -> physics -> network -> store -> analyses / simulate / forensics -> report -> fleet -> cli
"""

__version__ = "0.1.0"
