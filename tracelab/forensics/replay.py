"""Event-driven replay of ISO 11898-1 fault-confinement counters from a bus log.

Counters only jump at error events. Between two events a node's TEC falls by its successful
transmissions and its REC by its successful receptions; both counts come from cumulative
frame counts per sender (``np.searchsorted`` over the time-sorted frame times), so the Python
loop runs over error and status events only, never over frames. The times of downward state
changes (error-passive -> warning -> error-active) and of bus-off recovery come from the same
sorted times.

A node's counters depend only on the events and on who detected each error first. The log
names the first detector only when an error record carries ``by``; otherwise the replay is
run twice per node: without the rule-b bonus (the node is never assumed to be first) and with
it (the node is assumed first detector of every unattributed error it received while it could
still send an active error flag). The hypotheses module picks between them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Protocol

import duckdb
import numpy as np
import polars as pl

from tracelab.physics.confinement import (
    DEFAULT_CONFIG,
    FIRST_DETECTOR_EXTRA_REC,
    PASSIVE_LIMIT,
    RECEIVE_ERROR_REC,
    RECOVERY_SEQUENCE_BITS,
    RECOVERY_SEQUENCES,
    STATE_RANK,
    TRANSMIT_ERROR_TEC,
    ConfinementConfig,
    NodeCounters,
    State,
    state_of,
)
from tracelab.store.schema import manifest_buses

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
    frame_t: np.ndarray        # int64, time-sorted t_ns of every frame
    frame_node: np.ndarray     # int16 node index of the sender, -1 when the catalog has none
    frame_esi: np.ndarray      # int8: 0 classic, 1 FD with ESI clear, 2 FD with ESI set
    own_t: list[np.ndarray]    # per node, the t_ns of its frames
    share: np.ndarray          # per node, its share of bus time (duration_ns) over the run
    events: pl.DataFrame       # error and status records in time order, see _events()
    losses: np.ndarray         # (k, 2) int64 [t_ns, until_ns) logger-loss intervals
    first_t_ns: int
    last_t_ns: int
    frames_by_id: pl.DataFrame  # id, ext, sender, frames, busy_ns
    con: duckdb.DuckDBPyConnection | None = None
    _recovery_cache: dict[tuple[int, int], int] = field(default_factory=dict)
    # per-event cumulative counts (filled by prepare_counts)
    ev_t: list[int] = field(default_factory=list)
    ev_frames_before: list[int] = field(default_factory=list)
    ev_own_before: list[list[int]] = field(default_factory=list)
    ev_loss_since_prev: list[bool] = field(default_factory=list)

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


def _sql(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def _frame(con: duckdb.DuckDBPyConnection, query: str) -> pl.DataFrame:
    return con.sql(query).pl()


def run_buses(con: duckdb.DuckDBPyConnection, run: str | None = None,
              by_id: pl.DataFrame | None = None) -> list[tuple[str, str]]:
    """(run, bus) pairs that have any frames or errors, sorted."""
    where = f"WHERE run = {_sql(run)}" if run is not None else ""
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


def _nominal_bps(con: duckdb.DuckDBPyConnection, catalog: CatalogLike, run: str,
                 bus: str) -> int:
    spec = catalog.buses.get(bus) if hasattr(catalog.buses, "get") else None
    if spec is not None:
        return int(spec.nominal_bps)
    for (buses,) in con.execute(
            f"SELECT buses FROM manifest WHERE run = {_sql(run)}").fetchall():
        try:
            for decl in manifest_buses(buses):
                if decl.get("alias") == bus:
                    return int(decl["nominal_bps"])
        except (ValueError, TypeError, KeyError):
            continue
    return 500_000


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
                 pair: tuple[str, str] | None = None) -> pl.DataFrame:
    """One scan: frames, bus time and FD frames per (run, bus, id, ext).

    ``pair``: the dataset holds this (run, bus) only; the scan then groups by identifier.
    """
    if pair is not None:
        any_ext, fd_frames, total = con.execute(
            "SELECT coalesce(bool_or(ext), false), count(*) FILTER (WHERE fd), count(*) "
            "FROM frames").fetchall()[0]
        if not any_ext and not fd_frames and total >= SAMPLED_BY_ID_FRAMES:
            # Counts per identifier come from the identifier array the replay reads anyway
            # (load_bus_evidence); the bus time per identifier from a 2 % block sample of
            # durations (frame lengths barely vary per identifier).
            mean = _frame(con, "SELECT id, avg(duration_ns)::DOUBLE AS mean_ns FROM (SELECT "
                          "id, duration_ns FROM frames USING SAMPLE 2 PERCENT (system)) "
                          "GROUP BY id")
            if mean.height == 0:
                mean = _frame(con, "SELECT id, avg(duration_ns)::DOUBLE AS mean_ns "
                              "FROM frames GROUP BY id")
            return mean.select(pl.lit(pair[0]).alias("run"), pl.lit(pair[1]).alias("bus"),
                               pl.col("id").cast(pl.UInt32), pl.lit(False).alias("ext"),
                               pl.lit(None, pl.Int64).alias("frames"),
                               pl.lit(None, pl.Int64).alias("busy_ns"),
                               pl.lit(0, pl.Int64).alias("fd_frames"), "mean_ns")
        frame = _frame(con, "SELECT id, ext, count(*) AS frames, sum(duration_ns)::BIGINT "
                       "AS busy_ns, count(*) FILTER (WHERE fd) AS fd_frames FROM frames "
                       "GROUP BY ALL")
        return frame.select(pl.lit(pair[0]).alias("run"), pl.lit(pair[1]).alias("bus"),
                            pl.col("id").cast(pl.UInt32), pl.col("ext").cast(pl.Boolean),
                            "frames", "busy_ns", "fd_frames")
    where = f"WHERE run = {_sql(run)}" if run is not None else ""
    return _frame(con, "SELECT run, bus, id, ext, count(*) AS frames, "
                  "sum(duration_ns)::BIGINT AS busy_ns, count(*) FILTER (WHERE fd) AS fd_frames "
                  f"FROM frames {where} GROUP BY ALL").with_columns(
        pl.col("id").cast(pl.UInt32), pl.col("ext").cast(pl.Boolean))


def load_bus_evidence(con: duckdb.DuckDBPyConnection, catalog: CatalogLike, run: str,
                      bus: str, by_id: pl.DataFrame | None = None,
                      only_pair: bool = False) -> BusEvidence:
    """Read frames, errors, status and losses of one (run, bus) into arrays.

    ``only_pair``: the views hold this (run, bus) only, so the frame scans need no filter.
    """
    nodes = list(catalog.nodes_on(bus))
    codes = _sender_codes(catalog, bus, nodes)
    where = f"run = {_sql(run)} AND bus = {_sql(bus)}"
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
    # Column by column: DuckDB hands each over as one numpy array (the cheapest transfer).
    frame_t = np.asarray(con.sql(f"SELECT t_ns {scan}").fetchnumpy()["t_ns"], np.int64)
    ids = np.asarray(con.sql(f"SELECT id {scan}").fetchnumpy()["id"])
    any_ext = bool(by_id["ext"].any()) if by_id.height else False
    if any_ext:
        ext = np.asarray(con.sql(f"SELECT ext {scan}").fetchnumpy()["ext"], bool)
        keys = ids.astype(np.int64) * 2 + ext
    else:
        keys = ids  # standard identifiers only: the key is the identifier
    if int(by_id["fd_frames"].sum() or 0):
        flags = con.sql(f"SELECT (fd::INT + (fd AND esi)::INT)::TINYINT AS esi {scan}")
        esi = np.asarray(flags.fetchnumpy()["esi"], np.int8)
    else:
        esi = np.zeros(frame_t.size, np.int8)
    if frame_t.size > 1 and bool(np.any(frame_t[1:] < frame_t[:-1])):
        order = np.argsort(frame_t, kind="stable")  # rare: logs with backward time steps
        frame_t, keys, esi = frame_t[order], keys[order], esi[order]
    if "mean_ns" in by_id.columns:
        by_id = _counted_by_id(ids, by_id, codes)
    frame_node = _map_keys(keys, codes, with_ext=any_ext)
    own_t = _split_by_node(frame_t, frame_node, len(nodes))
    busy = np.zeros(len(nodes), dtype=np.float64)
    for code, ns in zip(by_id["code"].fill_null(-1).to_list(), by_id["busy_ns"].to_list(),
                        strict=True):
        if code >= 0:
            busy[code] += float(ns or 0)
    total = float(by_id["busy_ns"].sum() or 0.0)
    share = busy / total if total > 0 else np.full(len(nodes), 1.0 / max(1, len(nodes)))
    events = _events(con, where, codes, nodes)
    losses = con.execute(
        f"SELECT t_ns, until_ns FROM losses WHERE {where} ORDER BY t_ns").fetchnumpy()
    loss_arr = np.column_stack([np.asarray(losses["t_ns"], dtype=np.int64),
                                np.asarray(losses["until_ns"], dtype=np.int64)]) \
        if len(losses["t_ns"]) else np.zeros((0, 2), dtype=np.int64)
    ends = [int(frame_t[0]), int(frame_t[-1])] if frame_t.size else []
    if events.height:
        ends += [int(events["t_ns"].min()), int(events["t_ns"].max())]  # type: ignore[arg-type]
    first_t, last_t = (min(ends), max(ends)) if ends else (0, 0)
    evidence = BusEvidence(run, bus, nodes, 1e9 / _nominal_bps(con, catalog, run, bus),
                           frame_t, frame_node, esi, own_t, share, events, loss_arr, first_t,
                           last_t, by_id, con)
    prepare_counts(evidence)
    return evidence


def _counted_by_id(ids: np.ndarray, sampled: pl.DataFrame, codes: pl.DataFrame
                   ) -> pl.DataFrame:
    """frames and busy_ns per identifier from the identifier array and sampled durations."""
    if ids.size == 0:
        values = counts = np.zeros(0, dtype=np.int64)
    elif int(ids.max()) >= 1 << 16:
        values, counts = np.unique(ids, return_counts=True)
    else:
        values, counts = _bincount_ids(ids)
    overall = float(np.mean(sampled["mean_ns"].to_numpy())) if sampled.height else 0.0
    mean = dict(zip(sampled["id"].to_list(), sampled["mean_ns"].to_list(), strict=True))
    frame = pl.DataFrame({
        "id": values.astype(np.uint32), "ext": np.zeros(values.size, bool),
        "frames": counts.astype(np.int64),
        "busy_ns": np.round(counts * np.array([mean.get(int(v), overall) for v in values],
                                              dtype=np.float64)).astype(np.int64),
        "fd_frames": np.zeros(values.size, np.int64)})
    return frame.join(codes.select("id", "ext", "sender", "code"), on=["id", "ext"], how="left")


def _bincount_ids(ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    counts = np.bincount(ids)
    values = np.flatnonzero(counts)
    return values, counts[values]


def _split_by_node(frame_t: np.ndarray, frame_node: np.ndarray, n: int) -> list[np.ndarray]:
    """Per node, its frame times (sorted): a compress per node for a few nodes, else one
    stable radix sort of the 16-bit codes (cheaper than many passes)."""
    if n <= 8:
        return [np.compress(frame_node == i, frame_t) for i in range(n)]
    order = np.argsort(frame_node, kind="stable")
    grouped = frame_t[order]
    bounds = np.searchsorted(frame_node[order], np.arange(-1, n + 1, dtype=np.int16),
                             side="left")
    return [grouped[bounds[i + 1]:bounds[i + 2]] for i in range(n)]


def _map_keys(keys: np.ndarray, codes: pl.DataFrame, with_ext: bool = True) -> np.ndarray:
    """Sender index per frame from the key (id * 2 + ext, or the id alone when no frame is
    extended), vectorised: a lookup table for small keys, else a sorted-key search."""
    if with_ext:
        cat_keys = (codes["id"].cast(pl.Int64) * 2 + codes["ext"].cast(pl.Int64)).to_numpy()
        cat_codes = codes["code"].to_numpy().astype(np.int16)
    else:
        std = codes.filter(~pl.col("ext"))
        cat_keys = std["id"].cast(pl.Int64).to_numpy()
        cat_codes = std["code"].to_numpy().astype(np.int16)
    if cat_keys.size == 0 or keys.size == 0:
        return np.full(keys.size, -1, dtype=np.int16)
    if int(keys.max()) < 4096 and int(cat_keys.max()) < 4096:
        table = np.full(4096, -1, dtype=np.int16)
        table[cat_keys] = cat_codes
        return table[keys]
    order = np.argsort(cat_keys)
    cat_keys, cat_codes = cat_keys[order], cat_codes[order]
    pos = np.searchsorted(cat_keys, keys)
    pos = np.minimum(pos, cat_keys.size - 1)
    found = cat_keys[pos] == keys
    return np.where(found, cat_codes[pos], np.int16(-1)).astype(np.int16)


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


def prepare_counts(ev: BusEvidence) -> None:
    """Cumulative frame counts (all, and per sender) before every event: the vectorised part."""
    t = ev.events["t_ns"].to_numpy().astype(np.int64)
    ev.ev_t = t.tolist()
    ev.ev_frames_before = np.searchsorted(ev.frame_t, t, side="left").tolist()
    ev.ev_own_before = [np.searchsorted(own, t, side="left").tolist() for own in ev.own_t]
    if ev.losses.shape[0] and t.size:
        starts = ev.losses[:, 0]
        upto = np.searchsorted(starts, t, side="right")
        prev = np.concatenate([[0], upto[:-1]])
        ev.ev_loss_since_prev = (upto > prev).tolist()
    else:
        ev.ev_loss_since_prev = [False] * t.size


def with_extra_errors(ev: BusEvidence, t_ns: list[int], tx: int, error_type: str,
                      frame_id: int | None) -> BusEvidence:
    """A copy of the evidence with predicted (unlogged) error events added, counts redone."""
    import dataclasses

    extra = pl.DataFrame({
        "t_ns": t_ns, "kind": [KIND_ERROR] * len(t_ns), "type": [error_type] * len(t_ns),
        "field": ["ack"] * len(t_ns), "id": [frame_id] * len(t_ns),
        "ext": [False] * len(t_ns), "tx": [tx] * len(t_ns), "by_node": [-1] * len(t_ns),
        "by": [None] * len(t_ns), "node": [-1] * len(t_ns), "tec": [None] * len(t_ns),
        "rec": [None] * len(t_ns), "file": ["(predicted)"] * len(t_ns),
        "line": [None] * len(t_ns)}, schema=ev.events.schema)
    events = pl.concat([ev.events, extra]).sort(["t_ns", "file", "line"], nulls_last=True)
    copy = dataclasses.replace(ev, events=events, _recovery_cache={})
    prepare_counts(copy)
    return copy


# --- helpers over the sorted times (called for rare events only) ----------------------


def nth_own_after(ev: BusEvidence, node: int, own_start: int, n: int) -> int | None:
    """t_ns of the n-th frame (1-based) sent by ``node`` at index >= own_start, or None."""
    own = ev.own_t[node]
    i = own_start + n - 1
    return int(own[i]) if i < own.size else None


def nth_reception_after(ev: BusEvidence, node: int, frame_start: int, own_start: int,
                        n: int) -> int | None:
    """t_ns of the n-th frame (1-based) not sent by ``node``, from global index frame_start."""
    own = ev.own_t[node]
    m = frame_start + n - 1
    while m < ev.frame_t.size:
        own_in = int(np.searchsorted(own, ev.frame_t[m], side="right")) - own_start
        received = (m - frame_start + 1) - own_in
        if received >= n:
            return int(ev.frame_t[m])
        m += n - received
    return None


#: Error flag bits: a first detector's flag superposed with everybody else's (12), or a lone
#: transmitter's flag on an ACK error (6); then error delimiter (8) and intermission (3).
ERROR_FLAG_BITS = {"ack": 6}
SUPERPOSED_FLAG_BITS = 12
ERROR_TAIL_BITS = 11
#: Where in a frame an error in this field is flagged, as a fraction of the frame (rough
#: midpoints of each field in an 8-byte classic frame; 1.0 = just before the ACK delimiter).
FIELD_POSITION = {"sof": 0.0, "arbitration": 0.12, "control": 0.25, "data": 0.5, "crc": 0.85,
                  "ack": 1.0, "eof": 1.0, "interframe": 1.0, "unknown": 0.5}


def _busy_intervals(ev: BusEvidence, t_from: int, t_to: int) -> tuple[np.ndarray, np.ndarray]:
    """Bus-occupied [start, end) intervals from t_from on: frames and error frames.

    An error frame ends 12 (6 for ACK errors) + 8 + 3 bit times after its record's t_ns; it
    started at the previous interval's end at the earliest, and a frame time before its flag
    at the latest (ACK and CRC errors: right before the ACK slot).
    """
    starts = ends = np.zeros(0, dtype=np.int64)
    if ev.con is not None:
        rows = ev.con.execute(
            f"SELECT start_ns, end_ns FROM frames WHERE run = {_sql(ev.run)} AND bus = "
            f"{_sql(ev.bus)} AND t_ns >= {t_from} AND t_ns <= {t_to} "
            "ORDER BY start_ns").fetchnumpy()
        starts = np.asarray(rows["start_ns"], dtype=np.int64)
        ends = np.asarray(rows["end_ns"], dtype=np.int64)
    errs = ev.events.filter((pl.col("kind") == KIND_ERROR) & (pl.col("t_ns") >= t_from)
                            & (pl.col("t_ns") <= t_to))
    if errs.height:
        dur = {(int(i), bool(x)): int(b) // max(1, int(n)) for i, x, b, n in
               ev.frames_by_id.select("id", "ext", "busy_ns", "frames").iter_rows()}
        t_flag = errs["t_ns"].to_numpy().astype(np.int64)
        types = errs["type"].to_list()
        keys = list(zip(errs["id"].to_list(), errs["ext"].to_list(), strict=True))
        flag = np.array([ERROR_FLAG_BITS.get(t, SUPERPOSED_FLAG_BITS) for t in types])
        e_end = (t_flag + (flag + 8 + 3) * ev.bit_ns).astype(np.int64)
        frame_ns = np.array([dur.get((int(i), bool(x)), 0) if i is not None else 0
                             for i, x in keys], dtype=np.float64)
        fields = errs["field"].to_list()
        where = np.array([FIELD_POSITION.get(f or "unknown", 0.5) for f in fields])
        late = np.isin(np.array(types, dtype=object), ["ack", "crc"]) | (where >= 1.0)
        before = np.where(late, frame_ns - ERROR_TAIL_BITS * ev.bit_ns, where * frame_ns)
        e_start = (t_flag - np.maximum(before, 0)).astype(np.int64)
        starts = np.concatenate([starts, e_start])
        ends = np.concatenate([ends, e_end])
        order = np.argsort(ends, kind="stable")
        starts, ends = starts[order], ends[order]
        prev_end = np.concatenate([[starts[0]], ends[:-1]])
        starts = np.maximum(starts, prev_end)
    return starts, ends


def recovery_end_ns(ev: BusEvidence, t_ns: int, config: ConfinementConfig) -> int:
    """When a node that went bus-off at t_ns has seen 128 x 11 recessive bits (rule l).

    Every frame and error frame ends with 11 recessive bits (ACK delimiter + EOF +
    intermission, or error delimiter + intermission); each recessive run (that tail plus the
    idle time after it) supplies floor(run / 11 bits) sequences. With software recovery the
    count starts recovery_delay_ns after the bus-off.
    """
    key = (t_ns, config.recovery_delay_ns if config.recovery == "software" else -1)
    if key in ev._recovery_cache:
        return ev._recovery_cache[key]
    seq_ns = RECOVERY_SEQUENCE_BITS * ev.bit_ns
    count_from = t_ns + (config.recovery_delay_ns if config.recovery == "software" else 0)
    i0 = int(np.searchsorted(ev.frame_t, t_ns, side="left"))
    i1 = i0 + 4 * RECOVERY_SEQUENCES
    t_to = int(ev.frame_t[i1]) if i1 < ev.frame_t.size else ev.last_t_ns
    if config.recovery == "software":
        t_to = max(t_to, count_from + (t_to - t_ns))
    starts, ends = _busy_intervals(ev, t_ns, t_to)
    result: int | None = None
    if ends.size:
        run_start = np.maximum(ends - ERROR_TAIL_BITS * ev.bit_ns, count_from)
        run_end = np.concatenate([starts[1:], [np.iinfo(np.int64).max // 4]]).astype(np.float64)
        per_run = np.floor(np.maximum(run_end - run_start, 0) / seq_ns + 1e-9)
        cum = np.cumsum(per_run)
        k = int(np.searchsorted(cum, RECOVERY_SEQUENCES, side="left"))
        if k < ends.size:
            done_before = cum[k - 1] if k > 0 else 0.0
            q = RECOVERY_SEQUENCES - done_before
            result = int(np.ceil(run_start[k] + q * seq_ns))
    if result is None:
        result = int(np.ceil(count_from + RECOVERY_SEQUENCES * seq_ns))
    ev._recovery_cache[key] = result
    return result


# --- the replay of one node -----------------------------------------------------------------


@dataclass
class NodeReplay:
    """One node's replayed counters under one first-detector assumption."""

    node: str
    assume_first: bool
    rows: list[tuple[int, int, int, str, str, bool]] = field(default_factory=list)
    rows_frame: pl.DataFrame | None = None  # the same rows, built vectorised (quiet nodes)
    transitions: list[dict[str, Any]] = field(default_factory=list)
    bus_off: list[dict[str, int]] = field(default_factory=list)
    state_before: list[str] = field(default_factory=list)  # per event, before it applies
    status_checks: list[dict[str, Any]] = field(default_factory=list)
    first_bonus_events: int = 0
    max_tec: int = 0
    max_rec: int = 0

    def passive_intervals(self, end_ns: int) -> list[tuple[int, int]]:
        """[from, to) intervals in error-passive or bus-off."""
        out: list[tuple[int, int]] = []
        since: int | None = None
        for tr in self.transitions:  # loop over state transitions (rare)
            bad = STATE_RANK[tr["to"]] >= STATE_RANK["error-passive"]
            if bad and since is None:
                since = tr["t_ns"]
            elif not bad and since is not None:
                out.append((since, tr["t_ns"]))
                since = None
        if since is not None:
            out.append((since, end_ns))
        return out

    def first_degradation(self) -> dict[str, Any] | None:
        for tr in self.transitions:
            if tr["from"] == "error-active":
                return tr
        return None

    def worst(self) -> tuple[str, int | None]:
        worst: State = "error-active"
        at: int | None = None
        for tr in self.transitions:
            if STATE_RANK[tr["to"]] > STATE_RANK[worst]:
                worst, at = tr["to"], tr["t_ns"]
        return worst, at


