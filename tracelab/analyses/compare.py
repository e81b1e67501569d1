"""Two runs of one network side by side: what moved per message and per bus, the errors and
the verdicts (``tracelab compare``).

Run A is the reference (e.g. a good night), run B the run under review. Per message the
observed period (median interval), cycle and phase jitter, drift, missing frames and gaps of
both runs, their difference, and the flags of the one rule table the fleet uses
(``analyses/regression_rules.py``); per bus the load summary; errors by type and field.
Pure: DuckDB views in (a dataset's or a fleet's), plain dicts out.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import duckdb
import polars as pl

from tracelab.analyses.regression_rules import (
    DRIFT_MIN_INCREASE_PPM,
    JITTER_MIN_INCREASE_NS,
    MISSING_MIN_INCREASE,
    PERIOD_MIN_CHANGE,
    phase_jitter_p99,
    regressed,
)
from tracelab.format.grammar import id_text
from tracelab.wording import percent

#: Per-message values compared: output name -> timing column (or the p99 jitter).
MESSAGE_VALUES = {
    "period_ns": "median_ns", "cycle_jitter_ns": "cycle_std_ns",
    "phase_jitter_ns": "phase_std_ns", "jitter_p99_ns": "jitter_p99_ns",
    "drift_ppm": "drift_ppm", "missing": "missing", "gaps": "gaps", "frames": "count",
}
BUS_VALUES = ("mean", "p95", "p99", "max")
KEYS = ["bus", "id", "ext"]


@dataclass
class Comparison:
    runs: list[str]
    messages: list[dict[str, Any]] = field(default_factory=list)
    buses: list[dict[str, Any]] = field(default_factory=list)
    errors: dict[str, Any] = field(default_factory=dict)
    verdicts: dict[str, Any] = field(default_factory=dict)

    def as_json(self) -> dict[str, Any]:
        return {"runs": self.runs, "messages": self.messages, "buses": self.buses,
                "errors": self.errors, "verdicts": self.verdicts}

    @property
    def flagged(self) -> list[dict[str, Any]]:
        return [m for m in self.messages if m["flags"]]

    def describe(self) -> str:
        a, b = self.runs
        out = [f"compare {b} against {a}: {len(self.flagged)} of {len(self.messages)} "
               "messages flagged"]
        for m in self.flagged[:20]:
            out.append(f"  {m['bus']} {m['id_hex']} {m['name'] or ''}: "
                       + ", ".join(_flag_words(f, m) for f in m["flags"]))
        for bus in self.buses:
            d = bus["delta"].get("mean")
            if d is not None:
                out.append(f"  bus {bus['bus']}: mean load {percent(bus['a'].get('mean'))} -> "
                           f"{percent(bus['b'].get('mean'))} ({100 * d:+.1f} points)")
        ea, eb = self.errors.get("a", {}).get("total", 0), self.errors.get("b", {}).get("total", 0)
        out.append(f"  errors: {ea:,} -> {eb:,}")
        for side, run in (("a", a), ("b", b)):
            v = self.verdicts.get(side) or {}
            first = v.get("first_degraded") or {}
            out.append(f"  verdict {run}: " + (f"{first.get('node')} on bus {first.get('bus')} "
                                                f"degraded first ({first.get('state')})"
                                                if first.get("node") else "no node degraded"))
        return "\n".join(out)


def _flag_words(flag: str, m: dict[str, Any]) -> str:
    a, b = m["a"].get(_FLAG_VALUE.get(flag, flag)), m["b"].get(_FLAG_VALUE.get(flag, flag))
    return f"{flag} {a} -> {b}"


_FLAG_VALUE = {"abs_drift_ppm": "drift_ppm", "only_in_a": "frames", "only_in_b": "frames"}


def _per_message(con: duckdb.DuckDBPyConnection, run: str, p99: pl.DataFrame) -> pl.DataFrame:
    cols = {r[0] for r in con.execute("DESCRIBE timing").fetchall()}
    select = ", ".join(f'"{src}" AS {out}' for out, src in MESSAGE_VALUES.items()
                       if src in cols)
    frame = con.sql(f"SELECT bus, id, ext, name, {select} FROM timing WHERE run = $run",
                    params={"run": run}).pl()
    if "jitter_p99_ns" not in frame.columns:
        mine = p99.filter(pl.col("run") == run).drop("run") if not p99.is_empty() else p99
        if mine.is_empty():
            frame = frame.with_columns(jitter_p99_ns=pl.lit(None, pl.Float64))
        else:
            frame = frame.join(mine.with_columns(pl.col("id").cast(frame.schema["id"])),
                               on=KEYS, how="left")
    return frame


def _message_flags(a: dict[str, Any], b: dict[str, Any], frame_ns: float) -> list[str]:
    """The regression rule per metric (B against A). A moved period explains the message's
    own drift and jitter against the reference period, so it is the one flag then. Jitter
    must also rise by more than the longest frame on the bus (``frame_ns``): one frame in
    progress is what arbitration against a re-phased neighbour (a drifting clock, a moved
    period elsewhere) adds to any message, a change of the others, not of this one."""
    pa, pb = a.get("period_ns"), b.get("period_ns")
    if pa and pb and abs(pb - pa) / pa >= PERIOD_MIN_CHANGE:
        return ["period"]
    flags = []
    if regressed(a.get("missing"), b.get("missing"), MISSING_MIN_INCREASE):
        flags.append("missing")
    if regressed(a.get("jitter_p99_ns"), b.get("jitter_p99_ns"),
                 max(JITTER_MIN_INCREASE_NS, frame_ns)):
        flags.append("jitter_p99_ns")
    da, db = a.get("drift_ppm"), b.get("drift_ppm")
    if da is not None and db is not None and regressed(abs(da), abs(db), DRIFT_MIN_INCREASE_PPM):
        flags.append("abs_drift_ppm")
    return flags


def _delta(a: dict[str, Any], b: dict[str, Any], names: Any) -> dict[str, Any]:
    out = {}
    for name in names:
        x, y = a.get(name), b.get(name)
        out[name] = None if x is None or y is None else y - x
    return out


def compare_messages(con: duckdb.DuckDBPyConnection, run_a: str, run_b: str,
                     p99: pl.DataFrame | None = None) -> list[dict[str, Any]]:
    """Per message of either run: both runs' values, B - A, flags; worst changes first."""
    if p99 is None:
        views = {r[0] for r in con.execute(
            "SELECT table_name FROM information_schema.tables").fetchall()}
        if "message_stats" in views:  # a fleet has it stored; a dataset computes it
            p99 = con.sql("SELECT run, bus, id, ext, jitter_p99_ns FROM message_stats "
                          "WHERE run IN ($a, $b)", params={"a": run_a, "b": run_b}).pl()
        else:
            p99 = phase_jitter_p99(con)
    fa, fb = _per_message(con, run_a, p99), _per_message(con, run_b, p99)
    longest = dict(con.sql("SELECT bus, max(duration_ns) FROM frames WHERE run IN ($a, $b) "
                           "GROUP BY bus", params={"a": run_a, "b": run_b}).fetchall())
    values = [c for c in MESSAGE_VALUES if c in fa.columns]
    rows_a = {(r["bus"], r["id"], r["ext"]): r for r in fa.iter_rows(named=True)}
    rows_b = {(r["bus"], r["id"], r["ext"]): r for r in fb.iter_rows(named=True)}
    out = []
    for key in sorted(set(rows_a) | set(rows_b), key=lambda k: (k[0], k[2], k[1])):
        # one entry per message of the network: hundreds at most
        ra, rb = rows_a.get(key), rows_b.get(key)
        a = {c: (ra or {}).get(c) for c in values} if ra else {}
        b = {c: (rb or {}).get(c) for c in values} if rb else {}
        if ra and rb:
            flags = _message_flags(a, b, float(longest.get(key[0]) or 0))
        else:
            flags = ["only_in_a" if ra else "only_in_b"]
        name = (ra or rb or {}).get("name")
        out.append({"bus": key[0], "id": key[1], "ext": key[2], "id_hex": id_text(key[1], key[2]),
                    "name": name, "a": a, "b": b, "delta": _delta(a, b, values),
                    "flags": flags})
    out.sort(key=lambda m: (-len(m["flags"]), -_size_of_change(m), m["bus"], m["id"]))
    return out


