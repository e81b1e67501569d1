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
from tracelab.wording import counted

PLOTLY_FILE = "plotly.min.js"
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
        return "Clean run: no node left error-active.", "ok"
    first = min(degraded, key=lambda r: r["first_degraded"].get("t_ns") or 0)
    fd = first["first_degraded"]
    when = _secs(fd.get("t_ns"))
    if fd.get("wall_time"):
        when += f" ({fd['wall_time']})"
    state = fd.get("state")
    reached = "fell silent" if state == "silent" else \
        f"reached {STATE_WORDS.get(state, state)}"
    text = (f"{fd.get('node')} on bus {first.get('bus')} degraded first: {reached} at "
            f"{when}, confidence {_confidence(fd.get('confidence'))}")
    cause = cause_words(first.get("cause"))
    known = (first.get("cause") or {}).get("kind") not in (None, "none", "unknown")
    return text + f"; {'most likely cause: ' if known else ''}{cause}.", "bad"


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
    text, tone = verdict(data)
    files = ", ".join(esc(Path(f).name) for f in h.get("files") or [])
    return (f'<section id="header"><h1>Run {esc(data.run)}</h1>'
            f'<p class="sub">{files}</p>{_facts(items)}'
            f'<p id="verdict-line" class="verdict {tone}">{text}</p></section>')


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
    text, tone = verdict(data)
    parts = ['<section id="verdict"><h2>Verdict</h2>']
    if tone == "unknown" or not _results(data):
        parts.append(f'<p class="muted">{text}</p>')
    # degraded buses first (earliest first), clean ones after in one line each
    results = sorted(_results(data), key=lambda r: (
        r.get("first_degraded") is None, (r.get("first_degraded") or {}).get("t_ns") or 0))
    for result in results:  # one result per bus: a handful
        fd = result.get("first_degraded")
        parts.append(f"<h3>bus {esc(result.get('bus'))}</h3>")
        if result.get("verdict"):
            parts.append(f"<p>{esc(result['verdict'])}</p>")
        if not fd:
            if not result.get("verdict"):
                parts.append('<p class="muted">No node left error-active on this bus.</p>')
            continue
        when = _secs(fd.get("t_ns")) + (f" ({esc(fd['wall_time'])})"
                                         if fd.get("wall_time") else "")
        facts = [
            ("first degraded node", f"<b>{esc(fd.get('node'))}</b>"),
            ("state reached first", esc(fd.get("state"))), ("when", when),
            ("confidence", esc(_confidence(fd.get("confidence")))),
            ("most likely cause", esc(cause_words(result.get("cause")))),
        ]
        if fd.get("worst_state") and fd.get("worst_state") != fd.get("state"):
            facts.insert(3, ("worst state", f"{esc(fd['worst_state'])} at "
                                            f"{_secs(fd.get('worst_t_ns'))}"))
        parts.append(_facts(facts))
        hypotheses = sorted(result.get("hypotheses") or [],
                            key=lambda h: -(h.get("score") or 0))
        if len(hypotheses) > 1:
            runner = hypotheses[1]
            parts.append(f"<p>Runner-up hypothesis: <b>{esc(runner.get('name'))}</b> (score "
                         f"{esc(_confidence(runner.get('score')))}): {esc(runner.get('why'))}</p>")
        if hypotheses:
            rows = "".join(
                f"<tr><td>{'best' if i == 0 else 'runner-up' if i == 1 else ''}</td>"
                f"<td class='msg'>{esc(h.get('name'))}</td><td class='num'>{esc(_confidence(h.get('score')))}</td>"
                f"<td>{esc(h.get('why'))}</td></tr>" for i, h in enumerate(hypotheses[:4]))
            parts.append("<h3>hypotheses</h3><table><thead><tr><th></th><th>hypothesis</th>"
                         f"<th class='num'>score</th><th>why</th></tr></thead>{rows}</table>")
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
            parts.append("<h3>nodes</h3><table><thead><tr><th>node</th><th class='num'>max TEC"
                         "</th><th class='num'>max REC</th><th class='num'>transitions</th>"
                         f"<th class='num'>bus-off</th></tr></thead>{rows}</table>")
    parts.append("</section>")
    return "".join(parts)


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
    return (f'<div class="scroll"><table id="timing-table"><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div>'
            '<p class="note">Worst first: missing frames, then phase jitter relative to the '
            "period, then drift. Click a heading to sort. median: median interval; cycle σ / "
            "phase σ: standard deviation of the interval and of the arrival phase; "
            '"logger lost": frames missing inside logger-loss intervals (not a bus fault).</p>')


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
        parts.append("<table><thead><tr><th>where</th><th>reason</th><th>line</th></tr>"
                     f"</thead>{rows}</table>{more}")
    parts.append(f"<h3>logger losses: {len(data.losses):,}</h3>")
    if not data.loss_summary.is_empty():
        rows = "".join(
            f"<tr><td>{esc(r['bus'])}</td><td class='num'>{_int(r['records'])}</td>"
            f"<td class='num'>{_secs(r['from_ns'])}</td><td class='num'>{_secs(r['to_ns'])}</td>"
            f"<td class='num'>{_duration(float(r['lost_ns'] or 0))}</td>"
            f"<td class='num'>{_int(r['frames'])}</td></tr>"
            for r in data.loss_summary.iter_rows(named=True))
        parts.append("<table><thead><tr><th>bus</th><th class='num'>records</th>"
                     "<th class='num'>first</th><th class='num'>last until</th>"
                     "<th class='num'>time lost</th><th class='num'>frames lost</th></tr>"
                     f"</thead>{rows}</table><h3>first loss records</h3>")
    if not data.losses.is_empty():
        rows = "".join(
            f"<tr><td>{esc(r['bus'])}</td><td class='num'>{_secs(r['from_ns'])}</td>"
            f"<td class='num'>{_secs(r['to_ns'])}</td>"
            f"<td class='num'>{_int(r['count'])}</td></tr>"
            for r in data.losses.head(LOSS_ROWS).iter_rows(named=True))
        more = (f'<p class="note">first {LOSS_ROWS} of {len(data.losses):,} shown; all are '
                "in the <code>losses</code> view of <code>tracelab sql</code>.</p>"
                if len(data.losses) > LOSS_ROWS else "")
        parts.append("<table><thead><tr><th>bus</th><th class='num'>from</th>"
                     "<th class='num'>until</th><th class='num'>frames lost</th></tr></thead>"
                     f"{rows}</table>{more}")
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
                                         data.marks), True),
        "fig-deviation": (figures.deviation_figure(data.timing, buses), False),
        "fig-drift": (figures.drift_figure(data.drift), False),
        "fig-gaps": (figures.gaps_figure(data.gaps, data.gap_bucket_ns, data.losses, t0, t1,
                                         data.marks, names), True),
        "fig-errors": (figures.errors_figure(data.errors, data.bucket_ns, t0, t1, data.marks),
                       True),
        "fig-counters": (figures.counters_figure(data.counters, data.states, t0, t1, data.marks),
                         True),
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
    Plotly.newPlot(id, f.figure.data, f.figure.layout, config);
    if (f.time) { timeIds.push(id); }
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
  // Sortable table: click a heading; numbers sort worst (largest) first on the first click.
  document.querySelectorAll('table#timing-table th.sort').forEach(function (th, col) {
    th.addEventListener('click', function () {
      var body = th.closest('table').tBodies[0];
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
    });
  });
})();
"""


def render(data: ReportData, load_limit: float = 0.5, plotly_src: str | None = None) -> str:
    """The whole page; plotly.js inline unless ``plotly_src`` names a shared file."""
    figs = build_figures(data, load_limit)
    payload = "{" + ",".join(
        f'{json.dumps(fid)}:{{"time":{json.dumps(time)},"figure":{fig.to_json()}}}'
        for fid, (fig, time) in figs.items()) + "}"
    span = [data.t0_ns / NS_PER_S, data.t1_ns / NS_PER_S]

    def div(fid: str) -> str:
        return f'<div id="{fid}" class="fig"></div>'

    counters_note = ("Peak TEC / REC per "
                     f"{figures.window_label(data.bucket_ns)}; bands show the state a counter "
                     "value implies, the bottom row the replayed state of each node.")
    sections = [
        header_section(data),
        verdict_section(data),
        '<section id="load"><h2>Bus load</h2>' + div("fig-load") +
        f'<p class="note">Pick the window size above the chart; dashed: mean, dot: peak; '
        f'the long-dashed line is the recommended maximum ({load_limit:.0%}). Zoom any time '
        'axis to zoom all of them.</p></section>',
        '<section id="timing"><h2>Message timing</h2>' + timing_table(data.timing) +
        "<h3>period deviation per message</h3>" + div("fig-deviation") +
        "<h3>clock drift per node</h3>" + div("fig-drift") + "</section>",
        '<section id="gaps"><h2>Gaps</h2>' + div("fig-gaps") +
        f'<p class="note">One cell per message and {figures.window_label(data.gap_bucket_ns)}'
        "; shaded intervals are logger losses (the logger dropped frames, not the bus).</p>"
        "</section>",
        '<section id="errors"><h2>Errors and counters</h2>'
        "<h3>error events by type</h3>" + div("fig-errors") +
        "<h3>TEC and REC per node</h3>" + div("fig-counters") +
        f'<p class="note">{counters_note}</p></section>',
        (signal_figures.section_html(data.signals, div, figures.window_label)
         if data.signals is not None else ""),
        quality_section(data),
        f'<footer id="caution"><p><b>Caution.</b> {CAUTION}</p>'
        f"<p>Written by tracelab {esc(__version__)}.</p></footer>",
    ]
    if plotly_src is None:
        plotly_tag = f"<script>{plotly_js()}</script>"
    else:
        plotly_tag = f'<script src="{esc(plotly_src)}"></script>'
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>tracelab run {esc(data.run)}</title><style>{style.CSS}</style>"
        f"{plotly_tag}</head><body><main>{''.join(sections)}</main>"
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
