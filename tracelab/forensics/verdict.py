"""The verdict per (run, bus): who degraded first, when, why, and how sure we are.

``replay_faults`` joins the replay and the hypotheses and returns plain tables and the JSON
object ``tracelab faults --json`` prints (the shape is spec: issue 5, section 2).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import polars as pl

from tracelab.forensics.evidence import (
    ASSUMED_BPS,
    KIND_ERROR,
    BusEvidence,
    CatalogLike,
    evidence_window,
    frames_by_id,
    load_bus_evidence,
    prepare_counts,
    run_buses,
    single_pair,
)
from tracelab.forensics.hypotheses import (
    MIN_ERRORS,
    PASSIVE_BOUNDARY_ERRORS,
    Flood,
    Hypothesis,
    Silence,
    candidates,
    find_floods,
    node_silences,
    score,
)
from tracelab.forensics.losses import filled_evidence, loss_before, original_rows
from tracelab.forensics.replay import NodeReplay, replay_node
from tracelab.forensics.steps import every_change
from tracelab.format.grammar import wall_time
from tracelab.physics.confinement import DEFAULT_CONFIG, ConfinementConfig

#: Below this posterior the verdict says the evidence does not decide.
MIN_CONFIDENCE = 0.4
#: The catalog must know at least this share of the logged identifiers, and this share of its
#: identifiers must be in the log, before a node is named.
CATALOG_MATCH_MIN = 0.5
#: The confidence falls with the width of [earliest_ns, latest_ns]: halved at this width.
HALF_CONFIDENCE_WIDTH_NS = 50_000_000
#: A reading of the evidence within this factor of the best is stated as an alternative.
ALTERNATIVE_RATIO = 0.2
#: Errors before (after) a node-specific winner's onset that make the earlier (later) window
#: worth a verdict of its own.
WINDOW_MIN_ERRORS = 8
#: Errors in the run that marks a node's transmit-side onset (at least 60 % on its frames).
SEGMENT_RUN = 30
#: The score of a whole-bus verdict whose log holds a transmit-side onset run (SEGMENT_RUN)
#: that no window explained and whose errors lack the CRC errors a whole-bus disturbance
#: leaves on every sender's frames: two signs against the whole bus. (Onset runs alone come
#: by chance under a busy whole-bus disturbance: the run test is scanned over every error
#: and node.)
ONSET_UNEXPLAINED_SCORE = 0.5
#: A window's receive-fault verdict counts only when its node was error-passive over at least
#: this many frames there (otherwise it predicts nothing the whole-bus reading does not).
PASSIVE_MIN_FRAMES = 20

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

#: The assumption a result lists when neither the catalog nor the log names the bit rate.
ASSUMED_RATE_START = "nominal bit rate of bus"
ASSUMED_RATE = (ASSUMED_RATE_START + " {bus}: neither the catalog nor the log header names it; "
                "{kbps} kbit/s assumed (bus-off recovery and error-frame times scale with it)")


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

    def bit_rate_warning(self) -> str | None:
        """One line when the replay assumed a bus's bit rate (neither catalog nor log has it)."""
        assumed = [f"{r['run']}/{r['bus']}" for r in self.results
                   if any(a.startswith(ASSUMED_RATE_START) for a in r.get("assumptions", []))]
        if not assumed:
            return None
        where = ", ".join(assumed[:3]) + (f" and {len(assumed) - 3} more" if len(assumed) > 3
                                          else "")
        return (f"no bit rate known for {where}: the replay assumed {ASSUMED_BPS // 1000} "
                "kbit/s (bus-off recovery and error-frame times scale with it; declare the "
                "bus's nominal rate in the catalog)")

    def catalog_warning(self) -> str | None:
        """One line when the catalog does not match the log on some bus (both figures)."""
        bad = [r for r in self.results if not (r.get("catalog_match") or {}).get("ok", True)]
        if not bad:
            return None
        worst = min(bad, key=lambda r: r["catalog_match"]["logged_known"])
        m = worst["catalog_match"]
        where = ", ".join(f"{r['run']}/{r['bus']}" for r in bad[:3]) + (
            f" and {len(bad) - 3} more" if len(bad) > 3 else "")
        return (f"the catalog does not match the log on {where}: it knows "
                f"{m['logged_known']:.0%} of the logged identifiers and "
                f"{m['catalog_seen']:.0%} of its identifiers were logged; no node is named "
                "(check --catalog)")


def _origin(con: duckdb.DuckDBPyConnection, run: str) -> str | None:
    try:
        row = con.execute("SELECT origin FROM manifest WHERE run = ? AND origin IS NOT NULL "
                          "ORDER BY first_t_ns LIMIT 1", [run]).fetchall()
    except duckdb.Error:
        return None
    return str(row[0][0]) if row and row[0][0] is not None else None


@dataclass(frozen=True)
class CatalogView:
    """What the verdict needs from the catalog for one bus."""

    keys: dict[int, set[tuple[int, bool]]]   # per node index, its periodic (id, ext)
    periods: dict[tuple[int, bool], int]     # period_ns per periodic (id, ext)
    ids: set[tuple[int, bool]]               # every (id, ext) of the bus