ROLE_NONE, ROLE_TX, ROLE_TX_ACK, ROLE_RX, ROLE_RX_FIRST, ROLE_RX_UNKNOWN, ROLE_STATUS = range(7)


def _role_array(ev: BusEvidence, node: int) -> np.ndarray:
    """What each event is to this node (vectorised over events)."""
    e = ev.events
    kind = e["kind"].to_numpy()
    tx = e["tx"].to_numpy()
    by = e["by_node"].to_numpy()
    ack = (e["type"] == "ack").fill_null(False).to_numpy()
    status = kind == KIND_STATUS
    role = np.where(tx == node, np.where(ack, ROLE_TX_ACK, ROLE_TX),
                    np.where(ack, ROLE_NONE, np.where(by == node, ROLE_RX_FIRST,
                                                      np.where(by < 0, ROLE_RX_UNKNOWN,
                                                               ROLE_RX))))
    role = np.where(status, np.where(e["node"].to_numpy() == node, ROLE_STATUS, ROLE_NONE),
                    role)
    return role.astype(np.int64)


def _roles(ev: BusEvidence, node: int) -> list[int]:
    return [int(r) for r in _role_array(ev, node).tolist()]


def _reflected_walk(jumps: np.ndarray, declines: np.ndarray) -> np.ndarray:
    """Counter after each event: c_k = jumps_k + max(0, c_{k-1} - declines_k), c_-1 = 0.

    The unrolled form c_k = max_j (sum jumps[j..k] - sum declines[j+1..k]) is a cumulative
    maximum, so the whole trajectory is three numpy passes (rules a/b/c with g/h below 128).
    """
    a = np.cumsum(jumps)
    d = np.cumsum(declines)
    a_before = np.concatenate([[0], a[:-1]])
    return a - d + np.maximum.accumulate(d - a_before)


