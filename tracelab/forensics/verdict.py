"""The verdict per (run, bus): who degraded first, when, why, and how sure we are.

``replay_faults`` joins the replay and the hypotheses and returns plain tables and the JSON
object ``tracelab faults --json`` prints (the shape is spec: issue 5, section 2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import polars as pl

from tracelab.forensics.hypotheses import (
    MIN_ERRORS,
    Hypothesis,
    Silence,
    candidates,
    node_silences,
    score,
)
from tracelab.forensics.replay import (
    KIND_ERROR,
    BusEvidence,
    CatalogLike,
    NodeReplay,
    frames_by_id,
    load_bus_evidence,
    replay_node,
    run_buses,
    single_pair,
)
from tracelab.format.grammar import wall_time
from tracelab.physics.confinement import DEFAULT_CONFIG, ConfinementConfig

#: Below this posterior the verdict says the evidence does not decide.
MIN_CONFIDENCE = 0.4

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

@dataclass
class FaultsResult:
    """Verdicts (the JSON results), replayed counters and state intervals of every bus."""

    results: list[dict[str, Any]]
    counters: pl.DataFrame
    node_states: pl.DataFrame
    verdicts: pl.DataFrame
    frames: int = 0
    events: int = 0

    def as_json(self) -> dict[str, Any]:
        return {"results": self.results}

    def describe(self) -> str:
        return describe_results(self.results)


def _origin(con: duckdb.DuckDBPyConnection, run: str) -> str | None:
    try:
        row = con.execute("SELECT origin FROM manifest WHERE run = ? AND origin IS NOT NULL "
                          "ORDER BY first_t_ns LIMIT 1", [run]).fetchall()
    except duckdb.Error:
        return None
    return str(row[0][0]) if row and row[0][0] is not None else None


def _catalog_keys(catalog: CatalogLike, bus: str, nodes: list[str]
                  ) -> dict[int, set[tuple[int, bool]]]:
    """Per node index, the (id, ext) of its periodic messages on this bus."""
    out: dict[int, set[tuple[int, bool]]] = {}
    frame = catalog.messages_frame().filter((pl.col("bus") == bus)
                                            & pl.col("period_ns").is_not_null())
    for sender, fid, ext in frame.select("sender", "id", "ext").iter_rows():
        if sender in nodes:
            out.setdefault(nodes.index(sender), set()).add((int(fid), bool(ext)))
    return out


def replay_faults(con: duckdb.DuckDBPyConnection, catalog: CatalogLike, run: str | None = None,
                  gaps: pl.DataFrame | None = None,
                  config: ConfinementConfig = DEFAULT_CONFIG) -> FaultsResult:
    """Replay every (run, bus) of the dataset views and give one verdict each."""
    results: list[dict[str, Any]] = []
    counters: list[pl.DataFrame] = []
    states: list[pl.DataFrame] = []
    frames = events = 0
    pair = single_pair(con, run)
    by_id = frames_by_id(con, run, pair)
    pairs = run_buses(con, run, by_id)
    alone = len(pairs) == 1 and (run is None or pair is not None)
    for r, bus in pairs:  # loop over (run, bus) pairs
        ev = load_bus_evidence(con, catalog, r, bus, by_id, only_pair=alone)
        frames += ev.frames
        events += ev.events.height
        bus_gaps = None
        if gaps is not None and gaps.height and {"run", "bus", "id", "ext", "from_ns",
                                                 "to_ns"} <= set(gaps.columns):
            bus_gaps = gaps.filter((pl.col("run") == r) & (pl.col("bus") == bus))
        result, winner = bus_verdict(ev, _origin(con, r), bus_gaps,
                                     _catalog_keys(catalog, bus, ev.nodes), config)
        results.append(result)
        counters.append(_counters_frame(ev, winner))
        states.append(_states_frame(ev, winner))
    counters_df = pl.concat(counters) if counters else pl.DataFrame(schema=COUNTERS_SCHEMA)
    states_df = pl.concat(states) if states else pl.DataFrame(schema=NODE_STATES_SCHEMA)
    return FaultsResult(results, counters_df, states_df, _verdicts_frame(results), frames, events)


def bus_verdict(ev: BusEvidence, origin: str | None, gaps: pl.DataFrame | None,
                catalog_keys: dict[int, set[tuple[int, bool]]],
                config: ConfinementConfig = DEFAULT_CONFIG) -> tuple[dict[str, Any], Hypothesis]:
    """Replay the candidates of one bus, score them and write the verdict object."""
    base = [replay_node(ev, n, False, config) for n in range(len(ev.nodes))]
    attributed_everywhere = bool((ev.events.filter(pl.col("kind") == KIND_ERROR)["by_node"]
                                  >= 0).all()) if ev.events.height else True
    first = base if attributed_everywhere else [
        replay_node(ev, n, True, config, keep_rows=False) for n in range(len(ev.nodes))]
    silences = node_silences(ev, gaps, catalog_keys)
    hyps = candidates(ev, base, first, silences)
    score(ev, hyps, silences)
    # ties (to rounding): a cut-off node before a plain silence, since only the former makes
    # rule-based predictions (docs/forensics.md); otherwise the order of candidates()
    hyps.sort(key=lambda h: (-round(h.score, 6), 0 if h.facts.get("far_side") else 1))
    errors = ev.events.filter(pl.col("kind") == KIND_ERROR)
    n_errors = errors.height
    clean = n_errors == 0 and not silences
    winner = hyps[0]
    if winner.kind == "receive-fault" and winner.node is not None and not attributed_everywhere:
        winner.replays[winner.node] = replay_node(ev, winner.node, True, config)  # with rows
    known_tx = int((errors["tx"] >= 0).sum()) if n_errors else 0
    blind = not ev.nodes or (n_errors > 0 and known_tx < n_errors / 2)
    thin = ((n_errors < MIN_ERRORS and not silences) or winner.score < MIN_CONFIDENCE
            or blind)
    if clean:
        first_deg = None
        cause = {"kind": "none", "node": None}
        thin = False
    else:
        first_deg = _first_degraded(ev, winner if not thin else hyps[0], silences, origin)
        if thin:
            cause = {"kind": "unknown", "node": None}
        else:
            node = ev.nodes[winner.node] if winner.node is not None else None
            cause = {"kind": winner.kind, "node": node}
    for h in hyps:
        h.why = _why(ev, h, hyps[0])
    result: dict[str, Any] = {
        "run": ev.run,
        "bus": ev.bus,
        "first_degraded": first_deg,
        "cause": cause,
        "hypotheses": [{"name": h.name, "score": round(h.score, 4), "why": h.why}
                       for h in hyps],
        "nodes": [_node_json(rep) for rep in winner.replays],
        "status_agreement": _status_agreement(winner.replays),
        "assumptions": _assumptions(config, attributed_everywhere, winner),
        "verdict": _sentence(ev, cause, first_deg, hyps, thin, clean)
        + (f" The catalog names the sender of only {known_tx} of {n_errors} errored frames"
           f" ({len(ev.nodes)} nodes on bus {ev.bus}); check --catalog." if blind else ""),
        "runner_up": ({"name": hyps[1].name, "score": round(hyps[1].score, 4),
                       "why": hyps[1].why} if len(hyps) > 1 else None),
        "evidence": _evidence(ev, winner, silences, first_deg),
    }
    if first_deg is not None:
        first_deg["confidence"] = round(winner.score if not thin else min(winner.score, 0.5), 3)
    return result, winner


def _first_degraded(ev: BusEvidence, h: Hypothesis, silences: list[Silence],
                    origin: str | None) -> dict[str, Any] | None:
    best: tuple[int, str, str] | None = None
    for rep in h.replays:  # loop over nodes
        tr = rep.first_degradation()
        if tr is not None and (best is None or tr["t_ns"] < best[0]):
            best = (tr["t_ns"], rep.node, tr["to"])
    if h.kind == "silence" and h.node is not None:
        s = next(s for s in silences if s.node == h.node)
        if best is None or s.from_ns < best[0]:
            best = (s.from_ns, ev.nodes[h.node], "silent")
    if best is None:
        return None
    t_ns, node, state = best
    worst, worst_t = next(((r.worst()) for r in h.replays if r.node == node), (state, t_ns))
    return {"node": node, "state": state, "t_ns": t_ns, "wall_time": wall_time(origin, t_ns),
            "confidence": 0.0, "worst_state": worst if state != "silent" else "silent",
            "worst_t_ns": worst_t if state != "silent" else t_ns}


def _node_json(rep: NodeReplay) -> dict[str, Any]:
    return {"node": rep.node, "max_tec": rep.max_tec, "max_rec": rep.max_rec,
            "transitions": [dict(tr) for tr in rep.transitions],
            "bus_off": [dict(b) for b in rep.bus_off]}


def _status_agreement(replays: list[NodeReplay]) -> dict[str, Any] | None:
    checks = [c for rep in replays for c in rep.status_checks]
    if not checks:
        return None
    same_state = sum(c["state"] == c["status_state"] for c in checks)
    return {
        "records": len(checks),
        "state_equal": same_state,
        "tec_equal": sum(c["tec"] == c["status_tec"] for c in checks),
        "rec_equal": sum(c["rec"] == c["status_rec"] for c in checks),
        "max_tec_diff": max(abs(c["tec"] - c["status_tec"]) for c in checks),
        "max_rec_diff": max(abs(c["rec"] - c["status_rec"]) for c in checks),
        "uncertain": sum(bool(c["uncertain"]) for c in checks),
        "ratio": round(same_state / len(checks), 4),
    }


def _assumptions(config: ConfinementConfig, attributed: bool, h: Hypothesis) -> list[str]:
    out = [
        "rules: ISO 11898-1 fault confinement (tracelab/physics/confinement.py RULES)",
        f"warning limit {config.warning_level} ({'>=' if config.warning_inclusive else '>'})",
        f"REC above 127 set to {config.rec_after_passive_reception} by a good reception",
        f"bus-off recovery: {config.recovery}"
        + (f" after {config.recovery_delay_ns} ns" if config.recovery == "software" else "")
        + ", 128 x 11 recessive bits (one per error-free frame end, more from idle time)",
        "transmitter of an errored frame: the catalog sender of the frame in progress",
        "ACK errors concern the transmitter only; an error-passive transmitter sees no "
        "dominant bit in its passive flag (rule c exception 1 applies)",
        "rule c exception 2 (stuff error on a recessive stuff bit in arbitration) is not "
        "applied: the log does not show the bit; such errors count +8",
        "the log shows every error frame that destroyed a frame; errors only one node saw "
        "while error-passive are invisible",
    ]
    if attributed:
        out.append("first detector: from the error records (by)")
    elif h.kind == "receive-fault" and h.node is not None:
        out.append(f"first detector of unattributed errors: {h.replays[h.node].node} "
                   "while it could send an active error flag (the winning hypothesis)")
    else:
        out.append("first detector of unattributed errors: unknown, no rule-b bonus given "
                   "(receivers +1 only)")
    return out


def _why(ev: BusEvidence, h: Hypothesis, best: Hypothesis) -> str:
    facts = h.facts
    n_err = facts.get("errors", 0)
    name = ev.nodes[h.node] if h.node is not None else None
    if h.kind == "bus-disturbance":
        text = (f"errors spread over senders by bus time; {n_err} errored frames with a known "
                "sender" + _spread(ev))
    elif h.kind == "transmit-fault":
        text = (f"errors on {name}'s frames only: {facts['own_errors']} of {n_err} were "
                f"({facts['own_frames']} good frames of its own)")
    elif h.kind == "isolation" and facts.get("far_side"):
        rep = h.replays[h.node] if h.node is not None else None
        tr = rep.first_degradation() if rep else None
        when = f"; it would reach {tr['to']} at {tr['t_ns'] / 1e9:.6f} s" if tr else ""
        text = (f"{name} cut off on the far side of the logger: its frames vanish and its ACK "
                f"errors go unseen{when}; a node that simply stopped looks the same unless "
                "ESI bits or status records after its return tell them apart")
    elif h.kind == "isolation":
        text = f"ACK errors on {name}'s frames only: {facts['own_ack']} of {n_err} were"
    elif h.kind == "receive-fault":
        rep = h.replays[h.node] if h.node is not None else None
        tr = rep.first_degradation() if rep else None
        reach = f"reaches {tr['to']} at {tr['t_ns'] / 1e9:.6f} s" if tr else "never degrades"
        text = f"{name} as first detector {reach}"
        if facts.get("passive_frames", 0) or facts.get("after_passive", 0):
            text += (f"; while it was error-passive {facts.get('after_passive_own', 0)} of "
                     f"{facts.get('after_passive', 0)} errors fell on its own frames "
                     f"(predicted: all) over {facts.get('passive_frames', 0)} frames")
        else:
            text += ", so it predicts nothing the whole-bus explanation does not"
    else:
        text = f"{name} fell silent with no errors explaining it"
    parts = ", ".join(f"{k} {v:.1f}" for k, v in h.parts.items() if v)
    if not math.isfinite(h.loglik):
        return text + "; ruled out: the error rates do not differ by the factor it predicts"
    text += f"; log-likelihood {h.loglik:.1f}" + (f" ({parts})" if parts else "")
    if h is not best:
        text += f", {best.loglik + _log(best.prior) - h.loglik - _log(h.prior):.1f} below the best"
    return text


def _spread(ev: BusEvidence) -> str:
    """'; most on X: k of n errors for p % of the bus time' (the sender furthest above its
    share)."""
    tx = ev.events.filter(pl.col("kind") == KIND_ERROR)["tx"].to_numpy()
    tx = tx[tx >= 0]
    if tx.size == 0 or not ev.nodes:
        return ""
    counts = np.bincount(tx, minlength=len(ev.nodes))
    n = int(np.argmax(counts / tx.size - ev.share))
    return (f"; most above its share: {ev.nodes[n]} with {int(counts[n])} of {tx.size} errors "
            f"for {ev.share[n]:.0%} of the bus time")


def _log(x: float) -> float:
    return math.log(x) if x > 0 else float("-inf")


def _sentence(ev: BusEvidence, cause: dict[str, Any], first: dict[str, Any] | None,
              hyps: list[Hypothesis], thin: bool, clean: bool) -> str:
    if clean:
        return f"{ev.run}/{ev.bus}: clean bus, no error frames and no unexplained silences."
    lead = (f"{first['node']} degraded first: {first['state']} at {first['t_ns'] / 1e9:.6f} s"
            + (f" ({first['wall_time']})" if first.get("wall_time") else "")) if first else \
        "no node left error-active in the replay"
    if thin:
        return (f"{ev.run}/{ev.bus}: {lead}. Evidence too thin to name a cause "
                f"(best: {hyps[0].name}, score {hyps[0].score:.2f}).")
    what = {"bus-disturbance": "a disturbance of the whole bus",
            "receive-fault": f"a receive-side fault in {cause['node']}",
            "transmit-fault": f"a transmit-side fault in {cause['node']}",
            "isolation": f"{cause['node']} cut off from the bus (no ACK)"
            + (" or, equally likely from this log, it stopped sending"
               if hyps[0].facts.get("far_side") and len(hyps) > 1
               and hyps[1].kind == "silence" and hyps[1].score >= 0.9 * hyps[0].score else ""),
            "silence": f"{cause['node']} falling silent"}.get(cause["kind"], cause["kind"])
    return f"{ev.run}/{ev.bus}: {lead}. Most likely cause: {what} (score {hyps[0].score:.2f})."


def _evidence(ev: BusEvidence, h: Hypothesis, silences: list[Silence],
              first: dict[str, Any] | None) -> dict[str, Any]:
    errors = ev.events.filter(pl.col("kind") == KIND_ERROR)
    names = dict(enumerate(ev.nodes))
    by_sender = errors.group_by("tx").len().sort("tx")
    decisive: list[dict[str, Any]] = []

    def add(t_ns: int, what: str) -> None:
        row = ev.events.filter(pl.col("t_ns") == t_ns).head(1)
        where = row.select("file", "line").row(0) if row.height else (None, None)
        decisive.append({"t_ns": int(t_ns), "what": what, "file": where[0], "line": where[1]})

    if errors.height:
        add(int(errors["t_ns"][0]), "first error frame")
    for rep in h.replays:  # loop over nodes and their transitions (rare)
        for tr in rep.transitions[:6]:
            add(tr["t_ns"], f"{rep.node}: {tr['from']} -> {tr['to']}")
    for s in silences[:10]:
        decisive.append({"t_ns": s.from_ns, "what": f"{ev.nodes[s.node]} silent until "
                         f"{s.to_ns if s.to_ns is not None else 'the end of the log'}",
                         "file": None, "line": None})
    esi_set = int((ev.frame_esi == 2).sum())
    decisive.sort(key=lambda d: d["t_ns"])
    return {
        "errors": errors.height,
        "by_type": dict(sorted(errors.group_by("type").len().iter_rows())),
        "by_sender": {names.get(int(tx), "unknown"): int(n)
                      for tx, n in by_sender.iter_rows()},
        "attributed": int((errors["by_node"] >= 0).sum()) if errors.height else 0,
        "frames": ev.frames,
        "esi_frames": esi_set,
        "status_records": int(ev.events.filter(pl.col("kind") != KIND_ERROR).height),
        "losses": int(ev.losses.shape[0]),
        "silences": [{"node": ev.nodes[s.node], "from_ns": s.from_ns, "to_ns": s.to_ns}
                     for s in silences],
        "decisive": decisive[:40],
    }


def _counters_frame(ev: BusEvidence, h: Hypothesis) -> pl.DataFrame:
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
        parts.append(frame.with_columns(pl.lit(rep.node).alias("node")))
    if not parts:
        return pl.DataFrame(schema=COUNTERS_SCHEMA)
    out = pl.concat(parts).with_columns(pl.lit(ev.run).alias("run"), pl.lit(ev.bus).alias("bus"),
                                        pl.lit(h.name).alias("hypothesis"))
    return out.select(list(COUNTERS_SCHEMA)).sort(["node", "t_ns"], maintain_order=True)


def _states_frame(ev: BusEvidence, h: Hypothesis) -> pl.DataFrame:
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


def _verdicts_frame(results: list[dict[str, Any]]) -> pl.DataFrame:
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


def describe_results(results: list[dict[str, Any]]) -> str:
    """A summary a validation engineer can paste into an incident report."""
    if not results:
        return "faults: no frames or errors in the selected runs."
    lines: list[str] = []
    for r in results:  # loop over (run, bus) verdicts
        lines.append(r["verdict"])
        ev = r["evidence"]
        by_type = ", ".join(f"{k} {v}" for k, v in ev["by_type"].items()) or "none"
        by_sender = ", ".join(f"{k} {v}" for k, v in ev["by_sender"].items()) or "none"
        lines.append(f"  evidence: {ev['errors']} error frames ({by_type}); by sender: "
                     f"{by_sender}; {ev['frames']} frames, {ev['esi_frames']} with ESI, "
                     f"{ev['status_records']} status records, {ev['losses']} logger losses")
        for h in r["hypotheses"][:3]:
            lines.append(f"  {h['score']:6.3f}  {h['name']}: {h['why']}")
        for node in r["nodes"]:
            if node["transitions"]:
                steps = "; ".join(f"{tr['to']} at {tr['t_ns'] / 1e9:.6f} s"
                                  for tr in node["transitions"][:6])
                more = " ..." if len(node["transitions"]) > 6 else ""
                lines.append(f"  {node['node']}: max TEC {node['max_tec']}, max REC "
                             f"{node['max_rec']}; {steps}{more}")
        sa = r["status_agreement"]
        if sa:
            lines.append(f"  status records: {sa['state_equal']} of {sa['records']} agree on "
                         f"the state (max TEC diff {sa['max_tec_diff']}, max REC diff "
                         f"{sa['max_rec_diff']})")
        for d in ev["decisive"][:8]:
            where = f" [{d['file']}:{d['line']}]" if d.get("file") else ""
            lines.append(f"  {d['t_ns'] / 1e9:12.6f} s  {d['what']}{where}")
        lines.append("")
    return "\n".join(lines).rstrip()