def _size_of_change(m: dict[str, Any]) -> float:
    """The largest relative change of any value: the order of "worst changes first"."""
    best = 0.0
    for name, d in m["delta"].items():
        ref = m["a"].get(name)
        if d is None or ref is None:
            continue
        best = max(best, abs(d) / max(abs(ref), 1e-9) if name != "drift_ppm" else abs(d) / 1e3)
    return best


def compare_buses(con: duckdb.DuckDBPyConnection, run_a: str, run_b: str) -> list[dict[str, Any]]:
    """Mean / p95 / p99 / max load per bus (the stored window) of both runs."""
    frame = con.sql("SELECT run, bus, window_ns, mean, p95, p99, max FROM load_summary "
                    "WHERE run IN ($a, $b) ORDER BY bus, window_ns",
                    params={"a": run_a, "b": run_b}).pl()
    out = []
    for bus in frame["bus"].unique(maintain_order=True).to_list():  # a handful
        part = frame.filter(pl.col("bus") == bus)
        window = part["window_ns"].min()
        part = part.filter(pl.col("window_ns") == window)
        sides = {}
        for side, run in (("a", run_a), ("b", run_b)):
            row = part.filter(pl.col("run") == run)
            sides[side] = {v: (row[v][0] if not row.is_empty() else None) for v in BUS_VALUES}
        out.append({"bus": bus, "window_ns": window, "a": sides["a"], "b": sides["b"],
                    "delta": _delta(sides["a"], sides["b"], BUS_VALUES)})
    return out