def _catalog_view(catalog: CatalogLike, bus: str, nodes: list[str]) -> CatalogView:
    keys: dict[int, set[tuple[int, bool]]] = {}
    periods: dict[tuple[int, bool], int] = {}
    ids: set[tuple[int, bool]] = set()
    frame = catalog.messages_frame().filter(pl.col("bus") == bus)
    for sender, fid, ext, period in frame.select("sender", "id", "ext",
                                                 "period_ns").iter_rows():
        key = (int(fid), bool(ext))
        ids.add(key)
        if period is None:
            continue
        periods[key] = int(period)
        if sender in nodes:
            keys.setdefault(nodes.index(sender), set()).add(key)
    return CatalogView(keys, periods, ids)


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
                                     _catalog_view(catalog, bus, ev.nodes), config)
        if ev.bit_rate_source == "assumed":
            result["assumptions"].append(ASSUMED_RATE.format(bus=bus, kbps=ASSUMED_BPS // 1000))
        results.append(result)
        counters.append(_counters_frame(ev, winner, config))
        states.append(_states_frame(ev, winner))
        del ev, winner  # this bus's frames (and their scratch files) go before the next loads
    counters_df = pl.concat(counters) if counters else pl.DataFrame(schema=COUNTERS_SCHEMA)
    states_df = pl.concat(states) if states else pl.DataFrame(schema=NODE_STATES_SCHEMA)
    return FaultsResult(results, counters_df, states_df, _verdicts_frame(results), frames, events)


@dataclass
class Analysis:
    """The scored hypotheses of one window of one bus."""

    hyps: list[Hypothesis]
    base: list[NodeReplay]
    first: list[NodeReplay]
    silences: list[Silence]
    floods: list[Flood]
    attributed: bool


def analyse(ev: BusEvidence, gaps: pl.DataFrame | None, cat: CatalogView,
            config: ConfinementConfig = DEFAULT_CONFIG) -> Analysis:
    """Replay the candidates of one bus (or one window of it) and score them, best first."""
    # Through logger losses the replay walks the most likely reading: errors at the rate seen
    # around each loss (losses.filled_evidence); the scores still read the logged events only.
    walk = filled_evidence(ev, "rate") if ev.losses.shape[0] else None
    keep = original_rows(walk) if walk is not None else None
    src = walk if walk is not None else ev
    base = [_logged(replay_node(src, n, False, config), keep) for n in range(len(ev.nodes))]
    attributed = bool((ev.events.filter(pl.col("kind") == KIND_ERROR)["by_node"]
                       >= 0).all()) if ev.events.height else True
    first = base if attributed else [
        _logged(replay_node(src, n, True, config, keep_rows=False), keep)
        for n in range(len(ev.nodes))]
    silences = node_silences(ev, gaps, cat.keys)
    floods = find_floods(ev, cat.periods)
    hyps = candidates(ev, base, first, silences, floods)
    readings = _loss_variants(ev, hyps, config) if walk is not None and not attributed else []
    score(ev, hyps + readings, silences)
    if readings:
        hyps = _best_readings(hyps, readings)
    # ties (to rounding): a cut-off node before a plain silence, since only the former makes
    # rule-based predictions (docs/forensics.md); otherwise the order of candidates()
    hyps.sort(key=lambda h: (-round(h.score, 6), 0 if h.facts.get("far_side") else 1))
    return Analysis(hyps, base, first, silences, floods, attributed)


#: Readings of a logger loss a receive-fault replay may take (losses.filled_evidence): the
#: most likely one first, then as many errors as the losses can hold, then none.
LOSS_READINGS = ("rate", "upper", "none")


def _loss_reading(ev: BusEvidence, mode: str) -> BusEvidence | None:
    return None if mode == "none" else filled_evidence(ev, mode)


def _loss_variants(ev: BusEvidence, hyps: list[Hypothesis],
                   config: ConfinementConfig) -> list[Hypothesis]:
    """Through a logger loss the counters a receive fault leaves are unknown: the loss may
    have held few errors or many, and a node can even have gone bus-off and recovered inside
    it. Each receive-fault hypothesis is also replayed, every node of it, through the other
    readings of the losses (LOSS_READINGS); _best_readings keeps the one that explains the
    log best (the counters at the loss's end are a nuisance parameter, profiled out)."""
    rx = [h for h in hyps if h.kind == "receive-fault" and h.node is not None]
    out: list[Hypothesis] = []
    if not rx:
        return out
    for mode in LOSS_READINGS[1:]:  # loop over two more readings
        alt = _loss_reading(ev, mode)
        src = alt if alt is not None else ev
        keep = original_rows(alt) if alt is not None else None
        base = [_logged(replay_node(src, m, False, config), keep) for m in range(len(ev.nodes))]
        for h in rx:  # loop over the receive-fault hypotheses (one per node)
            assert h.node is not None
            reps = list(base)
            reps[h.node] = _logged(replay_node(src, h.node, True, config, keep_rows=False), keep)
            v = Hypothesis(h.name, h.kind, h.node, reps, prior=h.prior)
            v.facts = {**h.facts, "fill": mode}
            out.append(v)
    return out


def _best_readings(hyps: list[Hypothesis], readings: list[Hypothesis]) -> list[Hypothesis]:
    """Per receive-fault hypothesis the reading of the losses with the highest likelihood
    (ties keep the earlier reading of LOSS_READINGS), posteriors renormalised over what is
    kept."""
    best: dict[str, Hypothesis] = {}
    for h in hyps + readings:  # the most likely reading comes first in hyps
        if h.kind != "receive-fault":
            continue
        h.facts.setdefault("fill", "rate")
        if h.name not in best or h.loglik > best[h.name].loglik:
            best[h.name] = h
    kept = [best[h.name] if h.kind == "receive-fault" else h for h in hyps]
    finite = [h.loglik + math.log(h.prior) for h in kept if math.isfinite(h.loglik)]
    if finite:
        top = max(finite)
        weights = [math.exp(h.loglik + math.log(h.prior) - top) if math.isfinite(h.loglik)
                   else 0.0 for h in kept]
        total = sum(weights)
        for h, w in zip(kept, weights, strict=True):
            h.score = w / total
    return kept


def _logged(rep: NodeReplay, keep: np.ndarray | None) -> NodeReplay:
    """The replay's per-event states restricted to the logged events."""
    if keep is not None and len(rep.state_before) == keep.size:
        rep.state_before = [st for st, k in zip(rep.state_before, keep.tolist(), strict=True)
                            if k]
    return rep


def _replay_full(ev: BusEvidence, n: int, config: ConfinementConfig,
                 fill: str = "rate") -> NodeReplay:
    """A winner's first-detector replay with every counter row (losses filled as in analyse:
    the reading its hypothesis took)."""
    walk = _loss_reading(ev, fill) if ev.losses.shape[0] else None
    if walk is None:
        return replay_node(ev, n, True, config)
    return _logged(replay_node(walk, n, True, config), original_rows(walk))


def _catalog_match(ev: BusEvidence, cat: CatalogView) -> dict[str, Any]:
    """Share of logged identifiers the catalog knows, and of catalog identifiers logged."""
    logged = {(int(i), bool(x)) for i, x in ev.frames_by_id.select("id", "ext").iter_rows()}
    errs = ev.events.filter((pl.col("kind") == KIND_ERROR) & pl.col("id").is_not_null())
    logged |= {(int(i), bool(x)) for i, x in errs.select("id", "ext").unique().iter_rows()}
    known = len(logged & cat.ids) / len(logged) if logged else 1.0
    seen = len(logged & cat.ids) / len(cat.ids) if cat.ids else (1.0 if not logged else 0.0)
    ok = (known >= CATALOG_MATCH_MIN and seen >= CATALOG_MATCH_MIN) or not logged
    return {"logged_known": round(known, 4), "catalog_seen": round(seen, 4),
            "logged_ids": len(logged), "catalog_ids": len(cat.ids), "ok": ok}


def _onset(ev: BusEvidence, n: int, run: int = 10, share: float = 0.6) -> int | None:
    """t_ns of the first error on node n's frames from which at least ``share`` of the next
    ``run`` errors fall on its frames (the start of a transmit-side run), or None."""
    errors = ev.events.filter(pl.col("kind") == KIND_ERROR)
    return _run_start(errors["tx"].to_numpy(), errors["t_ns"].to_numpy(), n, run, share)


def _run_start(tx: np.ndarray, t: np.ndarray, n: int, run: int, share: float) -> int | None:
    """The time of the first error on n's frames that starts a run of ``run`` errors with at
    least ``share`` on n's frames (errors in time order), or None."""
    if tx.size < run:
        return None
    mine = (tx == n).astype(np.int64)
    window = np.convolve(mine, np.ones(run, dtype=np.int64), mode="valid")
    hit = np.flatnonzero((window >= share * run) & (mine[:window.size] == 1))
    return int(t[int(hit[0])]) if hit.size else None


def _leak_onsets(ev: BusEvidence, hyps: list[Hypothesis], run: int = SEGMENT_RUN,
                 share: float = 0.6) -> list[int]:
    """A receive fault followed by a transmit-side fault on another node: the receive-fault
    reading of the whole log is ruled out by the errors on others' frames while its node was
    replayed passive, and those errors begin where the second fault does. Among the errors
    not on the culprit's own frames (its passive transmissions fail by its own fault), the
    start of a run on one other node's frames; kept when hardly any such errors came before
    it (PASSIVE_BOUNDARY_ERRORS, or 5 % of them)."""
    errors = ev.events.with_row_index("k").filter(pl.col("kind") == KIND_ERROR)
    if errors.height < run:
        return []
    k_idx = errors["k"].to_numpy()
    tx = errors["tx"].to_numpy()
    t = errors["t_ns"].to_numpy()
    out: list[int] = []
    for h in hyps:  # loop over the receive-fault hypotheses (one per node)
        if h.kind != "receive-fault" or h.node is None or math.isfinite(h.loglik):
            continue
        n = h.node
        states = h.replays[n].state_before
        if len(states) != ev.events.height:
            continue
        passive = np.isin(np.asarray(states, dtype=object)[k_idx], ["error-passive",
                                                                      "bus-off"])
        leak = passive & (tx != n)
        rest = tx != n
        for m in range(len(ev.nodes)):  # loop over the other nodes
            if m == n:
                continue
            t_on = _run_start(tx[rest], t[rest], m, run, share)
            if t_on is None:
                continue
            before, total = int((leak & (t < t_on)).sum()), int(leak.sum())
            if before <= max(PASSIVE_BOUNDARY_ERRORS, 0.05 * total) and total > before:
                out.append(t_on)
    return out


def _finding(ev: BusEvidence, h: Hypothesis, win_from: int | None,
             win_to: int | None) -> dict[str, Any]:
    errors = ev.events.filter(pl.col("kind") == KIND_ERROR)
    t = errors["t_ns"].to_numpy()
    tx = errors["tx"].to_numpy()
    lo = ev.first_t_ns if win_from is None else win_from
    hi = ev.last_t_ns + 1 if win_to is None else win_to
    inside = (t >= lo) & (t < hi)
    n_in = int(inside.sum())
    if h.kind in ("transmit-fault", "isolation") and h.node is not None:
        mask = inside & (tx == h.node)
    elif h.kind == "receive-fault" and h.node is not None:
        mask = inside.copy()
        share = float(h.facts.get("share", 1.0))
        explained = int(round(share * n_in))
    elif h.kind in ("silence", "flood"):
        mask = np.zeros(t.size, dtype=bool)
    else:
        mask = inside
    if h.kind != "receive-fault":
        explained = int(mask.sum())
    if h.kind == "flood" and h.flood is not None:
        f_from, f_to = h.flood.from_ns, h.flood.to_ns
    elif h.kind == "silence" and h.node is not None:
        sil = next((s for s in h.facts.get("silences", []) if s.node == h.node), None)
        f_from = sil.from_ns if sil else lo
        f_to = sil.to_ns if sil and sil.to_ns is not None else hi
    elif mask.any():
        f_from, f_to = int(t[mask][0]), int(t[mask][-1])
    else:
        f_from, f_to = lo, hi
    tr = None
    if h.node is not None and h.kind != "flood":
        tr = h.replays[h.node].first_degradation()
    else:
        found = [x for x in (r.first_degradation() for r in h.replays) if x is not None]
        tr = min(found, key=lambda x: x["t_ns"]) if found else None
    return {"kind": h.kind, "node": ev.nodes[h.node] if h.node is not None else None,
            "from_ns": int(f_from), "to_ns": int(f_to), "errors_explained": explained,
            "share": round(explained / n_in, 4) if n_in else None,
            "first_transition": dict(tr) if tr else None,
            "score": round(h.score, 4), "hypothesis": h.name}


def bus_verdict(ev: BusEvidence, origin: str | None, gaps: pl.DataFrame | None,
                cat: CatalogView | dict[int, set[tuple[int, bool]]],
                config: ConfinementConfig = DEFAULT_CONFIG) -> tuple[dict[str, Any], Hypothesis]:
    """Replay the candidates of one bus, score them and write the verdict object."""
    if not isinstance(cat, CatalogView):  # older callers pass the keys only
        cat = CatalogView(cat, {}, set())
    an = analyse(ev, gaps, cat, config)
    hyps, silences = an.hyps, an.silences
    for h in hyps:
        h.facts["silences"] = silences
    attributed_everywhere = an.attributed
    errors = ev.events.filter(pl.col("kind") == KIND_ERROR)
    n_errors = errors.height
    clean = n_errors == 0 and not silences and not an.floods
    winner = hyps[0]
    if winner.kind == "receive-fault" and winner.node is not None and not attributed_everywhere:
        winner.replays[winner.node] = _replay_full(ev, winner.node, config,
                                                   winner.facts.get("fill", "rate"))
    findings = [_finding(ev, winner, None, None)] if not clean else []
    cause_h = winner
    if not clean and winner.kind in ("bus-disturbance", "transmit-fault") \
            and not winner.facts.get("far_side"):
        cause_h, winner, findings = _segment(ev, cat, config, hyps, winner, findings, errors)
    findings.sort(key=lambda f: f["from_ns"])
    catalog_match = _catalog_match(ev, cat)
    known_tx = int((errors["tx"] >= 0).sum()) if n_errors else 0
    blind = not ev.nodes or (n_errors > 0 and known_tx < n_errors / 2)
    mismatch = not catalog_match["ok"]
    thin = ((n_errors < MIN_ERRORS and not silences and not an.floods)
            or cause_h.score < MIN_CONFIDENCE or blind or mismatch)
    alternatives: list[dict[str, Any]] = []
    if clean:
        first_deg = None
        cause: dict[str, Any] = {"kind": "none", "node": None}
        thin = False
    else:
        first_deg = _first_degraded(ev, cause_h, silences, origin)
        if cause_h.kind == "flood":
            first_deg = None
        silent_reading = _silent_reading(ev, hyps, silences, origin)
        if silent_reading is not None:
            first_deg, alternatives = silent_reading
        if thin:
            cause = {"kind": "unknown", "node": None}
        else:
            node = ev.nodes[cause_h.node] if cause_h.node is not None else None
            cause = {"kind": cause_h.kind, "node": node}
            if cause_h.flood is not None:
                cause["id"] = f"{cause_h.flood.id:03X}"
        if thin and mismatch:
            cause["reason"] = (f"the catalog does not match the log: it knows "
                               f"{catalog_match['logged_known']:.0%} of the logged identifiers "
                               f"and {catalog_match['catalog_seen']:.0%} of its identifiers "
                               "were logged")
        elif thin:
            cause["reason"] = "evidence too thin"
    if first_deg is not None and first_deg.get("state") != "silent":
        _bound_first(ev, cause_h, first_deg, config)
    for h in hyps:
        h.why = _why(ev, h, hyps[0])
    conf = _calibrated(ev, cause_h, hyps, first_deg, thin, clean, alternatives, findings)
    if first_deg is not None and first_deg.get("state") != "silent" \
            and cause_h.facts.get("far_side") and cause_h.node is not None \
            and first_deg["node"] == ev.nodes[cause_h.node]:
        # its unseen attempts start at its next release after the cut: which message
        # and its jitter are unknown, so up to one period of its slowest message later
        periods = [cat.periods[k] for k in cat.keys.get(cause_h.node, set())
                   if k in cat.periods]
        if periods:
            first_deg["latest_ns"] = int(first_deg["latest_ns"]) + max(periods)
            first_deg["uncertain"] = True
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
        "verdict": _sentence(ev, cause, first_deg, hyps, thin, clean, cause_h, alternatives,
                             findings, conf)
        + (f" The catalog names the sender of only {known_tx} of {n_errors} errored frames"
           f" ({len(ev.nodes)} nodes on bus {ev.bus}); check --catalog." if blind else ""),
        "runner_up": ({"name": hyps[1].name, "score": round(hyps[1].score, 4),
                       "why": hyps[1].why} if len(hyps) > 1 else None),
        "evidence": _evidence(ev, winner, silences, first_deg),
        "findings": findings,
        "alternatives": alternatives,
        "catalog_match": catalog_match,
        "score": conf,
    }
    if cause_h.flood is not None:
        result["flood"] = _flood_json(ev, cause_h.flood, silences, cat)
    if first_deg is not None:
        first_deg["confidence"] = conf
    return result, winner


def _segment(ev: BusEvidence, cat: CatalogView, config: ConfinementConfig,
             hyps: list[Hypothesis], winner: Hypothesis, findings: list[dict[str, Any]],
             errors: pl.DataFrame) -> tuple[Hypothesis, Hypothesis, list[dict[str, Any]]]:
    """Several faults on one bus: cut the log where one node's frames start to carry most of
    the errors, give each window its own verdict, and keep the cause of the first degradation.

    A later, stronger fault never rewrites who degraded first. A receive fault whose node,
    once error-passive, fails on its own frames is one story (the full-log hypothesis).
    Returns (cause, winner for the counter tables, findings).
    """
    t_err = errors["t_ns"].to_numpy()
    # a run of 30 errors, 60 % on one node's frames: by chance (a node with a quarter of the
    # bus time under a whole-bus disturbance) about 1e-4 (binomial tail, derived)
    onsets = sorted({t for n in range(len(ev.nodes))
                     if (t := _onset(ev, n, run=SEGMENT_RUN, share=0.6)) is not None}
                    | set(_leak_onsets(ev, hyps)))
    cuts: list[int] = []
    for t in onsets:  # loop over a few onset times
        prev = cuts[-1] if cuts else int(t_err[0]) if t_err.size else ev.first_t_ns
        if int(((t_err >= prev) & (t_err < t)).sum()) >= WINDOW_MIN_ERRORS \
                and int((t_err >= t).sum()) >= WINDOW_MIN_ERRORS:
            cuts.append(t)
    if not cuts:
        return winner, winner, findings
    # a run of errors on one node's frames that chance gives the whole-bus reading about
    # 1e-4 of the time: if that reading still stands, it does not explain the run
    winner.facts["onset_cuts"] = len(cuts)
    bounds: list[int | None] = [None, *cuts, None]
    windows: list[tuple[Hypothesis, int | None, int | None]] = []
    pending: int | None = None  # start of windows nothing decided yet
    open_start = False
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):  # loop over a few windows
        w = analyse(evidence_window(ev, lo, hi), None, cat, config).hyps[0]
        start = pending if open_start and w.kind == "receive-fault" else lo
        if open_start:
            # after undecided windows, a receive fault may be read from where they started
            # (its counters build up over both; a window replay starts from zero counters)
            merged = analyse(evidence_window(ev, pending, hi), None, cat, config).hyps[0]
            if merged.kind == "receive-fault":
                w, start = merged, pending
        if w.score < MIN_CONFIDENCE or (w.kind == "receive-fault" and
                                        w.facts.get("passive_frames", 0) < PASSIVE_MIN_FRAMES):
            # undecided (a receive fault that never went passive here predicts nothing the
            # whole-bus reading does not): the next window starts where this one did
            if not open_start:
                pending, open_start = lo, True
            continue
        open_start = False
        if windows and windows[-1][0].name == w.name:
            windows[-1] = (windows[-1][0], windows[-1][1], hi)
            continue
        windows.append((w, start, hi))
    if not windows or (len(windows) == 1 and windows[0][0].name == winner.name):
        return winner, winner, findings
    first_w = windows[0][0]
    if first_w.kind == "receive-fault" and first_w.node is not None and len(windows) > 1 and \
            windows[1][0].kind == "transmit-fault" and windows[1][0].node == first_w.node:
        full = next((h for h in hyps if h.name == first_w.name), None)
        if full is not None and full.node is not None and math.isfinite(full.loglik):
            full.replays[full.node] = _replay_full(ev, full.node, config,
                                                   full.facts.get("fill", "rate"))
            return full, full, [_finding(ev, full, None, None)]
    out = []
    for w, lo, hi in windows:
        if w.kind == "receive-fault" and w.node is not None:
            w.replays[w.node] = _replay_full(evidence_window(ev, lo, hi), w.node, config,
                                             w.facts.get("fill", "rate"))
        out.append(_finding(ev, w, lo, hi))
    times = [(f["first_transition"] or {}).get("t_ns") for f in out]
    known = [(t, i) for i, t in enumerate(times) if t is not None]
    cause = windows[min(known)[1]][0] if known else windows[0][0]
    return cause, winner, out


