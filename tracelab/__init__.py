"""tracelab: timing, bus-load and fault-confinement forensics for CAN / CAN FD frame logs.

Layers (imports only point down):
    format -> physics -> network -> store -> analyses / simulate / forensics -> report -> fleet -> cli
"""

import os

__version__ = "0.1.0"

#: Polars' allocator (jemalloc, with background purging) hands pages freed by a chunk's work
#: back to the kernel within moments, so the next chunk faults them in again: ingest took
#: ~100 page faults per 1,000 lines, a quarter of its CPU time in the kernel. Keeping freed
#: pages 5 s halves the faults (docs/performance.md). It takes effect only when tracelab is
#: imported before polars (the CLI, pipelines, fleet workers) and the user has not set it.
ALLOCATOR_CONF = "dirty_decay_ms:5000,muzzy_decay_ms:5000"
os.environ.setdefault("_RJEM_MALLOC_CONF", ALLOCATOR_CONF)