def compare_errors(con: duckdb.DuckDBPyConnection, run_a: str, run_b: str) -> dict[str, Any]:
    """Error records per run by type and by field, and B - A."""
    frame = con.sql("SELECT run, type, field, count(*) AS n FROM errors WHERE run IN ($a, $b) "
                    "GROUP BY ALL", params={"a": run_a, "b": run_b}).pl()
    sides: dict[str, Any] = {}
    for side, run in (("a", run_a), ("b", run_b)):
        part = frame.filter(pl.col("run") == run)
        sides[side] = {
            "total": int(part["n"].sum()),
            "by_type": {str(k): int(v) for k, v in part.group_by("type").agg(
                pl.col("n").sum()).sort("type").iter_rows()},
            "by_field": {str(k): int(v) for k, v in part.group_by("field").agg(
                pl.col("n").sum()).sort("field").iter_rows()}}
    delta = {"total": sides["b"]["total"] - sides["a"]["total"]}
    for part_name in ("by_type", "by_field"):
        names = sorted(set(sides["a"][part_name]) | set(sides["b"][part_name]))
        delta[part_name] = {n: sides["b"][part_name].get(n, 0) - sides["a"][part_name].get(n, 0)
                            for n in names}
    return {**sides, "delta": delta}


def compare_runs(con: duckdb.DuckDBPyConnection, run_a: str, run_b: str,
                 verdicts: dict[str, Any] | None = None) -> Comparison:
    """Everything `tracelab compare` shows; ``verdicts`` maps "a" / "b" to each run's verdict
    (its first faults result with a degraded node, else its first result)."""
    return Comparison(runs=[run_a, run_b], messages=compare_messages(con, run_a, run_b),
                      buses=compare_buses(con, run_a, run_b),
                      errors=compare_errors(con, run_a, run_b), verdicts=verdicts or {})