def _flood_json(ev: BusEvidence, f: Flood, silences: list[Silence],
                cat: CatalogView) -> dict[str, Any]:
    starved = sorted({f"{i:03X}" for s in silences if s.from_ns <= f.to_ns
                      and (s.to_ns is None or s.to_ns >= f.from_ns)
                      for i, _x in cat.keys.get(s.node, set())})
    return {"id": f"{f.id:03X}", "ext": f.ext,
            "sender": ev.nodes[f.sender] if f.sender >= 0 else None,
            "from_ns": f.from_ns, "to_ns": f.to_ns, "frames": f.frames,
            "per_s": round(f.frames / max(1e-9, (f.to_ns - f.from_ns) / 1e9), 1),
            "catalog_frames": round(f.catalog_frames, 1) if f.catalog_frames is not None
            else None, "in_catalog": f.catalog_frames is not None,
            "starved": starved,
            "starved_nodes": sorted({ev.nodes[s.node] for s in silences
                                     if s.from_ns <= f.to_ns
                                     and (s.to_ns is None or s.to_ns >= f.from_ns)})}


def _silent_reading(ev: BusEvidence, hyps: list[Hypothesis], silences: list[Silence],
                    origin: str | None) -> tuple[dict[str, Any], list[dict[str, Any]]] | None:
    """When the leader is a vanished node (cut off or stopped) and the other reading is still
    in the running, report what was observed (silent, from when) and both readings."""
    lead = hyps[0]
    if lead.node is None or not (lead.kind == "silence" or lead.facts.get("far_side")):
        return None
    n = lead.node
    pair = [h for h in hyps if h.node == n and (h.kind == "silence" or h.facts.get("far_side"))]
    if len(pair) < 2 or min(h.score for h in pair) < ALTERNATIVE_RATIO * lead.score:
        return None
    s = next(x for x in silences if x.node == n)
    latest = s.latest_from_ns if s.latest_from_ns is not None else s.from_ns
    first = {"node": ev.nodes[n], "state": "silent", "t_ns": s.from_ns,
             "wall_time": wall_time(origin, s.from_ns), "confidence": 0.0,
             "worst_state": "silent", "worst_t_ns": s.from_ns,
             "earliest_ns": s.from_ns, "latest_ns": latest, "until_ns": s.to_ns}
    alts = []
    for h in pair:
        rep = h.replays[n]
        alts.append({"reading": "cut off" if h.kind == "isolation" else "stopped sending",
                     "hypothesis": h.name, "kind": h.kind, "score": round(h.score, 4),
                     "transitions": [dict(tr) for tr in rep.transitions]
                     if h.kind == "isolation" else []})
    return first, alts


