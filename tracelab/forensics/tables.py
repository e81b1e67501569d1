"""The plain tables a replay stores: every counter change, state intervals, one verdict row
per (run, bus)."""

from __future__ import annotations

from typing import Any

import polars as pl

from tracelab.forensics.evidence import BusEvidence
from tracelab.forensics.hypotheses import Hypothesis
from tracelab.forensics.steps import every_change
from tracelab.physics.confinement import DEFAULT_CONFIG, ConfinementConfig

COUNTERS_SCHEMA = {"run": pl.String, "bus": pl.String, "node": pl.String, "t_ns": pl.Int64,
                   "tec": pl.Int32, "rec": pl.Int32, "state": pl.String, "cause": pl.String,
                   "uncertain": pl.Boolean, "hypothesis": pl.String}


NODE_STATES_SCHEMA = {"run": pl.String, "bus": pl.String, "node": pl.String,
                      "state": pl.String, "from_ns": pl.Int64, "to_ns": pl.Int64,
                      "hypothesis": pl.String}


VERDICTS_SCHEMA = {"run": pl.String, "bus": pl.String, "cause_kind": pl.String,
                   "cause_node": pl.String, "first_node": pl.String, "first_state": pl.String,
                   "first_t_ns": pl.Int64, "wall_time": pl.String, "confidence": pl.Float64,
                   "winner": pl.String, "runner_up": pl.String, "errors": pl.Int64}


def counters_frame(ev: BusEvidence, h: Hypothesis,
                    config: ConfinementConfig = DEFAULT_CONFIG) -> pl.DataFrame:
    parts = []
    names = ["t_ns", "tec", "rec", "state", "cause", "uncertain"]
    for rep in h.replays:  # loop over nodes; rows are counter changes (rare)
        if rep.rows_frame is not None:
            frame = rep.rows_frame.select(pl.col(n).cast(COUNTERS_SCHEMA[n]) for n in names)
        elif rep.rows:
            frame = pl.DataFrame(rep.rows, schema=[(n, COUNTERS_SCHEMA[n]) for n in names],
                                 orient="row")
        else:
            continue
        # the step function the rules define: every decrement at the frame that made it
        frame = every_change(frame, ev, ev.node_index(rep.node), config)
        parts.append((rep.node, frame.with_columns(pl.lit(rep.node).alias("node"))))
    if not parts:
        return pl.DataFrame(schema=COUNTERS_SCHEMA)
    # by node, then time: each node's rows are in time order already (every_change), so
    # ordering the parts by node gives the sort's result without sorting 100 k's of rows
    parts.sort(key=lambda part: part[0])
    in_order = len({node for node, _ in parts}) == len(parts) and \
        all(part["t_ns"].is_sorted() for _, part in parts)
    out = pl.concat([part for _, part in parts]).with_columns(
        pl.lit(ev.run).alias("run"), pl.lit(ev.bus).alias("bus"),
        pl.lit(h.name).alias("hypothesis"))
    out = out.select(list(COUNTERS_SCHEMA))
    return out if in_order else out.sort(["node", "t_ns"], maintain_order=True)


def states_frame(ev: BusEvidence, h: Hypothesis) -> pl.DataFrame:
    cols: dict[str, list[Any]] = {k: [] for k in NODE_STATES_SCHEMA}
    end = ev.last_t_ns
    for rep in h.replays:  # loop over nodes and transitions (rare)
        t0, state = ev.first_t_ns, "error-active"
        for tr in rep.transitions + [{"t_ns": end, "from": None, "to": None}]:
            if tr["t_ns"] > t0 or tr["to"] is None:
                cols["node"].append(rep.node)
                cols["state"].append(state)
                cols["from_ns"].append(t0)
                cols["to_ns"].append(max(t0, tr["t_ns"]))
            t0, state = tr["t_ns"], tr["to"] or state
    n = len(cols["node"])
    cols["run"], cols["bus"], cols["hypothesis"] = [ev.run] * n, [ev.bus] * n, [h.name] * n
    return pl.DataFrame(cols, schema=NODE_STATES_SCHEMA)


def verdicts_frame(results: list[dict[str, Any]]) -> pl.DataFrame:
    rows = []
    for r in results:
        f = r["first_degraded"] or {}
        rows.append({"run": r["run"], "bus": r["bus"], "cause_kind": r["cause"]["kind"],
                     "cause_node": r["cause"]["node"], "first_node": f.get("node"),
                     "first_state": f.get("state"), "first_t_ns": f.get("t_ns"),
                     "wall_time": f.get("wall_time"), "confidence": f.get("confidence"),
                     "winner": r["hypotheses"][0]["name"] if r["hypotheses"] else None,
                     "runner_up": (r["runner_up"] or {}).get("name"),
                     "errors": r["evidence"]["errors"]})
    return pl.DataFrame(rows, schema=VERDICTS_SCHEMA)
