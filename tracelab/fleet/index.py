"""The fleet index page: every run with its report link, the regression flags, and per-vehicle
trend charts. It lays out numbers the summary computed; it computes nothing new."""

from __future__ import annotations

import html
from pathlib import Path
from typing import Any

import polars as pl

from tracelab.fleet import layout
from tracelab.report.figures import esc
from tracelab.report.page import CAUTION, PLOTLY_FILE  # shared with the run reports

_STYLE = """
body { font: 14px/1.45 system-ui, sans-serif; margin: 0; color: #26292c; background: #f6f6f4; }
header { padding: 18px 28px; background: #ecebe7; border-bottom: 1px solid #d9d7d0; }
h1 { font-size: 20px; margin: 0 0 4px; font-weight: 600; }
h2 { font-size: 16px; margin: 28px 0 8px; font-weight: 600; }
main { padding: 4px 28px 40px; }
.muted { color: #6b6e70; }
table { border-collapse: collapse; background: #fff; border: 1px solid #dedcd5; }
th, td { padding: 4px 8px; border-bottom: 1px solid #ebe9e3; text-align: left;
         vertical-align: top; }
td { white-space: nowrap; }
th { white-space: normal; min-width: 4em; }
.wide { overflow-x: auto; max-width: 100%; }
table { font-size: 13px; }
td.reason { white-space: normal; max-width: 36em; overflow-wrap: anywhere; color: #6e3b2a; }
th { background: #f1f0ec; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
tr.failed td { background: #fbf1ee; }
tr.suspect td { background: #fbf7e4; }
.flag { color: #8a4b14; font-weight: 600; }
.chart { background: #fff; border: 1px solid #dedcd5; margin: 8px 0 18px; }
a { color: #2f5d7c; }
"""

_COLUMNS = ("vehicle", "date", "run", "status", "frames", "missing", "errors", "rejects",
            "max_load_ratio", "first_degraded", "cause", "regressions")
#: Headings as words (they wrap; the cells do not).
_HEADINGS = {"max_load_ratio": "max load", "first_degraded": "first degraded (state)",
             "cause": "cause (score)"}


def _number(name: str, value: float, metric: str | None = None) -> str:
    """Numbers in the unit a reader expects: percent load, microseconds of jitter."""
    if name.endswith("_ratio"):
        return f"{value:.1%}"
    if metric == "jitter_p99_ns":
        return f"{value / 1000:,.1f} us"
    if metric == "abs_drift_ppm":
        return f"{value:,.0f} ppm"
    if name == "confidence":
        return f"{value:.2f}"
    return f"{value:,.0f}" if float(value).is_integer() else f"{value:,.3g}"


def _cell(name: str, value: Any, metric: str | None = None) -> str:
    if value is None:
        return '<td class="muted">-</td>'
    if isinstance(value, float):
        return f'<td class="num">{html.escape(_number(name, value, metric))}</td>'
    if isinstance(value, int) and not isinstance(value, bool):
        css = ' class="num flag"' if name == "regressions" and value else ' class="num"'
        return f"<td{css}>{value}</td>"
    return f"<td>{esc(value)}</td>"