def _bound_first(ev: BusEvidence, h: Hypothesis, first: dict[str, Any],
                 config: ConfinementConfig) -> None:
    """earliest_ns / latest_ns of the first degradation through logger losses before it:
    the reading with as many errors as each loss can hold, and the one with none."""
    t = int(first["t_ns"])
    first["earliest_ns"] = first["latest_ns"] = t
    n = ev.node_index(first["node"])
    if n < 0:
        return
    bonus = h.kind == "receive-fault" and h.node == n
    _bound_guessed(ev, n, bonus, first, config)
    if loss_before(ev, t + 1) is None:
        return
    tx = h.node if h.kind in ("transmit-fault", "isolation") else None
    up = filled_evidence(ev, "upper", tx, t)
    readings = [t]
    for src in (up, ev):
        if src is None:
            continue
        rep = replay_node(src, n, bonus, config, keep_rows=False)
        tr = rep.first_degradation()
        if tr is not None:
            readings.append(int(tr["t_ns"]))
    lo = loss_before(ev, t + 1)
    earliest = max(min(readings), lo[0]) if lo and min(readings) < t else min(readings)
    widened = earliest < int(first["earliest_ns"]) or max(readings) > int(first["latest_ns"])
    first["earliest_ns"] = min(earliest, int(first["earliest_ns"]))
    first["latest_ns"] = max(max(readings), int(first["latest_ns"]))
    first["uncertain"] = first["earliest_ns"] != first["latest_ns"]
    if widened:
        first.setdefault("bounds_from", []).append("a logger loss")