def _quiet_replay(ev: BusEvidence, node: int, assume_first: bool,
                  config: ConfinementConfig, keep_rows: bool) -> NodeReplay | None:
    """The replay of a node that never reaches the warning level, without a Python loop.

    Below the warning level no exception of the rules applies (no ACK exception, no REC
    reset, no bus-off, the node can always flag), so TEC and REC are two reflected walks.
    Returns None when the node does reach it, or when status records or logger losses need
    the event loop.
    """
    if ev.losses.shape[0] or not ev.ev_t:
        return None
    role = _role_array(ev, node)
    if bool(np.any(role == ROLE_STATUS)):
        return None
    own = np.asarray(ev.ev_own_before[node], dtype=np.int64)
    all_ = np.asarray(ev.ev_frames_before, dtype=np.int64)
    own_d = np.diff(own, prepend=0)
    recv_d = np.diff(all_, prepend=0) - own_d
    tx = (role == ROLE_TX) | (role == ROLE_TX_ACK)
    rx_first = (role == ROLE_RX_FIRST) | ((role == ROLE_RX_UNKNOWN) & assume_first)
    rx = rx_first | (role == ROLE_RX) | (role == ROLE_RX_UNKNOWN)
    a_tec = np.where(tx, TRANSMIT_ERROR_TEC, 0)
    a_rec = np.where(rx, RECEIVE_ERROR_REC, 0) + np.where(rx_first, FIRST_DETECTOR_EXTRA_REC, 0)
    tec = _reflected_walk(a_tec, own_d)
    rec = _reflected_walk(a_rec, recv_d)
    level = config.warning_level + (0 if config.warning_inclusive else 1)
    if int(tec.max()) >= level or int(rec.max()) >= level:
        return None
    out = NodeReplay(ev.nodes[node], assume_first)
    out.state_before = ["error-active"] * len(ev.ev_t)
    out.first_bonus_events = int(np.sum((role == ROLE_RX_UNKNOWN) & assume_first))
    out.max_tec, out.max_rec = int(tec.max()), int(rec.max())
    if keep_rows:
        t = np.asarray(ev.ev_t, dtype=np.int64)
        pre_tec, pre_rec = tec - a_tec, rec - a_rec
        prev_tec = np.concatenate([[0], tec[:-1]])
        prev_rec = np.concatenate([[0], rec[:-1]])
        declined = (pre_tec != prev_tec) | (pre_rec != prev_rec)
        hit = tx | rx
        order = np.sort(np.concatenate([2 * np.flatnonzero(declined),
                                        2 * np.flatnonzero(hit) + 1]))
        k, o = order // 2, order % 2  # per event: the decline row first, then the jump
        out.rows_frame = pl.DataFrame({
            "t_ns": t[k], "tec": np.where(o == 1, tec[k], pre_tec[k]).astype(np.int32),
            "rec": np.where(o == 1, rec[k], pre_rec[k]).astype(np.int32),
            "state": "error-active", "cause": np.where(o == 1, "error", "successes"),
            "uncertain": False})
    return out


