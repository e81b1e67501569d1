"""Signals: physical values decoded from payloads, and payload plausibility checks.

``decode_signals`` reads the frames of every catalogued message with ``[[message.signal]]``
tables in one DuckDB query, cuts the binary payload column of each message into a
fixed-width byte matrix and extracts every signal with numpy shifts and masks
(tracelab.network.payload); there is no Python loop over frames. ``signal_stats`` and
``signal_checks`` work on the decoded long-form frame with polars. Definitions and the
classification of counter jumps are in docs/analyses.md ("Signals").
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import polars as pl
import pyarrow as pa

from tracelab.analyses import hex_id_expr, install_macros, run_sql, text_table
from tracelab.errors import UsageError, did_you_mean
from tracelab.network.catalog import Catalog, MessageSpec, SignalSpec
from tracelab.network.payload import PayloadWords, byte_matrix, crc_rows, physical, signed_values

#: Columns of signals.parquet (long form: one row per decoded value), in order.
SIGNAL_COLUMNS = ("run", "bus", "t_ns", "id", "ext", "message", "signal", "raw", "value",
                  "unit", "file", "line")
SIGNAL_SCHEMA = pl.Schema({
    "run": pl.String, "bus": pl.String, "t_ns": pl.Int64, "id": pl.UInt32, "ext": pl.Boolean,
    "message": pl.String, "signal": pl.String, "raw": pl.Int64, "value": pl.Float64,
    "unit": pl.String, "file": pl.String, "line": pl.Int64,
})
#: Columns of signal_stats.parquet: one row per (run, message, signal).
STATS_COLUMNS = ("run", "bus", "id", "ext", "message", "signal", "unit", "role", "count",
                 "min", "max", "mean", "out_of_range", "first_out_of_range_ns", "min_limit",
                 "max_limit", "plot")
#: Columns of signal_checks.parquet: one row per finding.
CHECK_COLUMNS = ("run", "bus", "id", "ext", "message", "signal", "kind", "t_ns", "until_ns",
                 "raw", "expected", "count", "missing", "cause", "file", "line")
CHECK_SCHEMA = pl.Schema({
    "run": pl.String, "bus": pl.String, "id": pl.UInt32, "ext": pl.Boolean,
    "message": pl.String, "signal": pl.String, "kind": pl.String, "t_ns": pl.Int64,
    "until_ns": pl.Int64, "raw": pl.Int64, "expected": pl.Int64, "count": pl.Int64,
    "missing": pl.Int64, "cause": pl.String, "file": pl.String, "line": pl.Int64,
})
#: Finding kinds, in the order the summary lists them.
CHECK_KINDS = ("counter-lost", "counter-skip", "counter-in-loss", "counter-repeat",
               "checksum", "stuck", "range", "length")
CAUSES = {
    "counter-lost": "lost on the bus or by the logger",
    "counter-skip": "skipped by the sender",
    "counter-in-loss": "inside a logger-loss interval (not the sender's fault)",
    "counter-repeat": "same counter twice: a stale or repeated payload",
}


@dataclass
class SignalResult:
    signals: pl.DataFrame   # long form, signals.parquet
    stats: pl.DataFrame     # signal_stats.parquet
    checks: pl.DataFrame    # signal_checks.parquet

    def counts(self) -> dict[str, int]:
        found = dict(self.checks.group_by("kind").len().iter_rows()) if self.checks.height \
            else {}
        return {kind: int(found.get(kind, 0)) for kind in CHECK_KINDS}

    def as_json(self) -> dict[str, Any]:
        return {"values": self.signals.height, "stats": self.stats.to_dicts(),
                "findings": self.counts(),
                "checks": self.checks.head(1000).to_dicts()}

    def describe(self) -> str:
        if self.stats.is_empty():
            return "signals: no signal decoded (no catalogued message with signals was seen)"
        view = self.stats.select(
            "run", "bus", hex_id_expr().alias("id"), "message", "signal", "unit", "count",
            pl.col("min").round(3), pl.col("max").round(3), pl.col("mean").round(3),
            "out_of_range", (pl.col("first_out_of_range_ns") / 1e9).round(3)
            .alias("first_out_s"))
        counts = self.counts()
        words = ", ".join(f"{n} {k}" for k, n in counts.items() if n) or "none"
        lines = [f"signals: {self.signals.height:,} values of {self.stats.height} signals; "
                 f"findings: {words}", text_table(view)]
        if self.checks.height:
            shown = self.checks.head(20).select(
                "run", "message", "signal", "kind", (pl.col("t_ns") / 1e9).round(6)
                .alias("t_s"), "raw", "expected", "count", "missing",
                pl.concat_str([pl.col("file"), pl.col("line").cast(pl.String)], separator=":")
                .alias("where"))
            lines += ["", f"first findings (all {self.checks.height} in signal_checks.parquet):",
                      text_table(shown)]
        return "\n".join(lines)


def select_signals(catalog: Catalog, names: list[str] | None = None
                   ) -> list[tuple[MessageSpec, list[SignalSpec]]]:
    """The messages with signals and the signals to decode (``names``: signal or
    message.signal names; a selected multiplexed signal brings its selector along)."""
    chosen = []
    known = [f"{m.label}.{s.name}" for m in catalog.messages for s in m.signals]
    plain = {s.name for m in catalog.messages for s in m.signals}  # message names may hold dots
    for name in names or []:
        if name not in plain and name not in known:
            raise UsageError(f"--signal {name!r} is not a catalogued signal"
                             + did_you_mean(name, sorted(plain | set(known))))
    for msg in catalog.messages:  # catalogue entries, not frames
        if not msg.signals:
            continue
        wanted = [s for s in msg.signals if names is None or s.name in names
                  or f"{msg.label}.{s.name}" in names]
        if wanted:
            chosen.append((msg, wanted))
    return chosen


def _messages_frame(chosen: list[tuple[MessageSpec, list[SignalSpec]]]) -> pl.DataFrame:
    return pl.DataFrame(
        {"key": list(range(len(chosen))), "bus": [m.bus for m, _ in chosen],
         "id": [m.id for m, _ in chosen], "ext": [m.ext for m, _ in chosen],
         "nbytes": [m.signals[0].nbytes for m, _ in chosen]},
        schema={"key": pl.Int64, "bus": pl.String, "id": pl.UInt32, "ext": pl.Boolean,
                "nbytes": pl.Int64})


def _stage_messages(con: duckdb.DuckDBPyConnection,
                    chosen: list[tuple[MessageSpec, list[SignalSpec]]]) -> None:
    con.register("_tl_signal_messages", _messages_frame(chosen).to_arrow())
    con.execute("CREATE OR REPLACE TEMP TABLE tl_signal_messages AS "
                "SELECT * FROM _tl_signal_messages")
    con.unregister("_tl_signal_messages")


@dataclass
class DecodedMessage:
    """One message's frames as a byte matrix with the columns the long form repeats."""

    msg: MessageSpec
    table: pa.Table         # run, bus, t_ns, file, line (rows aligned with ``rows``)
    rows: np.ndarray        # (frames, nbytes) uint8