#: At most this many frames of the back-to-back run after an unidentified error are taken as
#: its possible retransmission (docs/forensics.md section 2 gives the coverage on the sweep).
GUESS_RUN_FRAMES = 6


def _guess_candidates(ev: BusEvidence, t_ns: np.ndarray) -> np.ndarray:
    """Per error whose frame the logger could not identify: the transmitters it can have had,
    one column per frame of the run that follows it (-1 past the run's end).

    A destroyed frame is retransmitted at the next bus idle (ISO 11898-1 automatic
    retransmission) and wins arbitration again unless frames of higher priority were released
    meanwhile; those go first, back to back, and the retransmission follows them. A bus idle
    ends that: the pending retransmission would have started in it. So the candidates are the
    senders of the frames that follow the error back to back (each within the longest frame
    of the bus and an 11-bit gap, an error-passive transmitter's suspend time and the
    intermission, of the one before), up to GUESS_RUN_FRAMES.
    """
    ft, fn = ev.frame_t, ev.frame_node
    out = np.full((t_ns.size, GUESS_RUN_FRAMES), -1, dtype=np.int64)
    if ft.size == 0 or t_ns.size == 0:
        return out
    by_id = ev.frames_by_id
    per_frame = (by_id["busy_ns"].cast(pl.Float64)
                 / by_id["frames"].cast(pl.Float64).clip(1)).to_numpy()
    longest = float(np.nanmax(per_frame)) if per_frame.size else 0.0
    reach = longest + 11 * ev.bit_ns
    # an error frame in between keeps the bus busy too: up to a frame and 31 bits more each
    # (flag superposed 12, delimiter 8, intermission 3, suspend 8)
    err_t = np.sort(ev.events.filter(pl.col("kind") == KIND_ERROR)["t_ns"].to_numpy())
    per_error = longest + 31 * ev.bit_ns
    i = ft.searchsorted(t_ns, side="right")
    alive = i < ft.size
    for k in range(GUESS_RUN_FRAMES):  # loop over a few positions in the run
        j = np.minimum(i + k, ft.size - 1)
        if k:
            prev = np.minimum(i + k - 1, ft.size - 1)
            between = (np.searchsorted(err_t, ft[j], side="left")
                       - np.searchsorted(err_t, ft[prev], side="right"))
            alive &= (i + k < ft.size) & (ft[j] - ft[prev] <= reach + between * per_error)
        else:  # from the error itself to the first frame after it
            first_gap = ft[j] - t_ns
            between = (np.searchsorted(err_t, ft[j], side="left")
                       - np.searchsorted(err_t, t_ns, side="right"))
            alive &= first_gap <= reach + (between + 1) * per_error
        out[:, k] = np.where(alive, fn[j], -1)
    return out