def _runs_table(runs: pl.DataFrame) -> str:
    lead, rest = _COLUMNS[:4], _COLUMNS[4:]
    head = "".join(f"<th>{html.escape(_HEADINGS.get(c, c))}</th>"
                   for c in (*lead, "report / reason", *rest))
    rows = []
    for row in runs.iter_rows(named=True):  # one row per run, not per frame
        row = {**row,
               "first_degraded": (f"{row['first_degraded_node']} ({row['first_degraded_state']})"
                                  if row.get("first_degraded_node") else None),
               "cause": (f"{row['cause_kind']} ({row['confidence']:.2f})"
                         if row.get("cause_kind") and row.get("confidence") is not None
                         else row.get("cause_kind"))}
        if row["status"] in ("ok", "suspect") and row.get("report"):
            link = f'<td><a href="{html.escape(row["report"], quote=True)}">report</a></td>'
        else:
            link = f'<td class="reason">{html.escape(row.get("reason") or "")}</td>'
        cells = ("".join(_cell(c, row.get(c)) for c in lead) + link
                 + "".join(_cell(c, row.get(c)) for c in rest))
        css = f' class="{row["status"]}"' if row["status"] in ("failed", "suspect") else ""
        rows.append(f"<tr{css}>{cells}</tr>")
    return (f'<div class="wide"><table id="runs"><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table></div>")


def _flags_table(flags: pl.DataFrame) -> str:
    if flags.is_empty():
        return '<p class="muted">No regressions flagged.</p>'
    cols = ("vehicle", "date", "run", "bus", "name", "metric", "value", "baseline", "history")
    head = "".join(f"<th>{c}</th>" for c in cols)
    body = "".join(
        "<tr>" + "".join(_cell(c, r.get(c), r["metric"]) for c in cols) + "</tr>"
        for r in flags.iter_rows(named=True))  # flags are rare
    return (f'<div class="wide"><table id="flags"><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table></div>")


#: Marker symbol per flagged metric (shape, not only colour, tells them apart).
_FLAG_SYMBOLS = {"missing": "diamond", "jitter_p99_ns": "triangle-up",
                 "abs_drift_ppm": "square"}
_FLAG_WORDS = {"missing": "missing frames", "jitter_p99_ns": "p99 phase jitter",
               "abs_drift_ppm": "clock drift"}


def _labels(frame: pl.DataFrame) -> list[str]:
    """One x label per run: date and run name, escaped (Plotly renders markup in labels)."""
    return [esc(f"{d} {r}") for d, r in zip(frame["date"].cast(pl.String).to_list(),
                                            frame["run"].to_list(), strict=True)]


def _trend_chart(vehicle: str, runs: pl.DataFrame, flags: pl.DataFrame) -> str:
    import plotly.graph_objects as go
    from plotly.subplots import make_subplots

    ok = runs.filter(pl.col("status") == "ok").sort("date", "origin", "run", nulls_last=False)
    labels = _labels(ok)
    fig = make_subplots(rows=4, cols=1, shared_xaxes=True, vertical_spacing=0.06,
                        subplot_titles=("missing frames", "error frames", "max bus load",
                                        "messages flagged as regressions, by metric"))
    fig.add_trace(go.Scatter(x=labels, y=ok["missing"].to_list(), mode="lines+markers",
                             name="missing", line={"color": "#5b7a8c"}), row=1, col=1)
    fig.add_trace(go.Scatter(x=labels, y=ok["errors"].to_list(), mode="lines+markers",
                             name="errors", line={"color": "#8c7b5b"}), row=2, col=1)
    fig.add_trace(go.Scatter(x=labels, y=ok["max_load_ratio"].to_list(), mode="lines+markers",
                             name="max load", line={"color": "#6b8c5b"}), row=3, col=1)
    mine = flags.filter(pl.col("vehicle") == vehicle) if not flags.is_empty() else flags
    if not mine.is_empty():
        per_run = mine.group_by("date", "run", "metric").agg(
            pl.len().alias("messages"), pl.col("name").fill_null("?").alias("names")
        ).sort("date", "run", "metric")
        for metric in per_run["metric"].unique(maintain_order=True).to_list():  # three at most
            part = per_run.filter(pl.col("metric") == metric)
            words = _FLAG_WORDS.get(metric, metric)
            hover = [esc(f"{words}: " + ", ".join(str(n) for n in names[:8]))
                     for names in part["names"].to_list()]
            fig.add_trace(go.Scatter(
                x=_labels(part), y=part["messages"].to_list(), mode="markers",
                name=esc(words), text=hover, hoverinfo="text+x",
                marker={"color": "#b5651d", "size": 11,
                        "symbol": _FLAG_SYMBOLS.get(metric, "circle")}), row=4, col=1)
            if metric == "missing":  # the flagged runs on the panel of their own metric
                hit = ok.join(part.select("date", "run"), on=["date", "run"], how="semi")
                fig.add_trace(go.Scatter(
                    x=_labels(hit), y=hit["missing"].to_list(), mode="markers",
                    name="missing frames flagged", hoverinfo="x+y",
                    marker={"color": "#b5651d", "size": 11, "symbol": "diamond-open",
                            "line": {"width": 2}}), row=1, col=1)
    fig.update_yaxes(tickformat=".1%", row=3, col=1)
    # counts and loads are never negative: a single run must not get a -1 .. 1 axis
    fig.update_yaxes(rangemode="nonnegative")
    fig.update_layout(height=620, margin={"l": 50, "r": 20, "t": 40, "b": 40},
                      paper_bgcolor="#ffffff", plot_bgcolor="#fafaf8", showlegend=True,
                      legend={"orientation": "h", "y": -0.08},
                      font={"family": "system-ui, sans-serif", "size": 12, "color": "#26292c"})
    div_id = "trend-" + "".join(ch if ch.isalnum() else "-" for ch in vehicle)
    return fig.to_html(full_html=False, include_plotlyjs=False, div_id=div_id)


def ensure_plotly(fleet: Path) -> Path:
    """plotly.js once per fleet (the index uses it; run reports hard-link it)."""
    script = fleet / PLOTLY_FILE
    if not script.exists():
        import plotly.offline

        js = plotly.offline.get_plotlyjs()
        layout.replace_atomically(script, lambda tmp: tmp.write_text(js, encoding="utf-8"))
    return script


def write_index(fleet: Path, runs: pl.DataFrame, flags: pl.DataFrame) -> Path:
    """Write FLEET/index.html (and plotly.js once beside it)."""
    ensure_plotly(fleet)
    ordered = runs.sort("vehicle", "date", "origin", "run", nulls_last=False)
    failed = ordered.filter(pl.col("status") != "ok").height
    charts = []
    for vehicle in ordered["vehicle"].unique(maintain_order=True).to_list():  # a few vehicles
        mine = ordered.filter(pl.col("vehicle") == vehicle)
        if mine.filter(pl.col("status") == "ok").is_empty():
            continue  # no run to draw: no empty axes
        charts.append(f"<h2>Vehicle {esc(vehicle)}: trend over runs</h2>"
                      f'<div class="chart">{_trend_chart(vehicle, mine, flags)}</div>')
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>tracelab fleet</title>
<style>{_STYLE}</style><script src="{PLOTLY_FILE}"></script></head>
<body><header><h1>Fleet overview</h1>
<div class="muted">{ordered.height} runs, {failed} failed, {flags.height} regression flags</div>
</header><main>
<h2>Regression flags</h2>{_flags_table(flags)}
<h2>Runs</h2>{_runs_table(ordered)}
{''.join(charts)}
<footer class="muted"><p><b>Caution.</b> {CAUTION}</p></footer>
</main></body></html>
"""
    return layout.replace_atomically(fleet / layout.INDEX_FILE,
                                     lambda tmp: tmp.write_text(page, encoding="utf-8"))