def message_frames(con: duckdb.DuckDBPyConnection,
                   chosen: list[tuple[MessageSpec, list[SignalSpec]]], run: str | None = None,
                   from_ns: int | None = None, to_ns: int | None = None
                   ) -> list[DecodedMessage]:
    """The frames of each chosen message as a byte matrix, from one query."""
    install_macros(con)
    _stage_messages(con, chosen)
    relation = run_sql(con, "signals_frames", {"run": run, "from_ns": from_ns, "to_ns": to_ns})
    assert relation is not None
    table = relation.to_arrow_table()
    keys = table.column("key").to_numpy()
    bounds = np.searchsorted(keys, np.arange(len(chosen) + 1), side="left")
    out = []
    for key, (msg, _) in enumerate(chosen):  # one slice per message (tens)
        part = table.slice(int(bounds[key]), int(bounds[key + 1] - bounds[key]))
        rows = byte_matrix(part.column("data"), msg.signals[0].nbytes)
        out.append(DecodedMessage(msg, part.select(["run", "bus", "t_ns", "file", "line"]),
                                  rows))
    return out


def decode_message(part: DecodedMessage, signals: list[SignalSpec]
                   ) -> list[tuple[SignalSpec, np.ndarray | None, np.ndarray, np.ndarray]]:
    """(signal, row positions or None for all rows, raw int64, value float64) per signal; a
    multiplexed signal keeps the rows where its selector holds its mux_value."""
    words = PayloadWords(part.rows)
    every = {s.name: s for s in part.msg.signals}
    unsigned: dict[str, np.ndarray] = {}

    def raw_of(spec: SignalSpec) -> np.ndarray:
        if spec.name not in unsigned:
            unsigned[spec.name] = words.raw(spec.shift, spec.length, spec.order)
        return unsigned[spec.name]

    out = []
    for spec in signals:  # signals of one message: a handful
        raw = raw_of(spec)
        positions = None
        if spec.mux is not None:
            keep = raw_of(every[spec.mux]) == np.uint64(spec.mux_value or 0)
            positions, raw = np.flatnonzero(keep), raw[keep]
        values = signed_values(raw, spec.length, spec.signed)
        wide = spec.length == 64 and not spec.signed
        out.append((spec, positions, values, physical(values, spec.scale, spec.offset, wide)))
    return out


