"""The comparison page of two runs: the same look as the run report, worst changes first.

It lays out a ``Comparison`` (analyses/compare.py) and computes nothing."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import plotly.graph_objects as go

from tracelab import __version__
from tracelab.analyses.compare import Comparison
from tracelab.report import style
from tracelab.report.figures import esc, message_label
from tracelab.report.page import (
    CAUTION,
    SCRIPT,
    _caption,
    _duration,
    _facts,
    _json_for_script,
    _section,
    _table,
    cause_words,
    plotly_js,
)
from tracelab.wording import counted, percent

FLAG_WORDS = {"period": "period moved", "missing": "more missing frames",
              "jitter_p99_ns": "more phase jitter (p99)", "abs_drift_ppm": "more clock drift",
              "only_in_a": "only in the reference run", "only_in_b": "only in this run"}
_NS = ("period_ns", "cycle_jitter_ns", "phase_jitter_ns", "jitter_p99_ns")
MESSAGE_COLUMNS = (("period_ns", "period"), ("cycle_jitter_ns", "cycle σ"),
                   ("phase_jitter_ns", "phase σ"), ("jitter_p99_ns", "phase p99"),
                   ("drift_ppm", "drift"), ("missing", "missing"), ("gaps", "gaps"))


def _value(name: str, value: Any) -> str:
    if value is None:
        return "-"
    if name in _NS:
        return _duration(float(value))
    if name == "drift_ppm":
        return f"{float(value):+.1f} ppm"
    return f"{value:,}" if isinstance(value, int) else f"{value:,.3g}"


def _change(name: str, delta: Any) -> str:
    if delta is None:
        return ""
    if name in _NS:
        return ("+" if delta >= 0 else "−") + _duration(abs(float(delta)))
    if name == "drift_ppm":
        return f"{float(delta):+.1f} ppm"
    return f"{delta:+,}" if isinstance(delta, int) else f"{delta:+,.3g}"


def _messages_table(result: Comparison) -> str:
    head = "<th>message</th><th>flags</th>" + "".join(
        f"<th class='num'>{esc(h)} A → B</th>" for _, h in MESSAGE_COLUMNS)
    rows = []
    for m in result.messages:  # one row per message of the network: hundreds at most
        flags = ", ".join(FLAG_WORDS.get(f, f) for f in m["flags"])
        cells = [f"<td class='msg'>{esc(message_label(m['bus'], m['id'], m['ext'], m['name']))}"
                 "</td>", f"<td class='{'bad-cell' if m['flags'] else ''}'>{esc(flags)}</td>"]
        for name, _ in MESSAGE_COLUMNS:
            a, b = m["a"].get(name), m["b"].get(name)
            moved = any(name in (f, f.replace("abs_", "")) for f in m["flags"])
            cls = "num bad-cell" if moved else "num"
            cells.append(f"<td class='{cls}'>{esc(_value(name, a))} → {esc(_value(name, b))}"
                         f"<br><span class='muted'>{esc(_change(name, m['delta'].get(name)))}"
                         "</span></td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return _table("compare-messages", head, "".join(rows), pager=len(rows) > 25)


def _buses_table(result: Comparison) -> str:
    head = "<th>bus</th>" + "".join(f"<th class='num'>{v} load A → B</th>"
                                    for v in ("mean", "p95", "p99", "max"))
    rows = "".join(
        f"<tr><td>{esc(b['bus'])}</td>" + "".join(
            f"<td class='num'>{percent(b['a'].get(v))} → {percent(b['b'].get(v))}<br><span "
            f"class='muted'>{_points(b['delta'].get(v))}</span></td>"
            for v in ("mean", "p95", "p99", "max")) + "</tr>"
        for b in result.buses)
    return _table("compare-buses", head, rows)


def _errors_table(result: Comparison) -> str:
    e = result.errors
    rows = []
    for part, label in (("by_type", "type"), ("by_field", "field")):
        for name, d in (e.get("delta", {}).get(part) or {}).items():
            rows.append(f"<tr><td>{label}</td><td>{esc(name)}</td>"
                        f"<td class='num'>{e['a'][part].get(name, 0):,}</td>"
                        f"<td class='num'>{e['b'][part].get(name, 0):,}</td>"
                        f"<td class='num'>{d:+,}</td></tr>")
    rows.append(f"<tr><td>all</td><td></td><td class='num'>{e.get('a', {}).get('total', 0):,}"
                f"</td><td class='num'>{e.get('b', {}).get('total', 0):,}</td>"
                f"<td class='num'>{e.get('delta', {}).get('total', 0):+,}</td></tr>")
    return _table("compare-errors", "<th>by</th><th></th><th class='num'>A</th>"
                  "<th class='num'>B</th><th class='num'>B − A</th>", "".join(rows))


def _points(value: Any) -> str:
    return "" if value is None else f"{100 * float(value):+.1f} points"


def _verdict_facts(result: Comparison) -> str:
    items = []
    for side, run in zip(("a", "b"), result.runs, strict=True):
        v = result.verdicts.get(side) or {}
        first = v.get("first_degraded") or {}
        said = (f"{esc(first.get('node'))} on bus {esc(first.get('bus'))} degraded first "
                f"({esc(first.get('state'))}); {esc(cause_words(v.get('cause')))}"
                if first.get("node") else "no node left error-active" if v else
                "not replayed")
        items.append((f"{'A (reference)' if side == 'a' else 'B'}: {esc(run)}", said))
    return _facts(items)


def load_figure(result: Comparison) -> go.Figure:
    """Mean / p95 / p99 / max load of each bus, A beside B (B hatched: not colour alone)."""
    fig = go.Figure()
    stats = ("mean", "p95", "p99", "max")
    for side, run, pattern in (("a", result.runs[0], ""), ("b", result.runs[1], "/")):
        x = [f"{esc(b['bus'])} {s}" for b in result.buses for s in stats]
        y = [b[side].get(s) for b in result.buses for s in stats]
        fig.add_trace(go.Bar(x=x, y=y, name=esc(f"{side.upper()}: {run}"),
                             marker={"color": style.BUS_ACCENTS[0 if side == "a" else 1],
                                     "pattern": {"shape": pattern}},
                             hovertemplate="%{x}: %{y:.1%}<extra></extra>"))
    fig.update_layout(**style.base_layout(
        300, barmode="group", yaxis={"title": {"text": "bus load"}, "tickformat": ".0%",
                                     "rangemode": "tozero", "gridcolor": style.GRID}))
    return fig


def render_compare(result: Comparison, plotly_src: str | None = None) -> str:
    a, b = result.runs
    flagged = result.flagged
    statement = (f"Run {b} against reference run {a}: "
                 f"{counted(len(flagged), 'message')} of {len(result.messages)} moved beyond "
                 "the regression rule" + (": " + "; ".join(
                     f"{message_label(m['bus'], m['id'], m['ext'], m['name'])} "
                     f"({', '.join(FLAG_WORDS.get(f, f) for f in m['flags'])})"
                     for m in flagged[:5]) if flagged else "") +
                 (f" and {len(flagged) - 5} more" if len(flagged) > 5 else "") + ".")
    figs = {"fig-compare-load": load_figure(result)}
    payload = "{" + ",".join(f'"{fid}":{{"time":false,"figure":{fig.to_json()}}}'
                             for fid, fig in figs.items()) + "}"
    body = [
        f'<section id="header"><h1>Run {esc(b)} against {esc(a)}</h1>'
        f'<p id="verdict-line" class="statement {"bad" if flagged else "ok"}">'
        f"{esc(statement)}</p>{_verdict_facts(result)}</section>",
        _section("messages", "Messages, worst changes first",
                 _caption("Look for flags: a message is flagged when its value in B is at "
                          "least twice A's and above it by the floor of the fleet's rule "
                          "(3 frames, 100 ppm drift; p99 jitter by 50 µs and by more than "
                          "the longest frame on the bus, which arbitration alone can add), "
                          "or when its period moved by 1 % or more.") +
                 _messages_table(result)),
        _section("buses", "Bus load",
                 _caption("Look for a bus whose load rose between the runs (A plain, B "
                          "hatched).") + '<div id="fig-compare-load" class="fig"></div>'
                 + _buses_table(result)),
        _section("errors", "Errors by type and field", _errors_table(result)),
        f'<footer id="caution"><p><b>Caution.</b> {CAUTION}</p>'
        f"<p>Written by tracelab {esc(__version__)}.</p></footer>",
    ]
    plotly_tag = (f"<script>{plotly_js()}</script>" if plotly_src is None
                  else f'<script src="{esc(plotly_src)}"></script>')
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>tracelab compare {esc(b)} vs {esc(a)}</title><style>{style.CSS}</style>"
            f"{plotly_tag}</head><body data-run=\"{esc(b)}-vs-{esc(a)}\"><main>{''.join(body)}"
            f'</main><script type="application/json" id="tl-figures">'
            f"{_json_for_script(payload)}</script>"
            '<script type="application/json" id="tl-span">[0, 1]</script>'
            f"<script>{SCRIPT}</script></body></html>\n")


def write_compare(result: Comparison, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(render_compare(result), encoding="utf-8")
    tmp.replace(path)
    return path
