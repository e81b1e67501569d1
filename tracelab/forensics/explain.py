"""The words of a verdict: the sentence, each hypothesis's why, the assumptions and the
evidence an engineer can check line by line."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import polars as pl

from tracelab.forensics.evidence import KIND_ERROR, BusEvidence
from tracelab.forensics.hypotheses import Hypothesis, Silence
from tracelab.physics.confinement import ConfinementConfig


def assumptions(config: ConfinementConfig, attributed: bool, h: Hypothesis) -> list[str]:
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
        "errors logged in the arbitration field: +8 to the sender when its own monitoring "
        "found them; under a receive fault of another node its flag cost the sender "
        "arbitration or fell on a recessive stuff bit (rule c exception 2): no TEC change",
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


def why(ev: BusEvidence, h: Hypothesis, best: Hypothesis) -> str:
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


def sentence(ev: BusEvidence, cause: dict[str, Any], first: dict[str, Any] | None,
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


def evidence_json(ev: BusEvidence, h: Hypothesis, silences: list[Silence],
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