def replay_node(ev: BusEvidence, node: int, assume_first: bool = False,
                config: ConfinementConfig = DEFAULT_CONFIG, keep_rows: bool = True) -> NodeReplay:
    """Apply the rules table to one node, event by event (a loop over error/status events).

    keep_rows=False keeps transitions, bus-off episodes and status checks but not every
    counter change (for candidate replays that may not win).

    The hot path (successes, receive errors) is written out with the rule constants of
    tracelab.physics.confinement; rare paths (transmit errors with their exceptions, bus-off,
    recovery, status records) go through NodeCounters.
    """
    quiet = _quiet_replay(ev, node, assume_first, config, keep_rows)
    if quiet is not None:
        return quiet
    out = NodeReplay(ev.nodes[node], assume_first)
    c = NodeCounters(config=config)
    state: State = "error-active"
    recovery_at: int | None = None
    uncertain = False
    own_before = ev.ev_own_before[node]
    frames_before = ev.ev_frames_before
    loss_since = ev.ev_loss_since_prev
    roles = _roles(ev, node)
    fb_prev = ob_prev = 0
    t_prev = ev.first_t_ns
    status_tec = ev.events["tec"].to_list()
    status_rec = ev.events["rec"].to_list()
    rows = out.rows
    state_before = out.state_before
    warn = config.warning_level
    inclusive = config.warning_inclusive
    rec_reset = config.rec_after_passive_reception
    max_tec = max_rec = 0

    def state_now() -> State:
        if c.bus_off:
            return "bus-off"
        tec, rec = c.tec, c.rec
        if tec > PASSIVE_LIMIT or rec > PASSIVE_LIMIT:
            return "error-passive"
        hot = tec if tec > rec else rec
        if hot >= warn if inclusive else hot > warn:
            return "warning"
        return "error-active"

    def record(t_ns: int, cause: str) -> None:
        nonlocal state
        new = state_now()
        if keep_rows or new != state:
            rows.append((t_ns, c.tec, c.rec, new, cause, uncertain))
        if new != state:
            out.transitions.append({"t_ns": t_ns, "from": state, "to": new})
            state = new

    # Loop over error and status events (rare compared with frames), never over frames.
    for k, t_e in enumerate(ev.ev_t):
        fb, ob = frames_before[k], own_before[k]
        if loss_since[k]:
            uncertain = True
        # 1. successes since the previous event, with the downward state changes among them
        if c.bus_off:
            if recovery_at is not None and recovery_at <= t_e:
                c.recover()
                out.bus_off[-1]["to_ns"] = recovery_at
                record(recovery_at, "recovery")
                recovery_at = None
        elif fb > fb_prev and (c.tec or c.rec):
            own_n = ob - ob_prev
            recv_n = fb - fb_prev - own_n
            if state != "error-active":
                _downward(ev, node, c, config, fb_prev, ob_prev, own_n, recv_n, record)
            tec0, rec0 = c.tec, c.rec
            c.tec = tec0 - own_n if tec0 > own_n else 0  # rule g, own_n times
            if recv_n:  # rule h, recv_n times
                if rec0 > PASSIVE_LIMIT:
                    c.rec = max(0, rec_reset - (recv_n - 1))
                else:
                    c.rec = rec0 - recv_n if rec0 > recv_n else 0
            if (c.tec != tec0 or c.rec != rec0) and (not rows
                                                      or (c.tec, c.rec) != rows[-1][1:3]):
                record(t_e, "successes")
        if uncertain and c.tec == 0 and c.rec == 0 and not _in_loss(ev, t_e):
            uncertain = False
        fb_prev, ob_prev, t_prev = fb, ob, t_e
        state_before.append(state)
        # 2. the event itself
        role = roles[k]
        if role == ROLE_NONE:
            continue
        if role == ROLE_STATUS:
            tec_s, rec_s = int(status_tec[k]), int(status_rec[k])
            out.status_checks.append({"t_ns": t_e, "tec": c.tec, "rec": c.rec, "state": state,
                                      "status_tec": tec_s, "status_rec": rec_s,
                                      "status_state": state_of(tec_s, rec_s, config=config),
                                      "uncertain": uncertain})
            if (c.tec, c.rec) != (tec_s, rec_s):
                c.tec, c.rec = tec_s, rec_s
                c.bus_off = c.bus_off or tec_s > 255
                max_tec, max_rec = max(max_tec, c.tec), max(max_rec, c.rec)
                uncertain = False
                record(t_e, "status")
            uncertain = False
            continue
        if c.bus_off:
            continue
        if role in (ROLE_TX, ROLE_TX_ACK):
            c.transmit_error(ack_error=role == ROLE_TX_ACK)
            if c.tec > max_tec:
                max_tec = c.tec
        else:
            bonus = role == ROLE_RX_FIRST
            if role == ROLE_RX_UNKNOWN and assume_first and state in ("error-active",
                                                                      "warning"):
                bonus = True
                out.first_bonus_events += 1
            c.rec += RECEIVE_ERROR_REC + (FIRST_DETECTOR_EXTRA_REC if bonus else 0)  # a, b
            if c.rec > max_rec:
                max_rec = c.rec
        record(t_e, "error")
        if c.bus_off and recovery_at is None:
            recovery_at = recovery_end_ns(ev, t_e, config)
            out.bus_off.append({"from_ns": t_e, "to_ns": recovery_at})
    out.max_tec, out.max_rec = max_tec, max_rec
    # tail: successes after the last event up to the end of the log
    if c.bus_off and recovery_at is not None and recovery_at <= max(ev.last_t_ns, t_prev):
        c.recover()
        record(recovery_at, "recovery")
    elif not c.bus_off and state != "error-active":
        fb, ob = ev.frame_t.size, ev.own_t[node].size
        own_n, recv_n = ob - ob_prev, (fb - fb_prev) - (ob - ob_prev)
        _downward(ev, node, c, config, fb_prev, ob_prev, own_n, recv_n, record)
        tec0, rec0 = c.tec, c.rec
        c.transmit_success(own_n)
        c.receive_success(recv_n)
        if (c.tec, c.rec) != (tec0, rec0) and fb > fb_prev:
            record(int(ev.frame_t[-1]), "successes")
    return out


