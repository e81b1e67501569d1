"""The verdict per (run, bus): who degraded first, when, why, and how sure we are.

``replay_faults`` joins the replay and the hypotheses and returns plain tables and the JSON
object ``tracelab faults --json`` prints (the shape is spec: issue 5, section 2).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import polars as pl

from tracelab.forensics.bounds import bound_first, calibrated_score, guess_candidates
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
from tracelab.forensics.explain import assumptions, describe_results, evidence_json, sentence, why
from tracelab.forensics.hypotheses import (
    MIN_ERRORS,
    Flood,
    Hypothesis,
    Silence,
    candidates,
    find_floods,
    node_silences,
    score,
)
from tracelab.forensics.losses import filled_evidence, original_rows
from tracelab.forensics.replay import NodeReplay, base_replays, replay_node
from tracelab.forensics.tables import (
    COUNTERS_SCHEMA,
    NODE_STATES_SCHEMA,
    counters_frame,
    states_frame,
    verdicts_frame,
)
from tracelab.format.grammar import wall_time
from tracelab.physics.confinement import DEFAULT_CONFIG, ConfinementConfig
from tracelab.store.row_groups import PartFiles

#: Below this posterior the verdict says the evidence does not decide.
MIN_CONFIDENCE = 0.4
#: The catalog must know at least this share of the logged identifiers, and this share of its
#: identifiers must be in the log, before a node is named.
CATALOG_MATCH_MIN = 0.5
#: A reading of the evidence within this factor of the best is stated as an alternative.
ALTERNATIVE_RATIO = 0.2
#: Errors before (after) a node-specific winner's onset that make the earlier (later) window
#: worth a verdict of its own.
WINDOW_MIN_ERRORS = 8
#: Errors in the run that marks a node's transmit-side onset, and the share on its frames.
SEGMENT_RUN = 30
SEGMENT_SHARE = 0.6
#: The share of that run after a receive-fault winner: its node's flags already put the
#: errors on the other senders' frames in proportion to their traffic (a busy sender may
#: carry 60 % by that alone).
RX_SEGMENT_SHARE = 0.7
#: A window's receive-fault verdict counts only when its node was error-passive over at least
#: this many frames there (otherwise its own frames' errors predict nothing the whole-bus
#: reading does not), or when the window's other evidence (flag lengths, error types, who
#: flagged first) already puts it at WINDOW_DECISIVE or above.
PASSIVE_MIN_FRAMES = 20
WINDOW_DECISIVE = 0.95


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
                  config: ConfinementConfig = DEFAULT_CONFIG,
                  frame_files: Sequence[Path] | None = None) -> FaultsResult:
    """Replay every (run, bus) of the dataset views and give one verdict each.
    ``frame_files``: ``Dataset.frame_files`` of the connection (see load_bus_evidence)."""
    results: list[dict[str, Any]] = []
    counters: list[pl.DataFrame] = []
    states: list[pl.DataFrame] = []
    frames = events = 0
    pair = single_pair(con, run)
    parts = PartFiles(frame_files) if frame_files else None
    by_id = frames_by_id(con, run, pair, parts)
    pairs = run_buses(con, run, by_id)
    alone = len(pairs) == 1 and (run is None or pair is not None)
    for r, bus in pairs:  # loop over (run, bus) pairs
        ev = load_bus_evidence(con, catalog, r, bus, by_id, only_pair=alone, parts=parts)
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
        if winner.evidence is not None:  # the reading the verdict was written from
            ev = winner.evidence
        counters.append(counters_frame(ev, winner, config))
        states.append(states_frame(ev, winner))
        del ev, winner  # this bus's frames (and their scratch files) go before the next loads
    counters_df = pl.concat(counters) if counters else pl.DataFrame(schema=COUNTERS_SCHEMA)
    states_df = pl.concat(states) if states else pl.DataFrame(schema=NODE_STATES_SCHEMA)
    return FaultsResult(results, counters_df, states_df, verdicts_frame(results), frames, events)


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
    base = [_logged(rep, keep) for rep in base_replays(src, config)]
    rx_base = _receive_fault_base(src, config, keep, base)
    attributed = bool((ev.events.filter(pl.col("kind") == KIND_ERROR)["by_node"]
                       >= 0).all()) if ev.events.height else True
    first = base if attributed else [
        _logged(replay_node(src, n, True, config, keep_rows=False), keep)
        for n in range(len(ev.nodes))]
    silences = node_silences(ev, gaps, cat.keys)
    floods = find_floods(ev, cat.periods)
    hyps = candidates(ev, base, first, silences, floods, rx_base)
    readings = _loss_variants(ev, hyps, config) if walk is not None and not attributed else []
    if walk is None:
        readings += _attribution_variants(ev, hyps, config)
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
        base = _receive_fault_base(src, config, keep)
        for h in rx:  # loop over the receive-fault hypotheses (one per node)
            assert h.node is not None
            reps = list(base)
            reps[h.node] = _logged(replay_node(src, h.node, True, config, keep_rows=False), keep)
            v = Hypothesis(h.name, h.kind, h.node, reps, prior=h.prior)
            v.facts = {**h.facts, "fill": mode}
            out.append(v)
    return out


def _attribution_variants(ev: BusEvidence, hyps: list[Hypothesis],
                          config: ConfinementConfig) -> list[Hypothesis]:
    """Errors whose frame the logger could not identify carry a guessed transmitter (the
    sender of what followed them, evidence._retransmitted). Under a fault at node n many of
    them are n's own failed retransmissions, and one wrong guess shifts n's replayed TEC by
    8 and its bus-off by a frame or more. So each receive- and transmit-fault hypothesis of a
    node that may have sent some of them (bounds.guess_candidates) is also scored with those
    charged to n; _best_readings keeps the reading that explains the log best (who sent those
    frames is a nuisance parameter, profiled out as the losses' contents are)."""
    if "tx_inferred" not in ev.events.columns:
        return []
    guessed = ev.events["tx_inferred"].fill_null(False).to_numpy()
    if not guessed.any():
        return []
    tx_now = ev.events["tx"].to_numpy().astype(np.int64)
    cand = guess_candidates(ev, ev.events["t_ns"].to_numpy()[guessed].astype(np.int64))
    readings: dict[int, tuple[BusEvidence, list[NodeReplay], list[NodeReplay]] | None] = {}
    out: list[Hypothesis] = []
    for h in hyps:  # loop over the node hypotheses (a few per node)
        n = h.node
        if h.kind not in ("receive-fault", "transmit-fault") or n is None:
            continue
        if n not in readings:
            may = (cand == n).any(axis=1) | (cand[:, 0] < 0)
            charge = np.where(may, n, tx_now[guessed])
            readings[n] = None
            if not np.array_equal(charge, tx_now[guessed]):
                tx_alt = tx_now.copy()
                tx_alt[guessed] = charge
                alt = dataclasses.replace(
                    ev, events=ev.events.with_columns(pl.Series("tx", tx_alt, dtype=pl.Int16)),
                    _recovery_cache={}, _active_cache={})
                prepare_counts(alt)
                base = base_replays(alt, config, keep_rows=False)
                readings[n] = (alt, base, _receive_fault_base(alt, config, None, base, False))
        reading = readings[n]
        if reading is None:
            continue
        alt, base, rx_base = reading
        reps = list(base)
        if h.kind == "receive-fault":
            reps = list(rx_base)
            reps[n] = replay_node(alt, n, True, config, keep_rows=False)
        v = Hypothesis(h.name, h.kind, n, reps, prior=h.prior, evidence=alt)
        v.facts = dict(h.facts)
        out.append(v)
    return out


def _best_readings(hyps: list[Hypothesis], readings: list[Hypothesis]) -> list[Hypothesis]:
    """Per node hypothesis the reading (of the losses, or of who sent the unidentified
    frames) with the highest likelihood (ties keep the earlier reading: the bus's own, then
    LOSS_READINGS in order), posteriors renormalised over what is kept."""
    varied = ("receive-fault", "transmit-fault")
    best: dict[str, Hypothesis] = {}
    for h in hyps + readings:  # the most likely reading comes first in hyps
        if h.kind not in varied:
            continue
        if h.kind == "receive-fault":
            h.facts.setdefault("fill", "rate")
        if h.name not in best or h.loglik > best[h.name].loglik:
            best[h.name] = h
    kept = [best[h.name] if h.kind in varied else h for h in hyps]
    finite = [h.loglik + math.log(h.prior) for h in kept if math.isfinite(h.loglik)]
    if finite:
        top = max(finite)
        weights = [math.exp(h.loglik + math.log(h.prior) - top) if math.isfinite(h.loglik)
                   else 0.0 for h in kept]
        total = sum(weights)
        for h, w in zip(kept, weights, strict=True):
            h.score = w / total
    return kept


def _receive_fault_base(ev: BusEvidence, config: ConfinementConfig, keep: np.ndarray | None,
                        base: list[NodeReplay] | None = None,
                        keep_rows: bool = True) -> list[NodeReplay]:
    """The replays of the nodes other than a receive fault's. They differ from the plain
    ones (``base``, replayed here when not given) only when some error was logged in the
    arbitration field of a known sender's frame, which such a fault does not charge to the
    sender's TEC (replay._role_array, foreign_flags)."""
    e = ev.events
    foreign = bool(((e["field"] == "arbitration") & (e["tx"] >= 0)).fill_null(False).any())
    if base is not None and not foreign:
        return base
    return [_logged(rep, keep) for rep in base_replays(ev, config, keep_rows=keep_rows,
                                                        foreign_flags=foreign)]


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
    if hyps[0].evidence is not None:  # the winner's reading of who sent unidentified frames
        ev = hyps[0].evidence
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
    if not clean and winner.kind in ("bus-disturbance", "transmit-fault", "receive-fault") \
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
        bound_first(ev, cause_h, first_deg, config)
    for h in hyps:
        h.why = why(ev, h, hyps[0])
    conf = calibrated_score(ev, cause_h, hyps, first_deg, thin, clean, alternatives, findings)
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
        "assumptions": assumptions(config, attributed_everywhere, winner),
        "verdict": sentence(ev, cause, first_deg, hyps, thin, clean, cause_h, alternatives,
                             findings, conf)
        + (f" The catalog names the sender of only {known_tx} of {n_errors} errored frames"
           f" ({len(ev.nodes)} nodes on bus {ev.bus}); check --catalog." if blind else ""),
        "runner_up": ({"name": hyps[1].name, "score": round(hyps[1].score, 4),
                       "why": hyps[1].why} if len(hyps) > 1 else None),
        "evidence": evidence_json(ev, winner, silences, first_deg),
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
    Runs after a whole-bus, transmit-fault or receive-fault winner (a receive fault first and
    a stronger transmit fault of another node later read as one receive fault elsewhere).

    A later, stronger fault never rewrites who degraded first. A receive fault whose node,
    once error-passive, fails on its own frames is one story (the full-log hypothesis).
    Returns (cause, winner for the counter tables, findings).
    """
    t_err = errors["t_ns"].to_numpy()
    # a run of 30 errors, 60 % on one node's frames: by chance (a node with a quarter of the
    # bus time under a whole-bus disturbance) about 1e-4 (binomial tail, derived)
    # after a receive-fault winner, its own node's frames carrying the errors is its own
    # story (once error-passive it fails on them): only another node's onset cuts the log
    own = winner.node if winner.kind == "receive-fault" else None
    share = SEGMENT_SHARE if own is None else RX_SEGMENT_SHARE
    onsets = sorted({t for n in range(len(ev.nodes)) if n != own
                     if (t := _onset(ev, n, run=SEGMENT_RUN, share=share)) is not None})
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
        if w.score < MIN_CONFIDENCE or (w.kind == "receive-fault" and w.score < WINDOW_DECISIVE
                                        and w.facts.get("passive_frames", 0) < PASSIVE_MIN_FRAMES):
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
            src = w.evidence if w.evidence is not None else evidence_window(ev, lo, hi)
            w.replays[w.node] = _replay_full(src, w.node, config, w.facts.get("fill", "rate"))
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


