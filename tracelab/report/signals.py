"""The report's Signals section: value envelopes of the plotted signals on the shared time
axis, a closer look around the first degradation, and the payload findings table.

Self-contained: its own figure builders and HTML, fed by
tracelab.analyses.signal_envelopes.SignalSection. It lays out prepared aggregates and
computes nothing.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import plotly.graph_objects as go
import polars as pl
from plotly.subplots import make_subplots

from tracelab.analyses.signal_envelopes import SignalSection
from tracelab.report import style
from tracelab.report.figures import (
    NS_PER_S,
    _alpha,
    _time_axis,
    add_marks,
    esc,
    extend_layout,
    seconds,
)

PANEL_PX = 130
OUT_OF_RANGE = style.ERROR_RED
DEGRADED = style.STATE_COLOURS.get("error-passive", style.ERROR_RED)
KIND_WORDS = {
    "counter-lost": "counter jump after missing frames: lost on the bus or by the logger",
    "counter-skip": "counter jump, no missing frame: skipped by the sender",
    "counter-in-loss": "counter jump inside a logger loss (not the sender's fault)",
    "counter-repeat": "counter repeated: stale or repeated payload",
    "checksum": "checksum mismatch",
}


def _label(row: dict[str, Any]) -> str:
    unit = f" [{row['unit']}]" if row.get("unit") else ""
    return f"{row['message']}.{row['signal']}{unit}"


def signals_figure(section: SignalSection, envelopes: pl.DataFrame, t0_ns: int, t1_ns: int,
                   marks: pl.DataFrame, losses: pl.DataFrame, ranges: pl.DataFrame | None = None,
                   height_px: int = PANEL_PX) -> go.Figure:
    """One panel per plotted signal, sharing the time axis: the min..max band per bucket and
    the mean line; limits dotted, out-of-range spans shaded red, logger losses shaded, the
    first-degraded instant as a vertical line, marks on top."""
    panels = section.panels.to_dicts()
    rows = max(1, len(panels))
    fig = make_subplots(rows=rows, cols=1, shared_xaxes=True, vertical_spacing=0.025)
    shapes: list[dict[str, Any]] = []
    notes: list[dict[str, Any]] = []
    for index, panel in enumerate(panels, start=1):  # plotted signals: at most MAX_PANELS
        colour = style.node_colour(index - 1)
        part = envelopes.filter((pl.col("message") == panel["message"])
                                & (pl.col("signal") == panel["signal"])) \
            if not envelopes.is_empty() else pl.DataFrame()
        name = esc(_label(panel))
        if not part.is_empty():
            x = seconds(part["t_ns"])
            fig.add_trace(go.Scatter(x=x, y=part["v_max"].to_numpy(), mode="lines",
                                     line={"width": 0, "color": colour, "shape": "hv"},
                                     hoverinfo="skip", showlegend=False), row=index, col=1)
            fig.add_trace(go.Scatter(x=x, y=part["v_min"].to_numpy(), mode="lines",
                                     line={"width": 0, "color": colour, "shape": "hv"},
                                     fill="tonexty", fillcolor=_alpha(colour, 0.25),
                                     hoverinfo="skip", showlegend=False), row=index, col=1)
            fig.add_trace(go.Scatter(
                x=x, y=part["v_mean"].to_numpy(), mode="lines", name=name,
                line={"width": 1.4, "color": colour, "shape": "hv"}, showlegend=False,
                customdata=part.select("v_min", "v_max").to_numpy(),
                hovertemplate=f"{name}<br>%{{x:.2f}} s: mean %{{y:.4g}} "
                              "(min %{customdata[0]:.4g}, max %{customdata[1]:.4g})"
                              "<extra></extra>"), row=index, col=1)
        axis = "" if index == 1 else str(index)
        for key in ("min_limit", "max_limit"):
            if panel.get(key) is not None:
                shapes.append({"type": "line", "xref": f"x{axis} domain", "yref": f"y{axis}",
                               "x0": 0, "x1": 1, "y0": panel[key], "y1": panel[key],
                               "line": {"color": OUT_OF_RANGE, "width": 1, "dash": "dot"}})
        if ranges is not None and not ranges.is_empty():
            spans = ranges.filter((pl.col("message") == panel["message"])
                                  & (pl.col("signal") == panel["signal"]))
            for a, b in spans.select("from_ns", "to_ns").iter_rows():  # merged spans: few
                shapes.append({"type": "rect", "xref": f"x{axis}", "yref": f"y{axis} domain",
                               "x0": a / NS_PER_S, "x1": b / NS_PER_S, "y0": 0, "y1": 1,
                               "fillcolor": OUT_OF_RANGE, "opacity": 0.18,
                               "line": {"width": 0}, "layer": "below"})
        fig.layout[f"yaxis{axis}"].update(
            title={"text": esc(panel["signal"]) + (f" [{esc(panel['unit'])}]"
                                                    if panel.get("unit") else ""),
                   "font": {"size": 11}}, gridcolor=style.GRID)
        notes.append({"xref": f"x{axis} domain", "yref": f"y{axis} domain", "x": 1, "y": 1,
                      "xanchor": "right", "yanchor": "top", "showarrow": False,
                      "text": esc(panel["message"]), "font": {"size": 9, "color": style.MUTED}})
    for a, b in losses.select("from_ns", "to_ns").iter_rows() if not losses.is_empty() else []:
        shapes.append({"type": "rect", "xref": "x", "yref": "paper", "x0": a / NS_PER_S,
                       "x1": b / NS_PER_S, "y0": 0, "y1": 1, "fillcolor": style.LOGGER_SHADE,
                       "opacity": 0.35, "line": {"width": 0}, "layer": "below"})
    if section.degraded_ns is not None:
        at_s = section.degraded_ns / NS_PER_S
        shapes.append({"type": "line", "xref": "x", "yref": "paper", "x0": at_s, "x1": at_s,
                       "y0": 0, "y1": 1, "line": {"color": DEGRADED, "width": 2}})
        notes.append({"x": at_s, "xref": "x", "y": 0, "yref": "paper", "yanchor": "bottom",
                      "xanchor": "left", "showarrow": False,
                      "text": esc(f"first degraded: {section.degraded_node or '?'}"),
                      "font": {"size": 10, "color": DEGRADED}})
    fig.update_layout(**style.base_layout(rows * height_px + 90, showlegend=False))
    time_axis = _time_axis(t0_ns, t1_ns)
    for index in range(1, rows + 1):
        axis = "xaxis" if index == 1 else f"xaxis{index}"
        fig.layout[axis].update(range=time_axis["range"], gridcolor=style.GRID)
    fig.layout["xaxis" if rows == 1 else f"xaxis{rows}"].update(**time_axis)
    extend_layout(fig, shapes, notes)
    add_marks(fig, marks)
    return fig


def detail_figure(section: SignalSection, marks: pl.DataFrame, losses: pl.DataFrame
                  ) -> go.Figure | None:
    """The same panels over the window around the first degradation, at finer buckets."""
    if section.detail_from_ns is None or section.detail_to_ns is None:
        return None
    lo, hi = section.detail_from_ns, section.detail_to_ns
    inside = marks.filter((pl.col("t_ns") >= lo) & (pl.col("t_ns") <= hi)) \
        if not marks.is_empty() else marks
    near = losses.filter((pl.col("to_ns") >= lo) & (pl.col("from_ns") <= hi)) \
        if not losses.is_empty() else losses
    return signals_figure(section, section.detail, lo, hi, inside, near, None, 110)


def findings_table(section: SignalSection) -> str:
    """Counter and checksum findings with the log line of each."""
    counts = {k: v for k, v in section.counts.items() if v}
    if not counts:
        return '<p class="muted">No counter, checksum, stuck or range findings.</p>'
    summary = ", ".join(f"{esc(k)} {v:,}" for k, v in sorted(counts.items()))
    parts = [f"<p>Findings: {summary}.</p>"]
    if section.findings.is_empty():
        return "".join(parts)
    rows = []
    for r in section.findings.iter_rows(named=True):  # at most FINDING_ROWS
        where = f"{Path(str(r['file'])).name}:{r['line']}" if r.get("file") else ""
        raw = "" if r["raw"] is None else f"{r['raw']}"
        if r["expected"] is not None:
            raw += f" (expected {r['expected']})"
        extra = []
        if r["count"] is not None:
            extra.append(f"{r['count']} skipped")
        if r["missing"] is not None:
            extra.append(f"{r['missing']} missing")
        rows.append(
            f"<tr><td class='num'>{r['t_ns'] / NS_PER_S:.3f} s</td>"
            f"<td>{esc(r['message'])}.{esc(r['signal'])}</td>"
            f"<td>{esc(KIND_WORDS.get(r['kind'], r['kind']))}</td><td class='num'>{esc(raw)}</td>"
            f"<td>{esc(', '.join(extra))}</td><td><code>{esc(where)}</code></td></tr>")
    total = sum(section.counts.get(k, 0) for k in KIND_WORDS)
    more = (f'<p class="note">first {len(rows)} of {total:,} counter and checksum findings; '
            "all are in the <code>signal_checks</code> view of <code>tracelab sql</code>.</p>"
            if total > len(rows) else "")
    parts.append("<div class='scroll'><table id='signal-findings'><thead><tr>"
                 "<th class='num'>time</th><th>signal</th><th>finding</th>"
                 "<th class='num'>value</th><th></th><th>where</th></tr></thead>"
                 f"<tbody>{''.join(rows)}</tbody></table></div>{more}")
    return "".join(parts)


def section_html(section: SignalSection, div: Any, window_label: Any) -> str:
    """The section; ``div(fid)`` places a figure, ``window_label(ns)`` names a bucket."""
    parts = ['<section id="signals"><h2>Signals</h2>']
    if section.panels.is_empty():
        parts.append('<p class="muted">No signal is marked for plotting (plot = true in the '
                     "catalog, or tracelab signals --signal NAME).</p>")
    else:
        parts.append(div("fig-signals"))
        parts.append(f'<p class="note">Band: min .. max of the value per '
                     f"{window_label(section.bucket_ns)}, line: mean; dotted red: the "
                     "catalog's plausible range, red shading: values outside it; violet "
                     "shading: logger losses; the solid line marks the first degradation."
                     "</p>")
        if section.omitted:
            parts.append(f'<p class="note">Also marked for plotting, not drawn: '
                         f"{esc(', '.join(section.omitted))}.</p>")
        if section.detail_from_ns is not None:
            parts.append(f"<h3>around the first degradation ({esc(section.degraded_node)} at "
                         f"{(section.degraded_ns or 0) / NS_PER_S:.3f} s)</h3>")
            parts.append(div("fig-signals-detail"))
            parts.append(f'<p class="note">{window_label(section.detail_bucket_ns)} buckets '
                         f"from {section.detail_from_ns / NS_PER_S:.1f} s to "
                         f"{(section.detail_to_ns or 0) / NS_PER_S:.1f} s; this chart keeps "
                         "its own zoom.</p>")
    parts.append("<h3>payload findings</h3>" + findings_table(section) + "</section>")
    return "".join(parts)


def build(section: SignalSection | None, t0_ns: int, t1_ns: int, marks: pl.DataFrame,
          losses: pl.DataFrame) -> dict[str, tuple[go.Figure, bool]]:
    """Figure id -> (figure, on the linked time axis) for the page."""
    if section is None or section.panels.is_empty():
        return {}
    out = {"fig-signals": (signals_figure(section, section.envelopes, t0_ns, t1_ns, marks,
                                          losses, section.ranges), True)}
    detail = detail_figure(section, marks, losses)
    if detail is not None:
        out["fig-signals-detail"] = (detail, False)
    return out