def _in_loss(ev: BusEvidence, t_ns: int) -> bool:
    if not ev.losses.shape[0]:
        return False
    i = int(np.searchsorted(ev.losses[:, 0], t_ns, side="right")) - 1
    return i >= 0 and int(ev.losses[i, 1]) > t_ns


def _downward(ev: BusEvidence, node: int, c: NodeCounters, config: ConfinementConfig,
              frame_start: int, own_start: int, own_n: int, recv_n: int, record: Any) -> None:
    """Record the state changes a run of successes causes, at the frame that causes each.

    Candidate thresholds: TEC back to 127 (passive limit) and below the warning level; REC
    reset into 119..127 by the first reception above 127, then down past the warning level.
    """
    level = config.warning_level - (0 if config.warning_inclusive else -1)  # first "warm" value
    tec0, rec0 = c.tec, c.rec
    own_steps = sorted({s for s in (tec0 - PASSIVE_LIMIT, tec0 - level + 1) if 0 < s <= own_n})
    if rec0 > PASSIVE_LIMIT:
        after = config.rec_after_passive_reception
        rec_steps = {1, 1 + after - level + 1}
    else:
        rec_steps = {rec0 - level + 1}
    recv_steps = sorted(s for s in rec_steps if 0 < s <= recv_n)
    times: list[int] = []
    for s in own_steps:  # at most two thresholds per counter
        t = nth_own_after(ev, node, own_start, s)
        if t is not None:
            times.append(t)
    for s in recv_steps:
        t = nth_reception_after(ev, node, frame_start, own_start, s)
        if t is not None:
            times.append(t)
    own = ev.own_t[node]
    for t in sorted(set(times)):
        i_all = int(np.searchsorted(ev.frame_t, t, side="right")) - frame_start
        i_own = int(np.searchsorted(own, t, side="right")) - own_start
        probe = NodeCounters(tec0, rec0, False, config)
        probe.transmit_success(min(i_own, own_n))
        probe.receive_success(min(i_all - i_own, recv_n))
        if probe.state != c.state:
            c.tec, c.rec = probe.tec, probe.rec
            record(t, "successes")
    c.tec, c.rec = tec0, rec0