def decode_signals(con: duckdb.DuckDBPyConnection, catalog: Catalog, run: str | None = None,
                   names: list[str] | None = None, from_ns: int | None = None,
                   to_ns: int | None = None) -> pl.DataFrame:
    """Every selected signal of every frame, in long form (SIGNAL_COLUMNS)."""
    chosen = select_signals(catalog, names)
    if not chosen:
        return SIGNAL_SCHEMA.to_frame()
    return long_form(message_frames(con, chosen, run, from_ns, to_ns), chosen)


def long_form(parts: list[DecodedMessage], chosen: list[tuple[MessageSpec, list[SignalSpec]]]
              ) -> pl.DataFrame:
    """The decoded values of ``parts`` as one long frame (SIGNAL_COLUMNS)."""
    pieces = []
    for part, (msg, signals) in zip(parts, chosen, strict=True):
        if part.rows.shape[0] == 0:
            continue
        base = pl.from_arrow(part.table)
        assert isinstance(base, pl.DataFrame)
        for spec, positions, raw, value in decode_message(part, signals):
            rows = base if positions is None else base[positions]
            pieces.append(rows.with_columns(
                pl.lit(msg.id, pl.UInt32).alias("id"), pl.lit(msg.ext).alias("ext"),
                pl.lit(msg.label).alias("message"), pl.lit(spec.name).alias("signal"),
                pl.Series("raw", raw, dtype=pl.Int64), pl.Series("value", value),
                pl.lit(spec.unit).alias("unit")))
    if not pieces:
        return SIGNAL_SCHEMA.to_frame()
    return pl.concat(pieces).select(SIGNAL_COLUMNS).cast(dict(SIGNAL_SCHEMA))  # type: ignore[arg-type]


def _signal_table(catalog: Catalog, plot_all: bool = False) -> pl.DataFrame:
    """One row per catalogued signal: limits, role, plot flag (a small join partner)."""
    rows = [(m.bus, m.id, m.ext, m.label, s.name, s.role, s.min, s.max, s.plot or plot_all)
            for m in catalog.messages for s in m.signals]
    return pl.DataFrame(rows, orient="row", schema={
        "bus": pl.String, "id": pl.UInt32, "ext": pl.Boolean, "message": pl.String,
        "signal": pl.String, "role": pl.String, "min_limit": pl.Float64,
        "max_limit": pl.Float64, "plot": pl.Boolean})


def _out_of_range() -> pl.Expr:
    return (pl.col("value") < pl.col("min_limit")).fill_null(False) | \
        (pl.col("value") > pl.col("max_limit")).fill_null(False)


def signal_stats(decoded: pl.DataFrame, catalog: Catalog, plot_all: bool = False
                 ) -> pl.DataFrame:
    """Per (run, message, signal): count, min, max, mean, out-of-range count and the first
    out-of-range time, with the catalogue's limits, role and plot flag."""
    keys = ["bus", "id", "ext", "message", "signal"]
    joined = decoded.join(_signal_table(catalog, plot_all), on=keys, how="left")
    out = joined.with_columns(_out_of_range().alias("_out")).group_by(
        "run", *keys, maintain_order=True).agg(
        pl.col("unit").first(), pl.col("role").first(), pl.len().cast(pl.Int64).alias("count"),
        pl.col("value").min().alias("min"), pl.col("value").max().alias("max"),
        pl.col("value").mean().alias("mean"),
        pl.col("_out").sum().cast(pl.Int64).alias("out_of_range"),
        pl.col("t_ns").filter(pl.col("_out")).min().alias("first_out_of_range_ns"),
        pl.col("min_limit").first(), pl.col("max_limit").first(), pl.col("plot").first())
    return out.select(STATS_COLUMNS).sort("run", "bus", "ext", "id", "signal")