def _bound_guessed(ev: BusEvidence, n: int, bonus: bool, first: dict[str, Any],
                   config: ConfinementConfig) -> None:
    """Errors whose transmitter was guessed (flag inside the identifier): the first
    degradation of node n with every such error that n can have sent charged to n, and with
    only those that nobody else can have sent (_guess_candidates); the others go to another
    candidate."""
    t = int(first["t_ns"])
    if "tx_inferred" not in ev.events.columns:
        return
    guessed_np = (ev.events["tx_inferred"].fill_null(False).to_numpy()
                  & (ev.events["t_ns"].to_numpy() <= t))
    if not guessed_np.any():
        return
    cand = _guess_candidates(ev, ev.events["t_ns"].to_numpy()[guessed_np].astype(np.int64))
    tx_now = ev.events["tx"].to_numpy().astype(np.int64)
    is_n = cand == n
    someone = (cand >= 0) & ~is_n
    # n is one of those it can have been (or nothing follows back to back: anyone)
    may = is_n.any(axis=1) | (cand[:, 0] < 0)
    must = may & ~someone.any(axis=1)   # n and nobody else
    # someone else it can have been (the first such in the run)
    other = np.where(someone.any(axis=1), cand[np.arange(cand.shape[0]),
                                                someone.argmax(axis=1)], -1)
    times = []
    for charge in (np.where(may, n, tx_now[guessed_np]),
                   np.where(must, n, np.where(may, other, tx_now[guessed_np]))):
        tx_alt = tx_now.copy()
        tx_alt[guessed_np] = charge
        if np.array_equal(tx_alt, tx_now):
            continue
        alt = ev.events.with_columns(pl.Series("tx", tx_alt, dtype=pl.Int16))
        src = dataclasses.replace(ev, events=alt, _recovery_cache={})
        prepare_counts(src)
        tr = replay_node(src, n, bonus, config, keep_rows=False).first_degradation()
        if tr is not None:
            times.append(int(tr["t_ns"]))
    if times:
        first["earliest_ns"] = min(times + [t])
        first["latest_ns"] = max(times + [t])
        first["uncertain"] = first["earliest_ns"] != first["latest_ns"]
        if first["uncertain"]:
            first.setdefault("bounds_from", []).append(
                "errors whose frame the logger could not identify")


