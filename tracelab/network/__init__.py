"""network layer: the catalog of buses, nodes and messages (docs/network-catalog.md)."""

from tracelab.network.catalog import (
    BusSpec,
    Catalog,
    MessageSpec,
    NodeSpec,
    load_catalog,
    parse_duration_ns,
)

__all__ = ["BusSpec", "Catalog", "MessageSpec", "NodeSpec", "load_catalog", "parse_duration_ns"]
