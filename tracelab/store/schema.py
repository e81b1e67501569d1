"""Column names and types of every dataset table: the contract between ingest and readers.

Each part folder holds every table (possibly with zero rows), written with these schemas, so
the DuckDB views always have the same columns whatever was ingested.
"""

from __future__ import annotations

import json
from typing import Any

import polars as pl

#: The ``frames`` view (what every analysis and query sees).
FRAMES = pl.Schema({
    "run": pl.String, "bus": pl.String, "t_ns": pl.Int64, "start_ns": pl.Int64,
    "end_ns": pl.Int64, "id": pl.UInt32, "ext": pl.Boolean, "rtr": pl.Boolean,
    "fd": pl.Boolean, "brs": pl.Boolean, "esi": pl.Boolean, "dlc": pl.UInt8,
    "data": pl.Binary, "bits": pl.UInt16, "duration_ns": pl.Int64, "file": pl.String,
    "line": pl.Int64,
})
#: Columns of the view that parts of layout 2 do not store: ``store/frames_view.py`` derives
#: them from t_ns, bits, data_bits and the file's ``%bus`` settings (manifest ``buses``).
DERIVED = ("start_ns", "end_ns", "duration_ns")
#: A frames part file of layout 2: the view's columns minus DERIVED, plus ``data_bits``
#: (bits sent at the data bit rate: ESI through the CRC delimiter of a BRS frame, else 0).
FRAMES_STORED = pl.Schema([
    *((name, dtype) for name, dtype in FRAMES.items() if name not in (*DERIVED, "file", "line")),
    ("data_bits", pl.UInt16), ("file", pl.String), ("line", pl.Int64),
])
#: How part files are laid out, recorded per file in the manifest's ``layout`` column:
#: 1 (tracelab 0.1, no column: null) stores FRAMES as is; 2 stores FRAMES_STORED.
PARTS_LAYOUT = 2
KNOWN_LAYOUTS = (1, 2)
ERRORS = pl.Schema({
    "run": pl.String, "bus": pl.String, "t_ns": pl.Int64, "type": pl.String,
    "field": pl.String, "id": pl.UInt32, "ext": pl.Boolean, "form": pl.String,
    "by": pl.String, "file": pl.String, "line": pl.Int64,
})
STATUS = pl.Schema({
    "run": pl.String, "bus": pl.String, "t_ns": pl.Int64, "node": pl.String,
    "tec": pl.Int32, "rec": pl.Int32, "file": pl.String, "line": pl.Int64,
})
MARKS = pl.Schema({
    "run": pl.String, "bus": pl.String, "t_ns": pl.Int64, "text": pl.String,
    "file": pl.String, "line": pl.Int64,
})
LOSSES = pl.Schema({
    "run": pl.String, "bus": pl.String, "t_ns": pl.Int64, "count": pl.Int64,
    "until_ns": pl.Int64, "file": pl.String, "line": pl.Int64,
})
REJECTS = pl.Schema({
    "run": pl.String, "file": pl.String, "line": pl.Int64, "raw": pl.String,
    "reason": pl.String,
})
MANIFEST = pl.Schema({
    "file": pl.String, "sha256": pl.String, "bytes": pl.Int64, "lines": pl.Int64,
    "header_lines": pl.Int64, "frames": pl.Int64, "errors": pl.Int64, "status": pl.Int64,
    "marks": pl.Int64, "losses": pl.Int64, "rejects": pl.Int64, "first_t_ns": pl.Int64,
    "last_t_ns": pl.Int64, "backward_steps": pl.Int64, "first_backward_line": pl.Int64,
    "origin": pl.String, "buses": pl.String, "meta": pl.String, "run": pl.String,
    "vehicle": pl.String, "tracelab_version": pl.String, "ingested_at": pl.String,
    # sha256 of the decompressed bytes (equal to sha256 for a plain file): one log ingested
    # plain and again as .gz is recognised as the same content
    "content_sha256": pl.String,
    # files of the same run whose time span overlaps this one's on a common bus (", "-joined)
    "overlaps": pl.String,
    # the parts layout (PARTS_LAYOUT) the file's parts were written in; null: layout 1
    "layout": pl.Int64,
})



def sql_string(text: str) -> str:
    """``text`` as a SQL string literal (quotes doubled), for the names and paths the views
    and queries spell into their SQL."""
    return "'" + text.replace("'", "''") + "'"


def manifest_buses(text: str | None) -> list[dict[str, Any]]:
    """The manifest's ``buses`` JSON, as ingest writes it: one object per ``%bus`` with
    ``alias``, ``nominal_bps``, ``data_bps``, ``stamp``, ``name``."""
    return json.loads(text) if text else []


#: The record tables of a part folder, in the order they are written.
TABLES: dict[str, pl.Schema] = {
    "frames": FRAMES, "errors": ERRORS, "status": STATUS, "marks": MARKS,
    "losses": LOSSES, "rejects": REJECTS,
}


#: What a part folder's files hold, per table (frames: FRAMES_STORED, the others as TABLES).
STORED: dict[str, pl.Schema] = {**TABLES, "frames": FRAMES_STORED}


def empty(table: str, stored: bool = False) -> pl.DataFrame:
    """A zero-row frame with the table's schema (``stored``: as a part file holds it)."""
    schema = MANIFEST if table == "manifest" else (STORED if stored else TABLES)[table]
    return pl.DataFrame(schema=schema)


def conform(frame: pl.DataFrame, table: str, stored: bool = False) -> pl.DataFrame:
    """Select and cast the table's columns in schema order (extra columns are dropped)."""
    schema = MANIFEST if table == "manifest" else (STORED if stored else TABLES)[table]
    return frame.select(pl.col(name).cast(dtype) for name, dtype in schema.items())