def _calibrated(ev: BusEvidence, h: Hypothesis, hyps: list[Hypothesis],
                first: dict[str, Any] | None, thin: bool, clean: bool,
                alternatives: list[dict[str, Any]], findings: list[dict[str, Any]]) -> float:
    """The verdict's score: the posterior of what it states, lowered by what the sweep
    (bench/forensics_sweep.py, docs/forensics.md) shows to be less reliable."""
    if clean:
        return 1.0
    if alternatives:
        p = sum(a["score"] for a in alternatives)
    else:
        p = h.score
    if thin:
        p = min(p, 0.5)
    if h.kind == "bus-disturbance" and h.facts.get("onset_cuts") and h.parts.get("types", 0) < 0:
        p = min(p, ONSET_UNEXPLAINED_SCORE)
    if first is not None:
        width = int(first.get("latest_ns", first["t_ns"])) - int(first.get("earliest_ns",
                                                                         first["t_ns"]))
        # a logger loss before the first degradation hid errors: the hypotheses were scored
        # on part of the evidence, and the wider the loss's reach the less the rest says.
        # Bounds from unidentified frames hide nothing (every error is logged, only its
        # sender is in doubt among the frames that follow it): they do not lower the score.
        lost = ("a logger loss" in (first.get("bounds_from") or [])
                or loss_before(ev, int(first.get("latest_ns", first["t_ns"])) + 1) is not None)
        if first.get("state") != "silent" and width > 0 and lost:
            p *= HALF_CONFIDENCE_WIDTH_NS / (HALF_CONFIDENCE_WIDTH_NS + width)
            if "a logger loss" not in first.setdefault("bounds_from", []):
                first["bounds_from"].append("a logger loss")
    return round(float(min(max(p, 0.0), 1.0)), 3)


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
    elif h.kind == "flood" and h.flood is not None:
        f = h.flood
        rate = f.frames / max(1e-9, (f.to_ns - f.from_ns) / 1e9)
        text = (f"identifier {f.id:03X} sent {f.frames} times from {f.from_ns / 1e9:.3f} s to "
                f"{f.to_ns / 1e9:.3f} s ({rate:.0f}/s), "
                + (f"{f.frames / f.catalog_frames:.0f} x its catalog rate"
                   if f.catalog_frames else "an identifier the catalog does not list")
                + (f", sent by {ev.nodes[f.sender]}" if f.sender >= 0 else ", sender unknown")
                + "; the silences of lower-priority messages in that window follow from it")
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
              hyps: list[Hypothesis], thin: bool, clean: bool, h: Hypothesis | None = None,
              alternatives: list[dict[str, Any]] | None = None,
              findings: list[dict[str, Any]] | None = None, conf: float | None = None) -> str:
    if clean:
        return f"{ev.run}/{ev.bus}: clean bus, no error frames and no unexplained silences."
    h = h or hyps[0]
    when = ""
    if first and first.get("earliest_ns", first["t_ns"]) != first.get("latest_ns",
                                                                       first["t_ns"]):
        why = " and ".join(first.get("bounds_from") or ["a logger loss"])
        when = (f" (between {first['earliest_ns'] / 1e9:.6f} s and "
                f"{first['latest_ns'] / 1e9:.6f} s: {why})")
    if first and first["state"] == "silent":
        lead = (f"{first['node']} fell silent at {first['t_ns'] / 1e9:.6f} s"
                + (f" ({first['wall_time']})" if first.get("wall_time") else "") + when)
    elif first:
        lead = (f"{first['node']} degraded first: {first['state']} at "
                f"{first['t_ns'] / 1e9:.6f} s"
                + (f" ({first['wall_time']})" if first.get("wall_time") else "") + when)
    elif h.kind == "flood":
        lead = "no node left error-active"
    else:
        lead = "no node left error-active in the replay"
    if thin:
        reason = cause.get("reason", "evidence too thin")
        return (f"{ev.run}/{ev.bus}: {lead}. Cause unknown: {reason} "
                f"(best: {hyps[0].name}, score {hyps[0].score:.2f}).")
    f = h.flood
    what = {"bus-disturbance": "a disturbance of the whole bus",
            "receive-fault": f"a receive-side fault in {cause['node']}",
            "transmit-fault": f"a transmit-side fault in {cause['node']}",
            "isolation": f"{cause['node']} cut off from the bus (no ACK)",
            "silence": f"{cause['node']} falling silent",
            "flood": (f"a flood of identifier {f.id if f else 0:03X}"
                      + (f" from {ev.nodes[f.sender]}" if f and f.sender >= 0
                         else " (not in the catalog, sender unknown)")
                      + (f", {f.frames} frames from {f.from_ns / 1e9:.3f} s to "
                         f"{f.to_ns / 1e9:.3f} s, starving the lower-priority messages"
                         if f else ""))}.get(cause["kind"], cause["kind"])
    if conf is not None and conf < h.score - 0.1:
        score_text = (f"score {conf:.2f}; its own score is {h.score:.2f}, lowered because a "
                      "logger loss before the first degradation hid part of the evidence")
    else:
        score_text = f"score {h.score if conf is None else conf:.2f}"
    text = f"{ev.run}/{ev.bus}: {lead}. Most likely cause: {what} ({score_text})."
    if alternatives:
        readings = []
        for alt in alternatives:
            steps = ", ".join(f"{tr['to']} at {tr['t_ns'] / 1e9:.6f} s"
                              for tr in alt["transitions"][:3])
            readings.append(f"if {alt['reading']} (score {alt['score']:.2f}): "
                            + (steps if steps else "no counter change"))
        text += (" Two readings fit equally well; " + "; ".join(readings)
                 + ". ESI bits or status records after its return would tell them apart.")
    later = [x for x in findings or [] if x["hypothesis"] != h.name]
    if later:
        text += " Also found: " + "; ".join(
            f"{x['kind']}" + (f" in {x['node']}" if x["node"] else "")
            + f" from {x['from_ns'] / 1e9:.3f} s" for x in later) + "."
    return text


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
    esi_set = ev.esi_set_frames
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


def _counters_frame(ev: BusEvidence, h: Hypothesis,
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