# --- checks -------------------------------------------------------------------------------


def _segments(frame: pl.DataFrame, flag: pl.Expr) -> pl.Expr:
    """Segment number that grows where ``flag`` (a change) is true or the run changes."""
    return (flag | (pl.col("run") != pl.col("run").shift(1)).fill_null(True)).cum_sum()


def counter_checks(decoded: pl.DataFrame, specs: dict[tuple[str, str], SignalSpec],
                   gaps: pl.DataFrame, losses: pl.DataFrame) -> pl.DataFrame:
    """Counter jumps and repeats, each joined with the timing gap that ends at the same
    frame and with the logger losses overlapping the interval before it.

    A gap of m missing frames explains a counter advance of (m + 1) * step modulo
    2**length; then the finding counts m releases (so a long gap that wraps the counter is
    still counted right, and a wrap to the same value is no repeat)."""
    gap_keys = gaps.select("run", "bus", "id", "ext", pl.col("to_ns").alias("t_ns"),
                           pl.col("missing").cast(pl.Int64),
                           pl.col("in_loss").alias("gap_in_loss"))
    found = []
    for (message, name), spec in specs.items():  # counters: a handful
        if spec.role != "counter":
            continue
        part = decoded.filter((pl.col("message") == message) & (pl.col("signal") == name))
        if part.height < 2:
            continue
        modulus = 1 << spec.length
        step = spec.step
        raw = pl.col("raw").cast(pl.Int128) if spec.length == 64 else pl.col("raw")
        part = part.with_columns(
            pl.col("t_ns").shift(1).over("run").alias("prev_ns"),
            ((raw - raw.shift(1).over("run")) % modulus).cast(pl.Int64).alias("delta"),
            ((raw.shift(1).over("run") + step) % modulus).cast(pl.Int64).alias("expected"),
        ).filter(pl.col("delta").is_not_null())
        part = part.join(gap_keys, on=["run", "bus", "id", "ext", "t_ns"], how="left")
        explained = (((pl.col("missing").cast(pl.Int128) + 1) * step) % modulus
                     == pl.col("delta")).fill_null(False)
        odd = part.with_columns(explained.alias("explained")).filter(
            (pl.col("delta") != step) | pl.col("explained"))
        if odd.is_empty():
            continue
        odd = odd.with_columns(
            pl.when(pl.col("explained")).then(pl.col("missing"))
            .when((pl.col("delta") % step == 0) & (pl.col("delta") > 0))
            .then(pl.col("delta") // step - 1).alias("count"))
        found.append(odd.select("run", "bus", "id", "ext", "message", "signal", "t_ns",
                                "prev_ns", "raw", "expected", "delta", "count", "missing",
                                "gap_in_loss", "explained", "file", "line"))
    if not found:
        return CHECK_SCHEMA.to_frame()
    odd = _join_losses(pl.concat(found).sort("t_ns"), losses)
    gap = pl.col("missing").is_not_null()
    kind = (pl.when((pl.col("delta") == 0) & ~pl.col("explained"))
            .then(pl.lit("counter-repeat"))
            .when(pl.col("gap_in_loss").fill_null(False) | pl.col("loss_overlap"))
            .then(pl.lit("counter-in-loss"))
            .when(gap).then(pl.lit("counter-lost"))
            .otherwise(pl.lit("counter-skip")))
    return odd.with_columns(
        kind.alias("kind"), pl.col("prev_ns").alias("until_ns"),
    ).with_columns(
        pl.col("kind").replace_strict(CAUSES, default="").alias("cause"),
    ).select(CHECK_COLUMNS).cast(dict(CHECK_SCHEMA))  # type: ignore[arg-type]


def _join_losses(events: pl.DataFrame, losses: pl.DataFrame) -> pl.DataFrame:
    """``loss_overlap``: some logger loss [t_ns, until_ns) on the same run and bus overlaps
    (prev_ns, t_ns). Among losses that start before t_ns the largest until_ns decides, so a
    backward as-of join on the running maximum answers it without a pairwise product."""
    if losses.is_empty():
        return events.with_columns(pl.lit(False).alias("loss_overlap"))
    reach = (losses.sort("run", "bus", "t_ns")
             .select("run", "bus", pl.col("t_ns").alias("loss_from_ns"),
                     pl.col("until_ns").cum_max().over("run", "bus").alias("loss_reach_ns")))
    joined = events.join_asof(reach, left_on="t_ns", right_on="loss_from_ns", by=["run", "bus"],
                              strategy="backward", allow_exact_matches=False,
                              check_sortedness=False)  # both sorted by time within run, bus
    return joined.with_columns(
        (pl.col("loss_reach_ns") > pl.col("prev_ns")).fill_null(False).alias("loss_overlap"))


def checksum_checks(parts: list[DecodedMessage], chosen: list[tuple[MessageSpec,
                    list[SignalSpec]]]) -> pl.DataFrame:
    """Frames whose checksum signal differs from the CRC computed over its ``over`` bytes."""
    found = []
    for part, (msg, wanted) in zip(parts, chosen, strict=True):  # messages (tens)
        for spec in wanted:
            if spec.role != "checksum" or spec.crc is None or part.rows.shape[0] == 0:
                continue
            seen = PayloadWords(part.rows).raw(spec.shift, spec.length, spec.order)
            computed = crc_rows(part.rows, spec.crc, spec.over)
            bad = np.flatnonzero(seen != computed)
            if not len(bad):
                continue
            base = pl.from_arrow(part.table.take(pa.array(bad)))
            assert isinstance(base, pl.DataFrame)
            found.append(base.with_columns(
                pl.lit(msg.id, pl.UInt32).alias("id"), pl.lit(msg.ext).alias("ext"),
                pl.lit(msg.label).alias("message"), pl.lit(spec.name).alias("signal"),
                pl.lit("checksum").alias("kind"), pl.lit(None, pl.Int64).alias("until_ns"),
                pl.Series("raw", seen[bad].astype(np.int64)),
                pl.Series("expected", computed[bad].astype(np.int64)),
                pl.lit(None, pl.Int64).alias("count"), pl.lit(None, pl.Int64).alias("missing"),
                pl.lit("checksum differs from the CRC over the payload").alias("cause")))
    if not found:
        return CHECK_SCHEMA.to_frame()
    return pl.concat(found).select(CHECK_COLUMNS).cast(dict(CHECK_SCHEMA))  # type: ignore[arg-type]


def span_checks(decoded: pl.DataFrame, catalog: Catalog, stuck_ns: int | None
                ) -> pl.DataFrame:
    """Stuck signals (the same raw value for at least ``stuck_ns`` while frames arrive) and
    out-of-range spans (consecutive values outside [min, max]); counters and checksums are
    not checked for being stuck (their repeats are counter findings)."""
    if decoded.is_empty():
        return CHECK_SCHEMA.to_frame()
    keys = ["bus", "id", "ext", "message", "signal"]
    data = decoded.join(_signal_table(catalog), on=keys, how="left").sort(
        "run", *keys, "t_ns").with_columns(_out_of_range().alias("_out"))
    same = ["run", *keys]
    first = (pl.struct(same) != pl.struct(same).shift(1)).fill_null(True)
    out = []
    if stuck_ns is not None:
        seg = data.filter(pl.col("role").is_null()).with_columns(
            (first | (pl.col("raw") != pl.col("raw").shift(1)).fill_null(True))
            .cum_sum().alias("_seg"))
        runs = seg.group_by("_seg").agg(
            *(pl.col(c).first() for c in same), pl.col("t_ns").first(),
            pl.col("t_ns").last().alias("until_ns"), pl.col("raw").first(),
            pl.len().cast(pl.Int64).alias("count"), pl.col("file").first(),
            pl.col("line").first())
        stuck = runs.filter(pl.col("until_ns") - pl.col("t_ns") >= stuck_ns)
        out.append(stuck.with_columns(
            pl.lit("stuck").alias("kind"), pl.lit(None, pl.Int64).alias("expected"),
            pl.lit(None, pl.Int64).alias("missing"),
            pl.format("no change for {} s", ((pl.col("until_ns") - pl.col("t_ns")) / 1e9)
                      .round(3)).alias("cause")))
    ranged = data.with_columns(
        (first | (pl.col("_out") != pl.col("_out").shift(1)).fill_null(True)).cum_sum()
        .alias("_seg")).filter(pl.col("_out"))
    spans = ranged.group_by("_seg").agg(
        *(pl.col(c).first() for c in same), pl.col("t_ns").first(),
        pl.col("t_ns").last().alias("until_ns"), pl.col("raw").first(),
        pl.len().cast(pl.Int64).alias("count"), pl.col("file").first(), pl.col("line").first(),
        pl.col("value").min().alias("_lo"), pl.col("value").max().alias("_hi"))
    out.append(spans.with_columns(
        pl.lit("range").alias("kind"), pl.lit(None, pl.Int64).alias("expected"),
        pl.lit(None, pl.Int64).alias("missing"),
        pl.format("outside the plausible range ({} .. {})", pl.col("_lo"), pl.col("_hi"))
        .alias("cause")))
    frames = [f.select(CHECK_COLUMNS).cast(dict(CHECK_SCHEMA)) for f in out]  # type: ignore[arg-type]
    return pl.concat(frames) if frames else CHECK_SCHEMA.to_frame()


def length_checks(con: duckdb.DuckDBPyConnection,
                  chosen: list[tuple[MessageSpec, list[SignalSpec]]], run: str | None,
                  from_ns: int | None, to_ns: int | None) -> pl.DataFrame:
    """One finding per (run, message) whose frames carry another payload length."""
    relation = run_sql(con, "signals_lengths", {"run": run, "from_ns": from_ns, "to_ns": to_ns})
    assert relation is not None
    found = relation.pl()
    if found.is_empty():
        return CHECK_SCHEMA.to_frame()
    meta = _messages_frame(chosen).with_columns(
        pl.Series("message", [m.label for m, _ in chosen]))
    return found.join(meta.select("key", "id", "ext", "message", "nbytes").rename(
        {"nbytes": "want"}), on="key").with_columns(
        pl.lit(None, pl.String).alias("signal"), pl.lit("length").alias("kind"),
        pl.lit(None, pl.Int64).alias("raw"), pl.lit(None, pl.Int64).alias("expected"),
        pl.col("frames").alias("count"), pl.lit(None, pl.Int64).alias("missing"),
        pl.format("{} frames carry {} bytes (first), the catalog {}: not decoded",
                  pl.col("frames"), pl.col("nbytes"), pl.col("want")).alias("cause"),
    ).select(CHECK_COLUMNS).cast(dict(CHECK_SCHEMA))  # type: ignore[arg-type]


def signals(con: duckdb.DuckDBPyConnection, catalog: Catalog, run: str | None = None,
            names: list[str] | None = None, from_ns: int | None = None,
            to_ns: int | None = None, gaps: pl.DataFrame | None = None,
            stuck_ns: int | None = None) -> SignalResult:
    """Decode, summarise and check every selected signal.

    ``gaps`` are the timing analysis' gaps (GAP_COLUMNS); None computes them here. ``con``
    needs the views frames and losses."""
    chosen = select_signals(catalog, names)
    if not chosen:
        empty = SIGNAL_SCHEMA.to_frame()
        return SignalResult(empty, signal_stats(empty, catalog), CHECK_SCHEMA.to_frame())
    parts = message_frames(con, chosen, run, from_ns, to_ns)
    decoded = long_form(parts, chosen)
    stats = signal_stats(decoded, catalog, plot_all=names is not None)
    if gaps is None:
        from tracelab.analyses.timing import timing

        gaps = timing(con, catalog, run=run).gaps
    losses = con.sql("SELECT run, bus, t_ns, until_ns FROM losses").pl()
    specs = {(m.label, s.name): s for m, sigs in chosen for s in sigs}
    checks = pl.concat([
        counter_checks(decoded, specs, gaps, losses),
        checksum_checks(parts, chosen),
        span_checks(decoded, catalog, stuck_ns),
        length_checks(con, chosen, run, from_ns, to_ns),
    ]).sort("run", "t_ns", "bus", "message", "kind", nulls_last=True)
    con.execute("DROP TABLE IF EXISTS tl_signal_messages")
    return SignalResult(decoded, stats, checks)
