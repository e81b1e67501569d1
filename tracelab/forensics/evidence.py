"""Loading the evidence: one (run, bus) of the dataset views as arrays the replay walks.

Frames become three arrays (time-sorted ``t_ns``, sender index, ESI flag) plus per-sender time
arrays; error and status records become one event table in time order with the transmitter
(the catalog sender of the identifier in progress) and the first detector (``by``) as node
indices; logger losses an (k, 2) array. ``prepare_counts`` then counts, for every event, the
frames before it (all and per sender), the one vectorised pass the counter walk needs.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import duckdb
import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc

from tracelab.forensics.framestore import Column, Spill
from tracelab.physics.bitlength import frame_durations_ns
from tracelab.store.limits import current_limits
from tracelab.store.row_groups import PartFiles
from tracelab.store.schema import manifest_buses, sql_string

KIND_ERROR = 0
KIND_STATUS = 1
#: From this many frames on, a one-bus dataset without extended or FD frames counts frames
#: per identifier from the identifier array and samples durations, saving a grouping scan.
SAMPLED_BY_ID_FRAMES = 1_000_000


class CatalogLike(Protocol):
    """What the replay needs from a network catalog (tracelab.network.catalog.Catalog)."""

    @property
    def buses(self) -> Any: ...

    def messages_frame(self) -> pl.DataFrame: ...

    def nodes_on(self, bus: str) -> list[str]: ...


@dataclass
class BusEvidence:
    """Everything the replay reads for one (run, bus), as arrays. Built once, replayed often."""

    run: str
    bus: str
    nodes: list[str]
    bit_ns: float
    frame_t: Column            # int64, time-sorted t_ns of every frame
    frame_node: Column         # int16 node index of the sender, -1 when the catalog has none
    own_t: list[Column]        # per node, the t_ns of its frames
    esi_t: list[tuple[Column, Column]]  # per node (and last: no catalog sender), t_ns of its
    #                                     FD frames with ESI set, clear; [] without FD frames
    esi_set_frames: int        # FD frames with ESI set (any sender)
    share: np.ndarray          # per node, its share of bus time (duration_ns) over the run
    events: pl.DataFrame       # error and status records in time order, see _events()
    losses: np.ndarray         # (k, 2) int64 [t_ns, until_ns) logger-loss intervals
    first_t_ns: int
    last_t_ns: int
    frames_by_id: pl.DataFrame  # id, ext, sender, frames, busy_ns
    con: duckdb.DuckDBPyConnection | None = None
    _recovery_cache: dict[tuple[int, int], int] = field(default_factory=dict)
    #: per confinement config: (the events it was computed for, per node and event whether
    #: the node could flag actively before the event), see replay.others_active
    _active_cache: dict[Any, tuple[pl.DataFrame, np.ndarray]] = field(default_factory=dict)
    # per-event cumulative counts (filled by prepare_counts)
    ev_t: list[int] = field(default_factory=list)
    ev_frames_before: list[int] = field(default_factory=list)
    ev_own_before: list[list[int]] = field(default_factory=list)
    ev_loss_since_prev: list[bool] = field(default_factory=list)
    loss_counts: list[int | None] | None = None  # per loss, the records the logger dropped
    #: where bit_ns came from: "catalog", "manifest", or "assumed" (neither names the rate)
    bit_rate_source: str = "catalog"

    @property
    def frames(self) -> int:
        return int(self.frame_t.size)

    def node_index(self, name: str | None) -> int:
        if name is None:
            return -1
        try:
            return self.nodes.index(name)
        except ValueError:
            return -1



def _frame(con: duckdb.DuckDBPyConnection, query: str) -> pl.DataFrame:
    return con.sql(query).pl()


def run_buses(con: duckdb.DuckDBPyConnection, run: str | None = None,
              by_id: pl.DataFrame | None = None) -> list[tuple[str, str]]:
    """(run, bus) pairs that have any frames or errors, sorted."""
    where = f"WHERE run = {sql_string(run)}" if run is not None else ""
    rows = set(con.execute(f"SELECT DISTINCT run, bus FROM errors {where}").fetchall())
    if by_id is None:
        rows |= set(con.execute(f"SELECT DISTINCT run, bus FROM frames {where}").fetchall())
    else:
        rows |= set(by_id.select("run", "bus").unique().iter_rows())
    return sorted((str(r), str(b)) for r, b in rows)


def _sender_codes(catalog: CatalogLike, bus: str, nodes: list[str]) -> pl.DataFrame:
    messages = catalog.messages_frame().filter(pl.col("bus") == bus)
    index = {name: i for i, name in enumerate(nodes)}
    return messages.select(
        pl.col("id").cast(pl.UInt32), pl.col("ext").cast(pl.Boolean), "sender",
        pl.col("sender").replace_strict(index, default=-1, return_dtype=pl.Int16).alias("code"))


#: The nominal bit rate the replay assumes when neither the catalog nor the log's header
#: names one (the result then lists it among its assumptions and `faults` warns).
ASSUMED_BPS = 500_000


def _nominal_bps(con: duckdb.DuckDBPyConnection, catalog: CatalogLike, run: str,
                 bus: str) -> tuple[int, str]:
    """(bit/s, where it came from: "catalog", "manifest" or "assumed")."""
    spec = catalog.buses.get(bus) if hasattr(catalog.buses, "get") else None
    if spec is not None:
        return int(spec.nominal_bps), "catalog"
    logged = _logged_bps(con, run, bus)
    return (logged, "manifest") if logged is not None else (ASSUMED_BPS, "assumed")


def _logged_bps(con: duckdb.DuckDBPyConnection, run: str, bus: str) -> int | None:
    """The nominal bit rate the log's ``%bus`` line declared (manifest ``buses``): the one
    the frames view derives durations with."""
    for (buses,) in con.execute(
            f"SELECT buses FROM manifest WHERE run = {sql_string(run)}").fetchall():
        try:
            for decl in manifest_buses(buses):
                if decl.get("alias") == bus and decl.get("nominal_bps"):
                    return int(decl["nominal_bps"])
        except (ValueError, TypeError, KeyError):
            continue
    return None


def single_pair(con: duckdb.DuckDBPyConnection, run: str | None = None
                ) -> tuple[str, str] | None:
    """(run, bus) when the manifest holds one run with one declared bus, else None."""
    try:
        rows = con.execute("SELECT DISTINCT run, buses FROM manifest").fetchall()
    except duckdb.Error:
        return None
    pairs = set()
    for r, buses in rows:
        try:
            aliases = [b["alias"] for b in manifest_buses(buses)]
        except (ValueError, TypeError, KeyError):
            return None
        if len(aliases) != 1:
            return None
        pairs.add((str(r), str(aliases[0])))
    if len(pairs) != 1 or (run is not None and next(iter(pairs))[0] != run):
        return None
    return next(iter(pairs))


def frames_by_id(con: duckdb.DuckDBPyConnection, run: str | None = None,
                 pair: tuple[str, str] | None = None,
                 parts: PartFiles | None = None) -> pl.DataFrame:
    """One scan: frames, bus time and FD frames per (run, bus, id, ext), sorted (a hash
    aggregate's row order is arbitrary, and hypotheses that tie keep this order).

    ``pair``: the dataset holds this (run, bus) only; the scan then groups by identifier.
    ``parts``: the frames view's part files (one scan, see Dataset.frame_files): a log of
    classic standard frames is then counted from their stored identifiers and bit counts.
    """
    return _frames_by_id(con, run, pair, parts).sort("run", "bus", "id", "ext")


def _frames_by_id(con: duckdb.DuckDBPyConnection, run: str | None = None,
                 pair: tuple[str, str] | None = None,
                 parts: PartFiles | None = None) -> pl.DataFrame:
    """frames_by_id in the scan's order."""
    if pair is not None:
        flags = (parts.any_true("ext"), parts.any_true("fd")) if parts else (None, None)
        if None in flags:
            # EXISTS, not bool_or: the Parquet row groups' min/max statistics let DuckDB
            # skip every row group of a log without extended or FD frames (no scan)
            flags = con.execute("SELECT EXISTS (SELECT 1 FROM frames WHERE ext), "
                                "EXISTS (SELECT 1 FROM frames WHERE fd)").fetchall()[0]
        any_ext, fd_frames = flags
        bps = _logged_bps(con, *pair) if parts and not any_ext and not fd_frames else None
        stored = _stored_by_id(parts, pair, bps) if parts and bps else None
        if stored is not None:
            return stored
        total = con.execute("SELECT count(*) FROM frames").fetchall()[0][0]
        if not any_ext and not fd_frames and total >= SAMPLED_BY_ID_FRAMES:
            # Counts per identifier from a scan of the identifiers alone; the bus time per
            # identifier from a 2 % block sample of durations (frame lengths barely vary
            # per identifier), which spares the scan the derived durations.
            counts = _frame(con, "SELECT id, count(*) AS frames FROM frames GROUP BY id")
            mean = _frame(con, "SELECT id, avg(duration_ns)::DOUBLE AS mean_ns FROM (SELECT "
                          "id, duration_ns FROM frames USING SAMPLE 2 PERCENT (system)) "
                          "GROUP BY id")
            if mean.height == 0:
                mean = _frame(con, "SELECT id, avg(duration_ns)::DOUBLE AS mean_ns "
                              "FROM frames GROUP BY id")
            return _counted_by_id(counts, mean).select(
                pl.lit(pair[0]).alias("run"), pl.lit(pair[1]).alias("bus"),
                pl.col("id").cast(pl.UInt32), pl.lit(False).alias("ext"), "frames",
                "busy_ns", pl.lit(0, pl.Int64).alias("fd_frames"))
        frame = _frame(con, "SELECT id, ext, count(*) AS frames, sum(duration_ns)::BIGINT "
                       "AS busy_ns, count(*) FILTER (WHERE fd) AS fd_frames FROM frames "
                       "GROUP BY ALL")
        return frame.select(pl.lit(pair[0]).alias("run"), pl.lit(pair[1]).alias("bus"),
                            pl.col("id").cast(pl.UInt32), pl.col("ext").cast(pl.Boolean),
                            "frames", "busy_ns", "fd_frames")
    where = f"WHERE run = {sql_string(run)}" if run is not None else ""
    return _frame(con, "SELECT run, bus, id, ext, count(*) AS frames, "
                  "sum(duration_ns)::BIGINT AS busy_ns, count(*) FILTER (WHERE fd) AS fd_frames "
                  f"FROM frames {where} GROUP BY ALL").with_columns(
        pl.col("id").cast(pl.UInt32), pl.col("ext").cast(pl.Boolean))


#: Identifiers a classic standard frame can carry (11 bits).
STANDARD_IDS = 1 << 11


def _stored_by_id(parts: PartFiles, pair: tuple[str, str], nominal_bps: int
                  ) -> pl.DataFrame | None:
    """frames_by_id of a (run, bus) of classic standard frames, exact, from the stored id
    and bits: a frame's time on the bus is its bits at the nominal rate, as the frames view
    derives it (physics.frame_durations_ns, the same float64 steps). None past 2**53 ns of
    bus time per identifier (about 104 days), where float64 sums of whole ns stop being
    exact."""
    frames = np.zeros(STANDARD_IDS, dtype=np.int64)
    busy = np.zeros(STANDARD_IDS, dtype=np.float64)
    ns_of_bits = frame_durations_ns(np.arange(1 << 16), np.zeros(1 << 16, np.int64),
                                    nominal_bps, None).astype(np.float64)
    for table in parts.row_groups(["id", "bits"]):  # a loop over row groups
        ids = np.asarray(_one_chunk(table.column("id")).to_numpy(zero_copy_only=False))
        bits = np.asarray(_one_chunk(table.column("bits")).to_numpy(zero_copy_only=False))
        if ids.size == 0:
            continue
        if int(ids.max()) >= STANDARD_IDS:
            return None  # not a standard identifier after all: the plain query decides
        frames += np.bincount(ids, minlength=STANDARD_IDS)
        busy += np.bincount(ids, weights=ns_of_bits[bits], minlength=STANDARD_IDS)
    if busy.max(initial=0.0) >= 2.0 ** 53:
        return None
    seen = np.flatnonzero(frames)
    return pl.DataFrame({
        "run": pl.Series([pair[0]] * seen.size, dtype=pl.String),
        "bus": pl.Series([pair[1]] * seen.size, dtype=pl.String),
        "id": seen.astype(np.uint32), "ext": np.zeros(seen.size, dtype=bool),
        "frames": frames[seen], "busy_ns": busy[seen].astype(np.int64),
        "fd_frames": np.zeros(seen.size, dtype=np.int64)})


def load_bus_evidence(con: duckdb.DuckDBPyConnection, catalog: CatalogLike, run: str,
                      bus: str, by_id: pl.DataFrame | None = None,
                      only_pair: bool = False,
                      parts: PartFiles | None = None) -> BusEvidence:
    """Read frames, errors, status and losses of one (run, bus) into arrays.

    ``only_pair``: the views hold this (run, bus) only, so the frame scans need no filter.
    ``parts``: the frames view's part files when it reads them in one scan
    (``Dataset.frame_files``); with ``only_pair`` the frame pass reads their stored columns
    directly (store/row_groups.py).
    """
    nodes = list(catalog.nodes_on(bus))
    codes = _sender_codes(catalog, bus, nodes)
    where = f"run = {sql_string(run)} AND bus = {sql_string(bus)}"
    extra = [n for (n,) in con.execute(
        f"SELECT DISTINCT node FROM status WHERE {where} UNION SELECT DISTINCT \"by\" FROM "
        f"errors WHERE {where} AND \"by\" IS NOT NULL ORDER BY 1").fetchall() if n not in nodes]
    nodes += extra
    if by_id is None:
        by_id = frames_by_id(con, run)
    by_id = by_id.filter((pl.col("run") == run) & (pl.col("bus") == bus)).drop("run", "bus")
    by_id = by_id.join(codes.select("id", "ext", "sender", "code"), on=["id", "ext"],
                       how="left")
    scan = f"FROM frames{'' if only_pair else ' WHERE ' + where}"
    any_ext = bool(by_id["ext"].any()) if by_id.height else False
    any_fd = bool(int(by_id["fd_frames"].sum() or 0))
    n_frames = int(by_id["frames"].sum() or 0) if by_id["frames"].null_count() == 0 else \
        int(con.sql(f"SELECT count(*) {scan}").fetchall()[0][0])
    own_sizes = np.zeros(len(nodes), dtype=np.int64)
    busy = np.zeros(len(nodes), dtype=np.float64)
    for code, count, ns in zip(by_id["code"].fill_null(-1).to_list(),
                               by_id["frames"].fill_null(0).to_list(),
                               by_id["busy_ns"].to_list(), strict=True):
        if code >= 0:
            own_sizes[code] += int(count)
            busy[code] += float(ns or 0)
    frames = load_frames(con, scan, codes, len(nodes), any_ext, any_fd, total=n_frames,
                         own_sizes=own_sizes, parts=parts if only_pair else None)
    frame_t, frame_node, own_t = frames.t, frames.node, frames.own
    total = float(by_id["busy_ns"].sum() or 0.0)
    share = busy / total if total > 0 else np.full(len(nodes), 1.0 / max(1, len(nodes)))
    events = _retransmitted(_events(con, where, codes, nodes), frame_t, frame_node)
    losses = con.execute(
        f"SELECT t_ns, until_ns, count FROM losses WHERE {where} ORDER BY t_ns").fetchnumpy()
    loss_arr = np.column_stack([np.asarray(losses["t_ns"], dtype=np.int64),
                                np.asarray(losses["until_ns"], dtype=np.int64)]) \
        if len(losses["t_ns"]) else np.zeros((0, 2), dtype=np.int64)
    ends = [int(frame_t[0]), int(frame_t[-1])] if frame_t.size else []
    if events.height:
        ends += [int(events["t_ns"].min()), int(events["t_ns"].max())]  # type: ignore[arg-type]
    first_t, last_t = (min(ends), max(ends)) if ends else (0, 0)
    bps, source = _nominal_bps(con, catalog, run, bus)
    evidence = BusEvidence(run, bus, nodes, 1e9 / bps, frame_t, frame_node, own_t, frames.esi,
                           frames.esi_set, share, events, loss_arr, first_t, last_t, by_id, con,
                           bit_rate_source=source)
    evidence.loss_counts = [None if c is None or c != c else int(c)
                            for c in np.asarray(losses["count"], dtype=object).tolist()]
    prepare_counts(evidence)
    return evidence


#: Of the memory budget, the share the frame columns of one bus may hold in memory before
#: they spill to the scratch folder (the other parts: DuckDB's half, the interpreter and
#: libraries, the replay's rows and the temporaries of one record batch).
FRAMES_SHARE = 0.25
#: Rows per record batch read from DuckDB.
BATCH_ROWS = 1 << 20


@dataclass
class Frames:
    """One (run, bus)'s frames as the replay keeps them (see tracelab/forensics/framestore)."""

    t: Column
    node: Column
    own: list[Column]
    esi: list[tuple[Column, Column]]
    esi_set: int


def _spill(con: duckdb.DuckDBPyConnection) -> Spill:
    """The allowance of the current memory budget, spilling where DuckDB spills."""
    folder: Path | None = None
    try:
        text = con.sql("SELECT current_setting('temp_directory')").fetchall()[0][0]
        folder = Path(str(text)) if text else None
    except duckdb.Error:
        folder = None
    return Spill(int(current_limits().memory_bytes * FRAMES_SHARE), folder)


#: Bytes a frame takes while the columns of a bus are built in memory: its time and sender,
#: and the per-sender copy of its time: 8 + 2 + 8.
IN_MEMORY_BYTES_PER_FRAME = 18


def load_frames(con: duckdb.DuckDBPyConnection, scan: str, codes: pl.DataFrame, n_nodes: int,
                any_ext: bool, any_fd: bool, total: int | None = None,
                own_sizes: np.ndarray | None = None,
                parts: PartFiles | None = None) -> Frames:
    """One streaming pass over the frames (``SELECT ... {scan}``) in record batches of
    ``BATCH_ROWS``: frame times, senders and per-sender times. When ``total`` frames fit the
    memory allowance they fill arrays of that size (each sender's times its stretch of one
    array, ``own_sizes`` frames long); otherwise they go into columns that spill beyond it.
    Frames out of time order (logs with backward time steps) are read again sorted by time,
    in the view's order at equal times (as a stable sort would). ``parts``: the view's part
    files in its order (one scan, no filter): the in-memory pass reads them directly."""
    cols = "t_ns, id" + (", ext" if any_ext else "") \
        + (", (fd::INT + (fd AND esi)::INT)::TINYINT AS esi" if any_fd else "")
    spill = _spill(con)
    fits = total is not None and \
        total * (IN_MEMORY_BYTES_PER_FRAME + (1 if any_fd else 0)) <= spill.allowance
    queries = [f"SELECT {cols} {scan}",
               f"SELECT {cols} FROM (SELECT *, row_number() OVER () AS _order {scan}) "
               "ORDER BY t_ns, _order"]
    for n, query in enumerate(queries):
        if n == 0 and parts and fits and own_sizes is not None:
            batches = _Batches.stored(parts, codes, any_ext, any_fd, n_nodes)
        else:
            batches = _Batches(con.sql(query).to_arrow_reader(BATCH_ROWS), codes, any_ext,
                               any_fd)
        frames = (_in_memory(batches, n_nodes, int(total or 0), own_sizes)
                  if fits and own_sizes is not None else _streamed(batches, n_nodes, spill))
        if frames is None and batches.ordered:  # counts that did not match: the plain way
            frames = _streamed(_Batches(con.sql(query).to_arrow_reader(BATCH_ROWS), codes,
                                        any_ext, any_fd), n_nodes, spill)
        if frames is not None:
            return frames
    raise AssertionError("frames sorted by time came out of order")  # pragma: no cover


def _one_chunk(column: pa.ChunkedArray) -> pa.Array:
    """The column as one array (combine_chunks copies even a single chunk)."""
    return column.chunk(0) if column.num_chunks == 1 else column.combine_chunks()


def _stored(parts: PartFiles, any_ext: bool, any_fd: bool,
            convert: Callable[[pa.RecordBatch], _Batch]) -> Iterator[_Batch]:
    """The frame pass's columns (t_ns, id, ext, ESI flag: as load_frames' query selects
    them) from the part files' stored columns, one batch per row group, each converted by
    ``convert`` on the reader's threads."""
    columns = ["t_ns", "id"] + (["ext"] if any_ext else []) + (["fd", "esi"] if any_fd else [])

    def batch_of(table: pa.Table) -> _Batch:
        arrays = [_one_chunk(table.column(c)) for c in columns[:3 if any_ext else 2]]
        if any_fd:  # fd::INT + (fd AND esi)::INT
            fd, esi = _one_chunk(table.column("fd")), _one_chunk(table.column("esi"))
            arrays.append(pc.add(pc.cast(fd, pa.int8()), pc.cast(pc.and_(fd, esi), pa.int8())))
        return convert(pa.RecordBatch.from_arrays(arrays,
                                                  names=[str(i) for i in range(len(arrays))]))

    yield from parts.row_groups(columns, then=batch_of)


#: One batch of the frame pass: times, sender codes, ESI flags (FD logs) and, when it was
#: split on a reader thread, each sender's times.
_Batch = tuple[np.ndarray, np.ndarray, np.ndarray | None, list[np.ndarray] | None]


class _Batches:
    """The record batches of one frames query as (t_ns, sender, ESI flag or None, each
    sender's times or None) arrays; ``ordered`` turns False (and the iteration stops) at the
    first frame earlier than the one before it. ``split``: nodes to split each batch into
    where it is converted (a reader thread of the stored path), 0 for none."""

    def __init__(self, reader: Iterable[pa.RecordBatch | _Batch], codes: pl.DataFrame,
                 any_ext: bool, any_fd: bool, split: int = 0) -> None:
        self.reader = reader
        self.mapper = _KeyMap(codes, any_ext)
        self.any_ext, self.any_fd = any_ext, any_fd
        self.split = split
        self.ordered = True
        self.esi_set = 0

    @classmethod
    def stored(cls, parts: PartFiles, codes: pl.DataFrame, any_ext: bool, any_fd: bool,
               n_nodes: int) -> _Batches:
        """The batches of the part files' stored columns; the reader threads also map and
        split each one (numpy releases the GIL)."""
        batches = cls((), codes, any_ext, any_fd, split=n_nodes)
        batches.reader = _stored(parts, any_ext, any_fd, batches.convert)
        return batches

    def convert(self, batch: pa.RecordBatch) -> _Batch:
        """A record batch as arrays (reads nothing shared but the lookup table)."""
        t = np.asarray(batch.column(0).to_numpy(), dtype=np.int64)
        ids = batch.column(1).to_numpy()
        keys = ids.astype(np.int64) * 2 + batch.column(2).to_numpy(zero_copy_only=False) \
            if self.any_ext else ids
        flag = None
        if self.any_fd:
            flag = np.asarray(batch.column(batch.num_columns - 1).to_numpy(
                zero_copy_only=False), dtype=np.int8)
        node = self.mapper(keys)
        return t, node, flag, _split_by_node(t, node, self.split) if self.split else None

    def __iter__(self) -> Iterator[_Batch]:
        last = None
        for item in self.reader:  # a loop over record batches
            t, node, flag, own = item if isinstance(item, tuple) else self.convert(item)
            if t.size == 0:
                continue
            if (last is not None and int(t[0]) < last) or bool(np.any(t[1:] < t[:-1])):
                self.ordered = False
                return
            last = int(t[-1])
            if flag is not None:
                self.esi_set += int(np.count_nonzero(flag == 2))
            yield t, node, flag, own


def _esi_columns(t: np.ndarray, node: np.ndarray, flag: np.ndarray, n_nodes: int
                 ) -> list[tuple[np.ndarray, np.ndarray]]:
    """Per node (and last: no catalog sender), the times of its FD frames with ESI set, clear."""
    out = []
    for n in range(n_nodes + 1):  # a loop over nodes
        mine = node == n if n < n_nodes else node < 0
        out.append((t[mine & (flag == 2)], t[mine & (flag == 1)]))
    return out


def _in_memory(batches: _Batches, n_nodes: int, total: int,
               own_sizes: np.ndarray) -> Frames | None:
    """The pass into arrays of ``total`` frames; each sender's times go straight into its
    stretch of one array (its size known from the counts per identifier), batch by batch
    while the batch is in cache. None when the frames do not match the counts."""
    t = np.empty(total, dtype=np.int64)
    node = np.empty(total, dtype=np.int16)
    flags = np.empty(total, dtype=np.int8) if batches.any_fd else None
    ends = np.cumsum(own_sizes)
    own_all = np.empty(int(ends[-1]) if ends.size else 0, dtype=np.int64)
    filled = (ends - own_sizes).tolist()
    at = 0
    for bt, bn, bf, split in batches:
        if at + bt.size > total:
            return None  # more frames than counted: let the caller read again
        t[at:at + bt.size] = bt
        node[at:at + bt.size] = bn
        if flags is not None and bf is not None:
            flags[at:at + bt.size] = bf
        at += bt.size
        counts = _split_into(bt, bn, n_nodes, own_all, filled, ends) if split is None else \
            _place(split, own_all, filled, ends)
        for n, k in enumerate(counts):
            if k < 0:
                return None
            filled[n] += k
    if not batches.ordered or at != total or filled != ends.tolist():
        return None
    starts = ends - own_sizes
    own = [Column.of(own_all[a:z]) for a, z in zip(starts.tolist(), ends.tolist(), strict=True)]
    esi = [(Column.of(a), Column.of(b)) for a, b in _esi_columns(t, node, flags, n_nodes)] \
        if flags is not None else []
    return Frames(Column.of(t), Column.of(node), own, esi, batches.esi_set)


def _streamed(batches: _Batches, n_nodes: int, spill: Spill) -> Frames | None:
    """The pass into columns that spill beyond the allowance (sender by sender per batch)."""
    t_col, node_col = Column(np.int64, spill), Column(np.int16, spill)
    own = [Column(np.int64, spill) for _ in range(n_nodes)]
    esi = [(Column(np.int64, spill), Column(np.int64, spill))
           for _ in range(n_nodes + 1 if batches.any_fd else 0)]
    for t, node, flag, _ in batches:
        t_col.append(t)
        node_col.append(node)
        for n, times in enumerate(_split_by_node(t, node, n_nodes)):
            own[n].append(times)
        if flag is not None:
            for (on, off), (a, b) in zip(esi, _esi_columns(t, node, flag, n_nodes),
                                         strict=True):
                on.append(a)
                off.append(b)
    if not batches.ordered:
        return None
    return Frames(t_col.finish(), node_col.finish(), [c.finish() for c in own],
                  [(a.finish(), b.finish()) for a, b in esi], batches.esi_set)


def _counted_by_id(counts: pl.DataFrame, sampled: pl.DataFrame) -> pl.DataFrame:
    """frames and busy_ns per identifier from the counts and the sampled mean durations (an
    identifier the sample missed takes the mean over the sampled identifiers)."""
    overall = float(np.mean(sampled["mean_ns"].to_numpy())) if sampled.height else 0.0
    return counts.join(sampled, on="id", how="left").with_columns(
        pl.col("frames").cast(pl.Int64),
        (pl.col("frames") * pl.col("mean_ns").fill_null(overall)).round().cast(pl.Int64)
        .alias("busy_ns")).drop("mean_ns")


def _split_by_node(frame_t: np.ndarray, frame_node: np.ndarray, n: int,
                   sort: bool = False) -> list[np.ndarray]:
    """Per node, its frame times (sorted): a compress per node for a few nodes, else (or
    with ``sort``) one stable radix sort of the 16-bit codes (cheaper than many passes over
    a long array; the per-node times are then views of one array)."""
    if n <= 8 and not sort:
        return [np.compress(frame_node == i, frame_t) for i in range(n)]
    order = np.argsort(frame_node, kind="stable")
    grouped = frame_t[order]
    bounds = np.searchsorted(frame_node[order], np.arange(-1, n + 1, dtype=np.int16),
                             side="left")
    return [grouped[bounds[i + 1]:bounds[i + 2]] for i in range(n)]


def _place(parts: list[np.ndarray], into: np.ndarray, at: list[int], ends: np.ndarray
           ) -> list[int]:
    """Each node's times of one batch (already split) copied to into[at[i]:]; per node the
    number copied, -1 when they would not fit."""
    if any(at[i] + part.size > ends[i] for i, part in enumerate(parts)):
        return [-1] * len(parts)
    for i, part in enumerate(parts):  # a loop over nodes
        into[at[i]:at[i] + part.size] = part
    return [int(part.size) for part in parts]


def _split_into(frame_t: np.ndarray, frame_node: np.ndarray, n: int, into: np.ndarray,
                at: list[int], ends: np.ndarray) -> list[int]:
    """_split_by_node written into ``into``: node i's times at at[i] (not past ends[i]);
    per node the number written, -1 when they would not fit."""
    if n > 8:
        return _place(_split_by_node(frame_t, frame_node, n), into, at, ends)
    out = []
    for i in range(n):  # a loop over a few nodes
        mask = frame_node == i
        k = int(np.count_nonzero(mask))
        if at[i] + k > ends[i]:
            return [-1] * n
        if k:
            np.compress(mask, frame_t, out=into[at[i]:at[i] + k])
        out.append(k)
    return out


class _KeyMap:
    """Sender index per frame from the key (id * 2 + ext, or the id alone when no frame is
    extended), vectorised: a lookup table for small keys, else a sorted-key search."""

    def __init__(self, codes: pl.DataFrame, with_ext: bool = True) -> None:
        if with_ext:
            cat_keys = (codes["id"].cast(pl.Int64) * 2 + codes["ext"].cast(pl.Int64)).to_numpy()
            cat_codes = codes["code"].to_numpy().astype(np.int16)
        else:
            std = codes.filter(~pl.col("ext"))
            cat_keys = std["id"].cast(pl.Int64).to_numpy()
            cat_codes = std["code"].to_numpy().astype(np.int16)
        order = np.argsort(cat_keys)
        self.keys, self.codes = cat_keys[order], cat_codes[order]
        self.table: np.ndarray | None = None
        if self.keys.size and int(self.keys.max()) < 4096:
            self.table = np.full(4096, -1, dtype=np.int16)
            self.table[self.keys] = self.codes

    def __call__(self, keys: np.ndarray) -> np.ndarray:
        if self.keys.size == 0 or keys.size == 0:
            return np.full(keys.size, -1, dtype=np.int16)
        if self.table is not None and int(keys.max()) < 4096:
            return np.take(self.table, keys)  # faster than indexing with an array
        pos = np.minimum(np.searchsorted(self.keys, keys), self.keys.size - 1)
        found = self.keys[pos] == keys
        return np.where(found, self.codes[pos], np.int16(-1)).astype(np.int16)


def _map_keys(keys: np.ndarray, codes: pl.DataFrame, with_ext: bool = True) -> np.ndarray:
    """Sender index per frame from its key (see _KeyMap)."""
    return _KeyMap(codes, with_ext)(keys)


def _events(con: duckdb.DuckDBPyConnection, where: str, codes: pl.DataFrame,
            nodes: list[str]) -> pl.DataFrame:
    """Error and status records in time order with transmitter / first-detector indices."""
    index = {name: i for i, name in enumerate(nodes)}
    errors = _frame(con, f"SELECT t_ns, type, field, id, ext, \"by\", file, line FROM errors "
                         f"WHERE {where}")
    errors = errors.with_columns(pl.col("id").cast(pl.UInt32),
                                 pl.col("ext").cast(pl.Boolean).fill_null(False)).join(
        codes.select("id", "ext", pl.col("code").alias("tx")), on=["id", "ext"], how="left")
    errors = errors.select(
        "t_ns", pl.lit(KIND_ERROR, pl.Int8).alias("kind"), "type", "field", "id", "ext",
        pl.col("tx").fill_null(-1).cast(pl.Int16),
        pl.col("by").replace_strict(index, default=None, return_dtype=pl.Int16).alias("by_node")
        .fill_null(-1), "by",
        pl.lit(-1, pl.Int16).alias("node"), pl.lit(None, pl.Int32).alias("tec"),
        pl.lit(None, pl.Int32).alias("rec"), "file", "line")
    status = _frame(con, f"SELECT t_ns, node, tec, rec, file, line FROM status WHERE {where}")
    status = status.select(
        "t_ns", pl.lit(KIND_STATUS, pl.Int8).alias("kind"), pl.lit(None, pl.String).alias("type"),
        pl.lit(None, pl.String).alias("field"), pl.lit(None, pl.UInt32).alias("id"),
        pl.lit(None, pl.Boolean).alias("ext"), pl.lit(-1, pl.Int16).alias("tx"),
        pl.lit(-1, pl.Int16).alias("by_node"), pl.lit(None, pl.String).alias("by"),
        pl.col("node").replace_strict(index, default=-1, return_dtype=pl.Int16),
        pl.col("tec").cast(pl.Int32), pl.col("rec").cast(pl.Int32), "file", "line")
    return pl.concat([errors, status]).sort(["t_ns", "file", "line"], nulls_last=True)


def _retransmitted(events: pl.DataFrame, frame_t: Column,
                   frame_node: Column) -> pl.DataFrame:
    """Errors whose frame the logger could not tell (``id`` ``-``: the flag came inside the
    identifier) get as transmitter the sender of what next appears on the bus, a frame or an
    error record that names its frame: a transmitter retransmits a destroyed frame at the
    next bus idle (ISO 11898-1, automatic retransmission) and, having won arbitration once,
    normally wins it again. Under a fault the retransmission often fails too, so the next
    frame in the log can be someone else's, sent after the retransmissions' error frames."""
    kind = events["kind"].to_numpy()
    named = events["id"].is_not_null().to_numpy()
    blind = (kind == KIND_ERROR) & ~named
    if not blind.any() or frame_t.size == 0:
        return events.with_columns(pl.lit(False).alias("tx_inferred"))
    t = events["t_ns"].to_numpy().astype(np.int64)
    tx_now = events["tx"].to_numpy().astype(np.int16)
    i = frame_t.searchsorted(t, side="right")
    frame_at = np.where(i < frame_t.size, frame_t[np.minimum(i, frame_t.size - 1)],
                        np.iinfo(np.int64).max)
    nxt = np.where(i < frame_t.size, frame_node[np.minimum(i, frame_t.size - 1)], -1)
    told = np.flatnonzero((kind == KIND_ERROR) & named)  # error records naming their frame
    if told.size:
        j = np.searchsorted(told, np.arange(t.size), side="right")
        k = told[np.minimum(j, told.size - 1)]
        first = (j < told.size) & (t[k] < frame_at)
        nxt = np.where(first, tx_now[k], nxt)
    tx = np.where(blind, nxt, tx_now).astype(np.int16)
    return events.with_columns(pl.Series("tx", tx, dtype=pl.Int16),
                               pl.Series("tx_inferred", blind & (nxt >= 0)))


def prepare_counts(ev: BusEvidence) -> None:
    """Cumulative frame counts (all, and per sender) before every event: the vectorised part."""
    t = ev.events["t_ns"].to_numpy().astype(np.int64)
    ev.ev_t = t.tolist()
    ev.ev_frames_before = ev.frame_t.searchsorted(t, side="left").tolist()
    ev.ev_own_before = [own.searchsorted(t, side="left").tolist() for own in ev.own_t]
    if ev.losses.shape[0] and t.size:
        starts = ev.losses[:, 0]
        upto = np.searchsorted(starts, t, side="right")
        prev = np.concatenate([[0], upto[:-1]])
        ev.ev_loss_since_prev = (upto > prev).tolist()
    else:
        ev.ev_loss_since_prev = [False] * t.size


#: The file name of error events the replay adds (predicted, not logged).
PREDICTED = "(predicted)"


def with_extra_errors(ev: BusEvidence, t_ns: list[int], tx: int | list[int], error_type: str,
                      frame_id: int | None, field: str = "ack") -> BusEvidence:
    """A copy of the evidence with predicted (unlogged) error events added, counts redone."""
    txs = tx if isinstance(tx, list) else [tx] * len(t_ns)
    extra = pl.DataFrame({
        "t_ns": t_ns, "kind": [KIND_ERROR] * len(t_ns), "type": [error_type] * len(t_ns),
        "field": [field] * len(t_ns), "id": [frame_id] * len(t_ns),
        "ext": [False] * len(t_ns), "tx": txs, "by_node": [-1] * len(t_ns),
        "by": [None] * len(t_ns), "node": [-1] * len(t_ns), "tec": [None] * len(t_ns),
        "rec": [None] * len(t_ns), "file": [PREDICTED] * len(t_ns),
        "line": [None] * len(t_ns), "tx_inferred": [False] * len(t_ns)},
        schema=ev.events.schema)
    events = pl.concat([ev.events, extra]).sort(["t_ns", "file", "line"], nulls_last=True)
    copy = dataclasses.replace(ev, events=events, _recovery_cache={})
    prepare_counts(copy)
    return copy




def evidence_window(ev: BusEvidence, t_from: int | None, t_to: int | None) -> BusEvidence:
    """A copy holding only frames and records in [t_from, t_to) (for per-window findings)."""
    lo = ev.first_t_ns if t_from is None else t_from
    hi = ev.last_t_ns + 1 if t_to is None else t_to
    i, j = (int(x) for x in ev.frame_t.searchsorted(np.array([lo, hi]), side="left"))
    events = ev.events.filter((pl.col("t_ns") >= lo) & (pl.col("t_ns") < hi))
    keep = (ev.losses[:, 0] < hi) & (ev.losses[:, 1] > lo) if ev.losses.shape[0] else \
        np.zeros(0, dtype=bool)
    counts = [c for c, k in zip(ev.loss_counts or [None] * ev.losses.shape[0], keep.tolist(),
                                strict=True) if k]
    def cut(col: Column) -> Column:
        return col[col.searchsorted(lo, side="left"):col.searchsorted(hi, side="left")]

    own_t = [cut(own) for own in ev.own_t]
    esi_t = [(cut(on), cut(off)) for on, off in ev.esi_t]
    copy = dataclasses.replace(
        ev, frame_t=ev.frame_t[i:j], frame_node=ev.frame_node[i:j], own_t=own_t, esi_t=esi_t,
        esi_set_frames=sum(on.size for on, _ in esi_t), events=events, losses=ev.losses[keep], loss_counts=counts,
        first_t_ns=lo, last_t_ns=max(lo, hi - 1), _recovery_cache={})
    prepare_counts(copy)
    return copy


#: Error frames whose flag is measured: the first this many of the log.
FLAG_SAMPLE = 400
#: Bits from an error record (flag start) to the next frame's start on a busy bus: flag, 8-bit
#: delimiter, 3-bit intermission. 6-bit flag (everyone detected at once) -> 17; superposed
#: 12-bit flag (one node detected first, the others answered its flag) -> 23.
SHORT_FLAG_GAP_BITS = (14.0, 20.0)
LONG_FLAG_GAP_BITS = (20.0, 29.0)


def flag_lengths(ev: BusEvidence) -> tuple[int, int]:
    """(short, long): how many sampled error frames were followed by the next frame's start
    after a 6-bit flag (17 bits) or after a superposed flag (23 bits) on a busy bus.

    One query over the few frames right after the sampled errors (their start_ns).
    """
    errors = ev.events.filter((pl.col("kind") == KIND_ERROR) & (pl.col("file") != PREDICTED))
    if ev.con is None or errors.height < 3 or ev.frame_t.size == 0:
        return 0, 0
    # the first FLAG_SAMPLE errors: one narrow time range, so the frame scan below reads only
    # the row groups that range touches (Parquet min/max statistics)
    t = errors["t_ns"].to_numpy().astype(np.int64)[:FLAG_SAMPLE]
    i = ev.frame_t.searchsorted(t, side="right")
    ok = i < ev.frame_t.size
    t, nxt = t[ok], ev.frame_t[i[ok]]
    if t.size == 0:
        return 0, 0
    probe = pl.DataFrame({"t_err": t, "t_next": nxt})
    ev.con.register("_tl_flag_probe", probe.to_arrow())
    try:
        rows = ev.con.execute(
            "SELECT p.t_err, min(f.start_ns) AS start_ns FROM _tl_flag_probe p JOIN frames f "
            "ON f.t_ns = p.t_next WHERE f.run = ? AND f.bus = ? AND f.t_ns BETWEEN ? AND ? "
            "GROUP BY p.t_err", [ev.run, ev.bus, int(nxt.min()), int(nxt.max())]).fetchnumpy()
    finally:
        ev.con.unregister("_tl_flag_probe")
    gap = (np.asarray(rows["start_ns"], dtype=np.float64)
           - np.asarray(rows["t_err"], dtype=np.float64)) / ev.bit_ns
    short = int(np.sum((gap >= SHORT_FLAG_GAP_BITS[0]) & (gap < SHORT_FLAG_GAP_BITS[1])))
    long_ = int(np.sum((gap >= LONG_FLAG_GAP_BITS[0]) & (gap < LONG_FLAG_GAP_BITS[1])))
    return short, long_
