"""The run report page: sections in a fixed order, figures embedded as JSON, plotly.js once.

Every string from a log or catalog passes through ``esc`` (HTML) and the figure JSON is
written with ``<``, ``>`` and ``&`` as JSON escapes, so no data can close a script element.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import plotly.graph_objects as go
import polars as pl

from tracelab import __version__
from tracelab.analyses.envelopes import ReportData
from tracelab.report import figures, style
from tracelab.report import signals as signal_figures
from tracelab.report.figures import NS_PER_S, esc, message_label
from tracelab.wording import counted, percent

PLOTLY_FILE = "plotly.min.js"
PAGE_ROWS = 25  # rows per page of a long table
LOSS_ROWS = 10
CAUTION = ("Findings support, and do not replace, the engineer's judgement and the applicable "
           "functional-safety process and regulations.")
CAUSE_WORDS = {"bus-disturbance": "a disturbance of the whole bus",
               "receive-fault": "a receive-side fault", "transmit-fault": "a transmit-side fault",
               "isolation": "a node cut off from the bus (no ACK)",
               "silence": "a node falling silent"}
STATE_WORDS = {"warning": "the warning limit", "error-passive": "error-passive",
               "bus-off": "bus-off", "error-active": "error-active"}


def plotly_js() -> str:
    """The plotly.js bundle shipped with the plotly package (offline, no CDN)."""
    from plotly.offline import get_plotlyjs

    return str(get_plotlyjs())


def _secs(t_ns: Any) -> str:
    return "-" if t_ns is None else f"{t_ns / NS_PER_S:.3f} s"


def _bps(value: Any) -> str:
    if not value:
        return "-"
    value = float(value)
    return f"{value / 1e6:g} Mbit/s" if value >= 1e6 else f"{value / 1e3:g} kbit/s"


def _confidence(value: Any) -> str:
    """A probability as a percentage; other values as given (plain text)."""
    if isinstance(value, int | float):
        return f"{value:.0%}" if value <= 1 else f"{value:g}"
    return "-" if value is None else str(value)


def _results(data: ReportData) -> list[dict[str, Any]]:
    return list((data.faults or {}).get("results", []) or [])


def verdict_sentence(faults: dict[str, Any] | None, errors: int = 0) -> tuple[str, str]:
    """The verdict in one plain-text sentence, and its tone: ok / bad / unknown.

    ``faults`` is the faults.json object (None when the replay has not run)."""
    if faults is None:
        if not errors:
            return ("No error frames in this run; fault-confinement replay not run "
                    "(give a catalog to replay the counters).", "unknown")
        return (f"{errors:,} error frames; fault-confinement replay not run "
                "(give a catalog to name the node that degraded first).", "unknown")
    degraded = [r for r in faults.get("results", []) or [] if r.get("first_degraded")]
    if not degraded:
        floods = [r for r in faults.get("results", []) or []
                  if (r.get("cause") or {}).get("kind") == "flood" and r.get("flood")]
        if floods:  # no node degraded, but the bus was not clean: one identifier starved it
            parts = []
            for r in floods:
                f = r["flood"]
                who = f" from {f['sender']}" if f.get("sender") else ""
                where = "" if f.get("in_catalog") else " (not in the catalog)"
                starved = ", ".join(f.get("starved_nodes") or []) or "no node named"
                parts.append(f"bus {r.get('bus')}: identifier {f.get('id')}{who}{where} "
                             f"flooded the bus from {_secs(f.get('from_ns'))} to "
                             f"{_secs(f.get('to_ns'))} ({f.get('per_s')} frames/s), "
                             f"starving {starved}")
            return ("No node left error-active, but " + "; ".join(parts) + ".", "bad")
        return "Clean run: no node left error-active.", "ok"
    first = min(degraded, key=lambda r: r["first_degraded"].get("t_ns") or 0)
    fd = first["first_degraded"]
    when = _secs(fd.get("t_ns"))
    if fd.get("wall_time"):
        when += f" ({fd['wall_time']})"
    state = fd.get("state")
    reached = "fell silent" if state == "silent" else \
        f"reached {STATE_WORDS.get(state, state)}"
    lo, hi = fd.get("earliest_ns"), fd.get("latest_ns")
    wide = isinstance(lo, int | float) and isinstance(hi, int | float) and hi > lo
    if wide:
        why = " and ".join(fd.get("bounds_from") or ["a logger loss"])
        when = (f"between {_secs(lo)} and {_secs(hi)} (the exact moment is open: {why}; "
                f"best estimate {when})")
    else:
        when = f"at {when}"
    text = (f"{fd.get('node')} on bus {first.get('bus')} degraded first: {reached} {when}, "
            f"score {_score(fd.get('confidence'))}")
    best = max((h.get("score") or 0 for h in first.get("hypotheses") or []), default=None)
    lost = "a logger loss" in (fd.get("bounds_from") or [])
    if wide and lost and isinstance(best, int | float) \
            and best > (fd.get("confidence") or 0) + 0.1:
        text += (f" (lowered because a logger loss before it hid part of the evidence; the "
                 f"cause's own score is {float(best):.2f})")
    cause = cause_words(first.get("cause"))
    known = (first.get("cause") or {}).get("kind") not in (None, "none", "unknown")
    text += f"; {'most likely cause: ' if known else ''}{cause}."
    readings = [a for a in fd.get("alternatives") or first.get("alternatives") or []
                if isinstance(a, dict)]
    if readings:
        text += " The log cannot decide between " + "; ".join(
            _reading(a) for a in readings) + "."
    return text, "bad"


def _score(value: Any) -> str:
    """A verdict score as a number out of 1 (two decimals): "1.00" against "0.00" reads as
    the calibrated score it is, not as a certainty in percent."""
    if isinstance(value, int | float):
        return f"{float(value):.2f} of 1"
    return "-" if value is None else str(value)


def _reading(alt: dict[str, Any]) -> str:
    """One reading of an ambiguous log in words: 'if cut off: warning at 1.200 s, ...'."""
    name = alt.get("reading") or alt.get("if") or alt.get("kind") or alt.get("name") or "?"
    steps = alt.get("transitions") or alt.get("predicted") or []
    said = []
    for t in steps:  # a few predicted transitions
        if isinstance(t, dict):
            state = str(t.get("state") or t.get("to") or "")
            said.append(f"{STATE_WORDS.get(state, state)} at {_secs(t.get('t_ns'))}")
    return f"if {str(name).replace('-', ' ')}: {', '.join(said) or 'no transition predicted'}"


def cause_words(cause: dict[str, Any] | None) -> str:
    """The cause of a verdict in words."""
    kind, node = (cause or {}).get("kind"), (cause or {}).get("node")
    if kind in (None, "none"):
        return "no cause named"
    if kind == "unknown":
        return "the evidence is too thin to name a cause"
    what = CAUSE_WORDS.get(kind, kind.replace("-", " "))
    return what + (f" ({node})" if node else "")


def verdict(data: ReportData) -> tuple[str, str]:
    """The verdict sentence HTML-escaped, and its tone."""
    text, tone = verdict_sentence(data.faults, int(data.header.get("errors", 0) or 0))
    return esc(text), tone


def _facts(items: list[tuple[str, str]]) -> str:
    cells = "".join(f"<div><dt>{k}</dt><dd>{v}</dd></div>" for k, v in items)
    return f'<dl class="facts">{cells}</dl>'


def header_section(data: ReportData) -> str:
    h = data.header
    items: list[tuple[str, str]] = []
    if h.get("vehicle"):
        items.append(("vehicle", esc(h["vehicle"])))
    for key, value in (h.get("meta") or {}).items():
        if key not in ("run", "vehicle"):
            items.append((esc(key), esc(value)))
    if h.get("wall_start"):
        items.append(("wall clock (UTC)",
                      f"{esc(h['wall_start'])}<br>{esc(h.get('wall_end') or '')}"))
    items.append(("log time", f"{_secs(data.t0_ns)} .. {_secs(data.t1_ns)}"))
    items.append(("duration", f"{(data.t1_ns - data.t0_ns) / NS_PER_S:,.1f} s"))
    for index, bus in enumerate(h.get("buses") or []):
        rate = _bps(bus.get("nominal_bps"))
        if bus.get("data_bps"):
            rate += f" / data {_bps(bus['data_bps'])}"
        name = f" ({esc(bus['name'])})" if bus.get("name") else ""
        swatch = f'<span class="swatch" style="background:{style.bus_colour(index)}"></span>'
        items.append((f"bus {esc(bus.get('alias'))}", f"{swatch}{rate}{name}"))
    for key in ("frames", "errors", "rejects", "marks"):
        value = int(h.get(key, 0) or 0)
        cls = ' class="bad-cell"' if key == "errors" and value else ""
        items.append((key, f"<span{cls}>{value:,}</span>"))
    files = ", ".join(esc(Path(f).name) for f in h.get("files") or [])
    return (f'<section id="header"><h1>Run {esc(data.run)}</h1>'
            f'<p class="sub">{files}</p>{_facts(items)}</section>')


def _evidence_item(item: Any) -> str:
    if isinstance(item, dict):
        when = _secs(item["t_ns"]) + ": " if isinstance(item.get("t_ns"), int | float) else ""
        where = (f" <code>{esc(Path(str(item['file'])).name)}:{esc(item.get('line'))}</code>"
                 if item.get("file") else "")
        for key in ("what", "text", "summary", "detail", "description", "reason", "why"):
            if item.get(key):
                return f"<li>{when}{esc(item[key])}{where}</li>"
        rest = {k: v for k, v in item.items() if k != "t_ns"}
        return f"<li>{when}<code>{esc(json.dumps(rest, default=str))}</code></li>"
    return f"<li>{esc(item)}</li>"


def verdict_section(data: ReportData) -> str:
    """The verdict stated once, in words to paste into an incident report; the facts per bus;
    the technical detail (hypotheses, scores, evidence) behind a disclosure element."""
    text, tone = verdict(data)
    parts = ['<section id="verdict"><h2>Verdict</h2>',
             f'<p id="verdict-line" class="statement {tone}">{text}</p>']
    # degraded buses first (earliest first), clean ones after in one line each
    results = sorted(_results(data), key=lambda r: (
        r.get("first_degraded") is None, (r.get("first_degraded") or {}).get("t_ns") or 0))
    detail: list[str] = []
    for result in results:  # one result per bus: a handful
        fd = result.get("first_degraded")
        bus = esc(result.get("bus"))
        if not fd:
            parts.append(f'<p class="muted">bus {bus}: no node left error-active.</p>')
        else:
            when = _secs(fd.get("t_ns")) + (f" ({esc(fd['wall_time'])})"
                                             if fd.get("wall_time") else "")
            facts = [
                ("bus", bus), ("first degraded node", f"<b>{esc(fd.get('node'))}</b>"),
                ("first state out of error-active", esc(fd.get("state"))), ("when", when),
                ("score (calibrated)", esc(_score(fd.get("confidence")))),
                ("most likely cause", esc(cause_words(result.get("cause")))),
            ]
            lo, hi = fd.get("earliest_ns"), fd.get("latest_ns")
            if isinstance(lo, int | float) and isinstance(hi, int | float) and hi > lo:
                facts.insert(4, ("could be as early / late as",
                                 f"{_secs(lo)} / {_secs(hi)}"))
            if fd.get("worst_state") and fd.get("worst_state") != fd.get("state"):
                facts.insert(4, ("worst state", f"{esc(fd['worst_state'])} at "
                                                f"{_secs(fd.get('worst_t_ns'))}"))
            parts.append(_facts(facts))
        detail.append(_technical_detail(result))
    if detail:
        parts.append('<details class="tech" id="verdict-detail"><summary>Technical detail: '
                     "hypotheses, scores, findings and decisive evidence</summary>"
                     + "".join(detail) + "</details>")
    parts.append("</section>")
    return "".join(parts)


def _technical_detail(result: dict[str, Any]) -> str:
    """Hypotheses with their scores and reasons, findings, evidence and nodes of one bus."""
    bus = esc(result.get("bus"))
    parts = [f"<h3>bus {bus}</h3>"]
    if result.get("verdict"):
        parts.append(f"<p>{esc(result['verdict'])}</p>")
    hypotheses = sorted(result.get("hypotheses") or [], key=lambda h: -(h.get("score") or 0))
    if hypotheses:
        rows = "".join(
            f"<tr><td>{'best' if i == 0 else 'runner-up' if i == 1 else ''}</td>"
            f"<td class='msg'>{esc(h.get('name'))}</td>"
            f"<td class='num'>{esc(_score(h.get('score')))}</td>"
            f"<td>{esc(h.get('why'))}</td></tr>" for i, h in enumerate(hypotheses[:6]))
        parts.append(_table(f"hypotheses-{bus}", "<th></th><th>hypothesis</th>"
                            "<th class='num'>score</th><th>why</th>", rows))
    findings = result.get("findings") or []
    if findings:
        rows = "".join(
            f"<tr><td>{esc(f.get('kind'))}</td><td>{esc(f.get('node') or '')}</td>"
            f"<td class='num'>{_secs(f.get('from_ns'))}</td>"
            f"<td class='num'>{_secs(f.get('to_ns'))}</td>"
            f"<td class='num'>{esc(_int(f.get('errors_explained')))}</td>"
            f"<td class='num'>{esc(percent(f.get('share'), 0, ''))}</td></tr>"
            for f in findings if isinstance(f, dict))
        parts.append("<h3>findings, in time order</h3>" + _table(
            f"findings-{bus}", "<th>kind</th><th>node</th><th class='num'>from</th>"
            "<th class='num'>to</th><th class='num'>errors explained</th>"
            "<th class='num'>share</th>", rows))
    evidence = result.get("evidence") or {}
    decisive = evidence.get("decisive", []) if isinstance(evidence, dict) else evidence
    if isinstance(evidence, dict) and evidence.get("errors") is not None:
        by_type = ", ".join(f"{esc(k)} {esc(v)}" for k, v in
                            (evidence.get("by_type") or {}).items()) or "none"
        by_sender = ", ".join(f"{esc(k)} {esc(v)}" for k, v in
                              (evidence.get("by_sender") or {}).items()) or "none"
        parts.append(f"<p class='note'>{esc(_int(evidence['errors']))} error frames "
                     f"({by_type}); on the frames of: {by_sender}.</p>")
    if decisive:
        items = "".join(_evidence_item(e) for e in list(decisive)[:12])
        parts.append(f'<h3>decisive evidence</h3><ul class="evidence">{items}</ul>')
    nodes = result.get("nodes") or []
    if nodes:
        rows = "".join(
            f"<tr><td>{esc(n.get('node'))}</td><td class='num'>{esc(n.get('max_tec'))}</td>"
            f"<td class='num'>{esc(n.get('max_rec'))}</td>"
            f"<td class='num'>{esc(_count(n.get('transitions')))}</td>"
            f"<td class='num'>{esc(_count(n.get('bus_off')))}</td></tr>" for n in nodes)
        parts.append("<h3>nodes</h3>" + _table(
            f"nodes-{bus}", "<th>node</th><th class='num'>max TEC</th><th class='num'>max REC"
            "</th><th class='num'>transitions</th><th class='num'>bus-off</th>", rows))
    return "".join(parts)


def _table(table_id: str, head: str, rows: str, pager: bool = False) -> str:
    """A table with a CSV download button; long ones (``pager``) paginate in the page script,
    the header sticks to the top of the window while scrolling (no inner scroll box)."""
    tid = esc(table_id)
    attrs = ' data-pager="25"' if pager else ""
    return (f'<div class="tools"><button type="button" class="csv" data-table="{tid}">'
            "download CSV</button></div>"
            f'<div class="wide"><table id="{tid}"{attrs}><thead><tr>{head}</tr></thead>'
            f"<tbody>{rows}</tbody></table></div>")


def _int(value: Any) -> str:
    return "" if value is None else f"{int(value):,}"


def _count(value: Any) -> Any:
    return len(value) if isinstance(value, list | tuple) else value


TIMING_COLUMNS = (  # column, heading, format
    ("sender", "sender", "{}"), ("period_ns", "period", "ms"),
    ("median_ns", "median", "ms"), ("cycle_std_ns", "cycle σ", "ms"),
    ("phase_std_ns", "phase σ", "ms"), ("phase_max_abs_ns", "max |phase|", "ms"),
    ("drift_ppm", "drift", "{:+.1f} ppm"), ("frames", "frames", "{:,}"),
    ("missing", "missing", "{:,}"), ("missing_in_loss", "logger lost", "{:,}"),
    ("gaps", "gaps", "{:,}"), ("bursts", "bursts", "{:,}"),
)


def _duration(ns: float) -> str:
    """A duration in the unit that reads best: 761 µs, 20.001 ms, 1.5 s."""
    size = abs(ns)
    if size >= 1e9:
        return f"{ns / 1e9:,.4g} s"
    if size >= 1e6:
        return f"{ns / 1e6:.3f}".rstrip("0").rstrip(".") + " ms"
    if size >= 1e3:
        return f"{ns / 1e3:.0f} µs"
    return f"{ns:.0f} ns"


def _cell(value: Any, fmt: str) -> tuple[str, str]:
    if value is None:
        return "", ""
    if fmt == "ms":
        return _duration(float(value)), repr(float(value))
    if isinstance(value, int | float):
        return fmt.format(value), repr(float(value))
    return esc(value), esc(value)


def timing_table(timing: pl.DataFrame) -> str:
    if timing.is_empty():
        return '<p class="muted">No timing analysis for this run.</p>'
    shown = [c for c in TIMING_COLUMNS if c[0] in timing.columns
             and timing[c[0]].null_count() < len(timing)]
    head = "<th class='sort'>message</th>" + "".join(
        f"<th class='sort num'>{h}</th>" if f != "{}" else f"<th class='sort'>{h}</th>"
        for _, h, f in shown)
    body = []
    for row in timing.iter_rows(named=True):  # one row per message: hundreds at most
        label = esc(message_label(row["bus"], row["id"], row["ext"], row["name"]))
        cells = [f"<td class='msg' data-v='{label}'>{label}</td>"]
        for col, _, fmt in shown:
            text, key = _cell(row[col], fmt)
            cls = "num" if fmt != "{}" else ""
            if col == "missing" and row[col]:
                cls += " bad-cell"
            cells.append(f"<td class='{cls}' data-v='{key}'>{text}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return (_table("timing-table", head, "".join(body), pager=len(body) > PAGE_ROWS) +
            '<p class="note">Worst first: missing frames, then phase jitter relative to the '
            "period, then drift. Click a heading to sort. median: median interval; cycle σ / "
            "phase σ: standard deviation of the interval and of the arrival phase; "
            '"logger lost": frames missing inside logger-loss intervals (not a bus fault).</p>')


def top_ids_table(top: pl.DataFrame) -> str:
    if top.is_empty():
        return '<p class="muted">No load analysis for this run.</p>'
    rows = "".join(
        f"<tr><td class='msg'>{esc(message_label(r['bus'], r['id'], r['ext'], r['name']))}</td>"
        f"<td class='num'>{int(r['rank'])}</td><td class='num'>{percent(r['share'], missing='')}</td>"
        f"<td class='num'>{_duration(float(r['busy_ns'] or 0))}</td>"
        f"<td class='num'>{_int(r['frames'])}</td></tr>"
        for r in top.iter_rows(named=True))  # five per bus
    return _table("top-ids-table", "<th>message</th><th class='num'>rank</th>"
                  "<th class='num'>share of busy time</th><th class='num'>busy time</th>"
                  "<th class='num'>frames</th>", rows)


def quality_section(data: ReportData) -> str:
    h = data.header
    parts = ['<section id="quality"><h2>Data quality</h2>']
    total = int(h.get("rejects", 0) or 0)
    parts.append(f"<h3>rejected lines: {total:,}</h3>")
    if not data.rejects.is_empty():
        rows = "".join(
            f"<tr><td><code>{esc(Path(str(r['file'])).name)}:{esc(r['line'])}</code></td>"
            f"<td>{esc(r['reason'])}</td><td class='raw'>{esc((r['raw'] or '')[:120])}</td></tr>"
            for r in data.rejects.iter_rows(named=True))
        more = (f'<p class="note">first {len(data.rejects)} of {total:,} shown; '
                "query the rest with <code>tracelab sql DATASET \"select * from rejects\"</code>"
                "</p>") if total > len(data.rejects) else ""
        parts.append(_table("rejects-table", "<th>where</th><th>reason</th><th>line</th>",
                            rows) + more)
    parts.append(f"<h3>logger losses: {len(data.losses):,}</h3>")
    if not data.loss_summary.is_empty():
        rows = "".join(
            f"<tr><td>{esc(r['bus'])}</td><td class='num'>{_int(r['records'])}</td>"
            f"<td class='num'>{_secs(r['from_ns'])}</td><td class='num'>{_secs(r['to_ns'])}</td>"
            f"<td class='num'>{_duration(float(r['lost_ns'] or 0))}</td>"
            f"<td class='num'>{_int(r['frames'])}</td></tr>"
            for r in data.loss_summary.iter_rows(named=True))
        parts.append(_table("loss-summary-table", "<th>bus</th><th class='num'>records</th>"
                            "<th class='num'>first</th><th class='num'>last until</th>"
                            "<th class='num'>time lost</th><th class='num'>frames lost</th>",
                            rows) + "<h3>first loss records</h3>")
    if not data.losses.is_empty():
        rows = "".join(
            f"<tr><td>{esc(r['bus'])}</td><td class='num'>{_secs(r['from_ns'])}</td>"
            f"<td class='num'>{_secs(r['to_ns'])}</td>"
            f"<td class='num'>{_int(r['count'])}</td></tr>"
            for r in data.losses.head(LOSS_ROWS).iter_rows(named=True))
        more = (f'<p class="note">first {LOSS_ROWS} of {len(data.losses):,} shown; all are '
                "in the <code>losses</code> view of <code>tracelab sql</code>.</p>"
                if len(data.losses) > LOSS_ROWS else "")
        parts.append(_table("losses-table", "<th>bus</th><th class='num'>from</th>"
                            "<th class='num'>until</th><th class='num'>frames lost</th>",
                            rows) + more)
    steps = int(h.get("backward_steps", 0) or 0)
    parts.append(f"<h3>backward time steps: {steps:,}</h3>")
    if steps:
        where = ", ".join(f"<code>{esc(Path(str(f)).name)}:{esc(ln)}</code>"
                          for f, ln in h.get("backward_at") or [])
        parts.append(f"<p>first at {where}</p>")
    if data.marks_total > len(data.marks):
        parts.append(f'<p class="note">{counted(data.marks_total, "mark")}; the first '
                     f"{len(data.marks)} are drawn.</p>")
    for note in data.notes:
        parts.append(f'<p class="note">{esc(note)}</p>')
    parts.append("</section>")
    return "".join(parts)


def build_figures(data: ReportData, load_limit: float) -> dict[str, tuple[go.Figure, bool]]:
    """Figure id -> (figure, has a time axis)."""
    buses = [str(b.get("alias")) for b in data.header.get("buses") or []]
    for source in (data.load, data.errors, data.counters):
        if not source.is_empty() and "bus" in source.columns:
            buses += [b for b in source["bus"].unique().sort().to_list() if b not in buses]
    names = {}
    if not data.timing.is_empty():
        names = {(b, i, e): n for b, i, e, n in
                 data.timing.select("bus", "id", "ext", "name").iter_rows() if n}
    t0, t1 = data.t0_ns, data.t1_ns
    built = {
        "fig-load": (figures.load_figure(data.load, data.load_stats, buses, t0, t1, load_limit,
                                         data.marks, data.losses), True),
        "fig-deviation": (figures.deviation_figure(data.timing, buses), False),
        "fig-drift": (figures.drift_figure(data.drift), False),
        "fig-gaps": (figures.gaps_figure(data.gaps, data.gap_bucket_ns, data.losses, t0, t1,
                                         data.marks, names), True),
        "fig-errors": (figures.errors_figure(data.errors, data.bucket_ns, t0, t1, data.marks,
                                             data.losses), True),
        "fig-counters": (figures.counters_figure(data.counters, data.states, t0, t1, data.marks,
                                                 data.losses), True),
    }
    built.update(signal_figures.build(data.signals, t0, t1, data.marks, data.losses))
    figures.align_time_axes([fig for fig, time in built.values() if time])
    return built


def _json_for_script(obj: Any) -> str:
    """JSON that cannot end the script element it sits in."""
    return (obj if isinstance(obj, str) else json.dumps(obj)).replace("<", "\\u003c").replace(
        ">", "\\u003e").replace("&", "\\u0026")


SCRIPT = """
(function () {
  var figs = JSON.parse(document.getElementById('tl-figures').textContent);
  var full = JSON.parse(document.getElementById('tl-span').textContent);
  var config = {displaylogo: false, responsive: true,
                modeBarButtonsToRemove: ['lasso2d', 'select2d']};
  var timeIds = [];
  Object.keys(figs).forEach(function (id) {
    var f = figs[id];
    if (!document.getElementById(id)) { return; }  // a figure the page says in words instead
    Plotly.newPlot(id, f.figure.data, f.figure.layout, config);
    if (f.time) { timeIds.push(id); }
  });
  // A chart inside a closed disclosure was drawn at zero width: redraw it when opened.
  document.querySelectorAll('details').forEach(function (d) {
    d.addEventListener('toggle', function () {
      d.querySelectorAll('.fig').forEach(function (el) {
        if (el._fullLayout) { Plotly.Plots.resize(el); }
      });
    });
  });
  // Linked time axes: a zoom or pan on one time axis is applied to every other one.
  var syncing = false;
  function rangeOf(ev) {
    for (var k in ev) {
      var m = k.match(/^(xaxis\\d*)\\.range\\[0\\]$/);
      if (m) { return [ev[k], ev[m[1] + '.range[1]']]; }
      if (/^xaxis\\d*\\.range$/.test(k)) { return ev[k]; }
      if (/^xaxis\\d*\\.autorange$/.test(k)) { return full; }
    }
    return null;
  }
  timeIds.forEach(function (id) {
    document.getElementById(id).on('plotly_relayout', function (ev) {
      if (syncing) { return; }
      var r = rangeOf(ev);
      if (!r) { return; }
      syncing = true;
      var pending = timeIds.map(function (other) {
        var el = document.getElementById(other);
        var upd = {};
        Object.keys(el.layout).forEach(function (ax) {
          if (/^xaxis\\d*$/.test(ax)) { upd[ax + '.range'] = [r[0], r[1]]; }
        });
        return Plotly.relayout(el, upd);
      });
      Promise.all(pending).then(function () { syncing = false; },
                                function () { syncing = false; });
    });
  });
  // Long tables: pages of N rows (data-pager) with page buttons and "all"; the header sticks.
  function paginate(table) {
    var size = parseInt(table.dataset.pager, 10);
    var body = table.tBodies[0];
    var pager = document.createElement('div');
    pager.className = 'pager';
    table.parentNode.after(pager);
    table.tlShow = function (page) {
      var rows = Array.prototype.slice.call(body.rows);
      var pages = Math.max(1, Math.ceil(rows.length / size));
      table.dataset.page = page;
      rows.forEach(function (r, i) {
        r.style.display = (page === 'all' || Math.floor(i / size) === page) ? '' : 'none';
      });
      pager.textContent = '';
      var label = document.createElement('span');
      label.textContent = rows.length + ' rows:';
      pager.appendChild(label);
      for (var p = 0; p < pages; p++) {
        var b = document.createElement('button');
        b.type = 'button';
        b.textContent = String(p + 1);
        b.setAttribute('aria-current', String(page === p));
        b.dataset.page = String(p);
        pager.appendChild(b);
      }
      var all = document.createElement('button');
      all.type = 'button';
      all.textContent = 'all';
      all.dataset.page = 'all';
      all.setAttribute('aria-current', String(page === 'all'));
      pager.appendChild(all);
    };
    pager.addEventListener('click', function (ev) {
      var b = ev.target.closest('button');
      if (!b) { return; }
      table.tlShow(b.dataset.page === 'all' ? 'all' : parseInt(b.dataset.page, 10));
    });
    table.tlShow(0);
  }
  document.querySelectorAll('table[data-pager]').forEach(paginate);
  // Sortable table: click a heading; numbers sort worst (largest) first on the first click.
  document.querySelectorAll('table#timing-table th.sort').forEach(function (th, col) {
    th.addEventListener('click', function () {
      var table = th.closest('table');
      var body = table.tBodies[0];
      var rows = Array.prototype.slice.call(body.rows);
      var desc = th.dataset.dir !== 'desc';
      th.dataset.dir = desc ? 'desc' : 'asc';
      rows.sort(function (a, b) {
        var x = a.cells[col].dataset.v, y = b.cells[col].dataset.v;
        var nx = parseFloat(x), ny = parseFloat(y);
        var c = (!isNaN(nx) && !isNaN(ny)) ? nx - ny
              : (x === '' ? -1 : y === '' ? 1 : x.localeCompare(y));
        return desc ? -c : c;
      });
      rows.forEach(function (r) { body.appendChild(r); });
      if (table.tlShow) { table.tlShow(table.dataset.page === 'all' ? 'all' : 0); }
    });
  });
  // Take a table away: every table's rows (all pages) as CSV.
  function csvCell(text) {
    var t = text.replace(/\\s+/g, ' ').trim();
    return /[",\\n]/.test(t) ? '"' + t.replace(/"/g, '""') + '"' : t;
  }
  document.querySelectorAll('button.csv').forEach(function (button) {
    button.addEventListener('click', function () {
      var table = document.getElementById(button.dataset.table);
      var lines = Array.prototype.map.call(table.rows, function (row) {
        return Array.prototype.map.call(row.cells, function (c) {
          return csvCell(c.textContent);
        }).join(',');
      });
      var blob = new Blob([lines.join('\\n') + '\\n'], {type: 'text/csv'});
      var a = document.createElement('a');
      a.href = URL.createObjectURL(blob);
      a.download = (document.body.dataset.run || 'run') + '-' + button.dataset.table + '.csv';
      document.body.appendChild(a);
      a.click();
      a.remove();
    });
  });
})();
"""


def _section(sid: str, title: str, body: str) -> str:
    return f'<section id="{sid}"><h2>{esc(title)}</h2>{body}</section>'


def _caption(text: str) -> str:
    """The one line under a heading that says what to look for."""
    return f'<p class="caption">{esc(text)}</p>'


def render(data: ReportData, load_limit: float = 0.5, plotly_src: str | None = None) -> str:
    """The whole page; plotly.js inline unless ``plotly_src`` names a shared file."""
    figs = build_figures(data, load_limit)
    payload = "{" + ",".join(
        f'{json.dumps(fid)}:{{"time":{json.dumps(time)},"figure":{fig.to_json()}}}'
        for fid, (fig, time) in figs.items()) + "}"
    span = [data.t0_ns / NS_PER_S, data.t1_ns / NS_PER_S]

    def div(fid: str) -> str:
        return f'<div id="{fid}" class="fig"></div>'

    timing = data.timing
    periodic = timing.filter(pl.col("deviation_pct").is_not_null()) \
        if "deviation_pct" in timing.columns else timing
    deviating = int(periodic["deviates"].sum()) if "deviates" in periodic.columns else 0
    drifting = int(data.drift["deviates"].sum()) if "deviates" in data.drift.columns else 0
    others = len(data.drift) - drifting
    gap_rows = data.gaps.select("bus", "id", "ext").n_unique() if not data.gaps.is_empty() else 0
    parts = [
        ("header", None, header_section(data)),
        ("verdict", "Verdict", verdict_section(data)),
        ("load", "Bus load", _section(
            "load", "Bus load",
            _caption("Look for load above the recommended maximum "
                     f"({load_limit:.0%}, long-dashed line) and for peaks that line up with "
                     "errors below; hatched violet spans are logger losses (no data, not a "
                     "quiet bus).") + div("fig-load") +
            '<p class="note">Pick the window size above the chart; dashed: mean, dot: peak. '
            "Zoom any time axis to zoom all of them.</p>"
            "<h3>top identifiers by busy time</h3>" + top_ids_table(data.top_ids))),
        ("timing", "Message timing", _section(
            "timing", "Message timing",
            _caption("Look for messages with missing frames (red), large phase jitter or "
                     "drift: the worst are at the top.") + timing_table(timing) +
            "<h3>period deviation per message</h3>" +
            _caption(f"{counted(deviating, 'message')} deviate"
                     f"{'s' if deviating == 1 else ''} from the period beyond tolerance "
                     f"(median off by >= 0.01 % or a 1st / 99th percentile cycle off by "
                     f">= 10 %); {counted(len(periodic) - deviating, 'other')} within "
                     "tolerance. The buttons switch between the two sets.") +
            (div("fig-deviation") if deviating or periodic.is_empty() else
             '<details class="more"><summary>show all '
             f"{counted(len(periodic), 'periodic message')}</summary>{div('fig-deviation')}"
             "</details>") + "<h3>clock drift per node</h3>" +
            _caption((f"{counted(drifting, 'node')} beyond ±5 ppm; " if drifting else
                      "No node's clock drifts beyond ±5 ppm; ") +
                     f"{counted(others, 'other node')} within it. Positive: the sender's "
                     "clock is slow (its periods are long).") +
            (div("fig-drift") if drifting else ""))),
        ("gaps", "Gaps", _section(
            "gaps", "Gaps",
            _caption("Look for dark cells: frames missing on the bus. Sand cells: frames the "
                     "logger lost; hatched violet boxes: that bus's logger-loss intervals.") +
            (div("fig-gaps") if gap_rows else
             '<p class="muted">No message has a gap on the bus.</p>') +
            f'<p class="note">One cell per message and '
            f"{figures.window_label(data.gap_bucket_ns)}; only messages with gaps on the bus "
            "are drawn" + (f"; {counted(data.gaps_logger_only, 'more message')} only had "
                           "gaps inside logger losses" if data.gaps_logger_only else "") +
            ".</p>")),
        ("errors", "Errors and counters", _section(
            "errors", "Errors and counters",
            "<h3>error events by type</h3>" +
            _caption("Look for when errors start and which types dominate (each type has "
                     "its own pattern); a listen-only logger records stuff and form errors "
                     "when a receiver's flag destroys a good frame, CRC errors only when the "
                     "bits on the wire were corrupted.") + div("fig-errors") +
            "<h3>TEC and REC per node</h3>" +
            _caption("Look for the first node to cross 96 (warning) and 128 (error-passive); "
                     "lines are the replayed counters as steps through real values (each "
                     f"{figures.window_label(data.bucket_ns)} keeps its first, lowest, highest "
                     "and last value), the bottom row the replayed state of each node.") +
            div("fig-counters"))),
        ("signals", "Signals", signal_figures.section_html(data.signals, div,
                                                           figures.window_label)
         if data.signals is not None else ""),
        ("quality", "Data quality", quality_section(data)),
    ]
    toc = "".join(f'<a href="#{sid}">{esc(title)}</a>' for sid, title, body in parts
                  if title and body)
    sections = [parts[0][2], f'<nav class="toc" id="toc">{toc}</nav>',
                *(body for _, _, body in parts[1:]),
                f'<footer id="caution"><p><b>Caution.</b> {CAUTION}</p>'
                f"<p>Written by tracelab {esc(__version__)}.</p></footer>"]
    if plotly_src is None:
        plotly_tag = f"<script>{plotly_js()}</script>"
    else:
        plotly_tag = f'<script src="{esc(plotly_src)}"></script>'
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>tracelab run {esc(data.run)}</title><style>{style.CSS}</style>"
        f"{plotly_tag}</head><body data-run=\"{esc(data.run)}\"><main>{''.join(sections)}</main>"
        f'<script type="application/json" id="tl-figures">{_json_for_script(payload)}</script>'
        f'<script type="application/json" id="tl-span">{json.dumps(span)}</script>'
        f"<script>{SCRIPT}</script></body></html>\n")


def write_report(data: ReportData, path: Path, load_limit: float = 0.5,
                 shared_plotly: bool = False) -> Path:
    """Write one run's page; with ``shared_plotly`` plotly.js goes once beside it."""
    path.parent.mkdir(parents=True, exist_ok=True)
    src = None
    if shared_plotly:
        shared = path.parent / PLOTLY_FILE
        if not shared.exists():
            shared.write_text(plotly_js(), encoding="utf-8")
        src = PLOTLY_FILE
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(render(data, load_limit, src), encoding="utf-8")
    tmp.replace(path)
    return path
