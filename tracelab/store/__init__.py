"""store layer: the Parquet dataset (parts + manifest), ingest, and DuckDB views."""

from tracelab.store.dataset import Dataset, open_dataset

__all__ = ["Dataset", "open_dataset"]
