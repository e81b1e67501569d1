"""Plotly figure builders: each lays out one prepared aggregate and computes nothing.

Time axes are seconds of log time (t_ns / 1e9) and all start on the run's span, so the page
script can keep them linked. Every string that came from a log or a catalog is HTML-escaped
before it reaches Plotly (Plotly renders a subset of HTML in labels).
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from typing import Any

import numpy as np
import plotly.graph_objects as go
import polars as pl
from plotly.subplots import make_subplots

from tracelab.errors import printable_lines
from tracelab.format.grammar import id_text
from tracelab.report import style

NS_PER_S = 1e9
#: Counter levels of ISO 11898-1 fault confinement: warning limit (common controller
#: choice), error-passive above 127, bus-off above 255.
COUNTER_LEVELS = ((96, "warning 96"), (128, "error-passive 128"), (256, "bus-off 256"))
STATE_ORDER = ("error-active", "warning", "error-passive", "bus-off")
MARK_LABEL_CHARS = 28
COUNTER_PANEL_PX = 200
LABEL_CHAR_PX = 7.0  # average glyph width of the 12 px sans-serif labels
MIN_LEFT_PX, MAX_LEFT_PX = 72, 300
STATE_ROW_PX = 18
MIN_DRIFT_RANGE_PPM = 5.0  # crystal tolerances are tens of ppm; less is noise at this scale
MIN_DEVIATION_RANGE_PCT = 0.5


def esc(text: Any) -> str:
    """HTML-escaped text with control and bidirectional characters shown as escapes (a run
    or message name must not reorder what the page shows)."""
    return html.escape(printable_lines("" if text is None else str(text)), quote=True)


def seconds(t_ns: Any) -> np.ndarray:
    return np.asarray(t_ns, dtype=np.float64) / NS_PER_S


def message_label(bus: Any, frame_id: Any, ext: Any, name: Any = None) -> str:
    ident = "-" if frame_id is None else id_text(int(frame_id), bool(ext))
    label = f"{ident} {name}" if name else ident
    return f"{bus} {label}" if bus is not None else label


def window_label(window_ns: int) -> str:
    for unit, size in (("min", 60_000_000_000), ("s", 1_000_000_000), ("ms", 1_000_000),
                       ("us", 1_000)):
        if window_ns >= size and window_ns % size == 0:
            return f"{window_ns // size} {unit}"
    return f"{window_ns} ns"


def _time_axis(t0_ns: int, t1_ns: int) -> dict[str, Any]:
    return {"title": {"text": "log time [s]"}, "range": [t0_ns / NS_PER_S, t1_ns / NS_PER_S],
            "gridcolor": style.GRID, "zeroline": False, "showline": True,
            "linecolor": style.GRID}


def extend_layout(fig: go.Figure, shapes: Sequence[dict[str, Any]] = (),
                  annotations: Sequence[dict[str, Any]] = ()) -> None:
    """Append shapes and annotations by assigning the whole list once, the existing items as
    plain dicts: Plotly's add_shape revalidates the list on every call, and update_layout
    merges into an existing list item by item (both take seconds for a few hundred marks)."""
    if not shapes and not annotations:
        return
    current = fig.layout.to_plotly_json()
    if shapes:
        fig.layout.shapes = [*current.get("shapes", ()), *shapes]
    if annotations:
        fig.layout.annotations = [*current.get("annotations", ()), *annotations]


def add_marks(fig: go.Figure, marks: pl.DataFrame) -> None:
    """Vertical lines over the whole figure at each mark, labelled at the top."""
    if marks.is_empty():
        return
    shapes, notes = [], []
    for row in marks.iter_rows(named=True):  # marks are test steps: a few hundred at most
        x = row["t_ns"] / NS_PER_S
        shapes.append({"type": "line", "xref": "x", "yref": "paper", "x0": x, "x1": x,
                       "y0": 0, "y1": 1, "layer": "above",
                       "line": {"color": style.MUTED, "width": 1, "dash": "dot"}})
        text = row["text"] or ""
        short = text if len(text) <= MARK_LABEL_CHARS else text[: MARK_LABEL_CHARS - 1] + "…"
        notes.append({"x": x, "xref": "x", "y": 1, "yref": "paper", "yanchor": "bottom",
                      "xanchor": "left", "text": esc(short), "showarrow": False,
                      "hovertext": esc(f"{x:.3f} s  {text}"),
                      "font": {"size": 10, "color": style.MUTED}})
    extend_layout(fig, shapes, notes)


LOSS_NAME = "logger-loss interval (no data)"


def loss_intervals(losses: pl.DataFrame | None, bus: str | None = None) -> list[tuple[int, int]]:
    """The logger-loss intervals of one bus (those declared for every bus, `*`, included);
    all of them when ``bus`` is None."""
    if losses is None or losses.is_empty():
        return []
    part = losses if bus is None else losses.filter(pl.col("bus").is_in([bus, "*"]))
    return [(int(a), int(b)) for a, b in part.select("from_ns", "to_ns").iter_rows()
            if a is not None and b is not None]


def add_loss_shading(fig: go.Figure, losses: pl.DataFrame | None, y_top: float,
                     rows: Sequence[int] = (), bus: str | None = None) -> None:
    """Hatched violet spans where the logger recorded nothing: a dip or a flat line there is
    missing data, not a bus level. One trace per subplot row (``rows``; none: a plain
    figure); logger losses are rare events."""
    spans = loss_intervals(losses, bus)
    if not spans:
        return
    xs: list[float | None] = []
    ys: list[float | None] = []
    for a, b in spans:
        x0, x1 = a / NS_PER_S, b / NS_PER_S
        xs += [x0, x1, x1, x0, x0, None]
        ys += [0, 0, y_top, y_top, 0, None]
    for i, row in enumerate(rows or (None,)):
        trace = go.Scatter(
            x=xs, y=ys, mode="lines", fill="toself", name=LOSS_NAME, legendgroup="loss",
            showlegend=i == 0, fillcolor=_alpha(style.LOGGER_SHADE, 0.10),
            fillpattern={"shape": style.LOGGER_PATTERN, "fgcolor": style.LOGGER_SHADE,
                         "fgopacity": 0.55, "size": 8},
            line={"width": 0.8, "color": style.LOGGER_SHADE, "dash": "dot"},
            hoverinfo="text", text=LOSS_NAME)
        if row is None:
            fig.add_trace(trace)
        else:
            fig.add_trace(trace, row=row, col=1)


def load_figure(load: pl.DataFrame, stats: pl.DataFrame, buses: Sequence[str], t0_ns: int,
                t1_ns: int, load_limit: float, marks: pl.DataFrame,
                losses: pl.DataFrame | None = None) -> go.Figure:
    """Bus load per bus; one button per window size; mean (dashed) and peak (dot) marked;
    a reference line at the recommended maximum."""
    fig = go.Figure()
    windows = sorted(load["window_ns"].unique().to_list()) if not load.is_empty() else []
    default = 100_000_000 if 100_000_000 in windows else (windows[0] if windows else None)
    owners: list[int] = []  # the window of each trace, for the buttons
    for window_ns in windows:
        visible = window_ns == default
        for index, bus in enumerate(buses):
            part = load.filter((pl.col("window_ns") == window_ns) & (pl.col("bus") == bus))
            if part.is_empty():
                continue
            colour = style.bus_colour(index)
            x = seconds(part["t_ns"])
            name = esc(bus)
            enveloped = bool((part["load_max"] != part["load_min"]).any())
            if enveloped:  # the bucket spans several windows: shade their min..max
                fig.add_trace(go.Scatter(x=x, y=part["load_max"].to_numpy(), mode="lines",
                                         line={"width": 0, "color": colour}, hoverinfo="skip",
                                         showlegend=False, visible=visible, legendgroup=name))
                fig.add_trace(go.Scatter(x=x, y=part["load_min"].to_numpy(), mode="lines",
                                         line={"width": 0, "color": colour}, fill="tonexty",
                                         fillcolor=_alpha(colour, 0.18), hoverinfo="skip",
                                         showlegend=False, visible=visible, legendgroup=name))
                owners += [window_ns, window_ns]
            fig.add_trace(go.Scatter(
                x=x, y=part["load_mean"].to_numpy(), mode="lines", name=name,
                line={"width": 1.6, "color": colour}, visible=visible, legendgroup=name,
                hovertemplate=f"{name} %{{y:.1%}} at %{{x:.3f}} s<extra></extra>"))
            owners.append(window_ns)
            st = stats.filter((pl.col("window_ns") == window_ns) & (pl.col("bus") == bus))
            if not st.is_empty():
                mean, peak = st["mean_ratio"][0], st["peak_ratio"][0]
                peak_x = st["peak_t_ns"][0] / NS_PER_S
                fig.add_trace(go.Scatter(
                    x=[t0_ns / NS_PER_S, t1_ns / NS_PER_S], y=[mean, mean], mode="lines",
                    line={"width": 1, "dash": "dash", "color": colour}, visible=visible,
                    name=f"{name} mean {mean:.1%}", legendgroup=name, showlegend=True,
                    hovertemplate=f"{name} mean {mean:.1%}<extra></extra>"))
                fig.add_trace(go.Scatter(
                    x=[peak_x], y=[peak], mode="markers+text", text=[f"peak {peak:.1%}"],
                    textposition="top center", textfont={"size": 10, "color": colour},
                    marker={"size": 8, "color": colour, "line": {"width": 1, "color": "white"}},
                    visible=visible, showlegend=False, legendgroup=name,
                    hovertemplate=f"{name} peak {peak:.1%} at %{{x:.3f}} s<extra></extra>"))
                owners += [window_ns, window_ns]
    peak_all = float(load["load_max"].max()) if not load.is_empty() else 0.0  # type: ignore[arg-type]
    y_top = max(load_limit, peak_all) * 1.15 or 1
    if loss_intervals(losses):  # the shading is visible under every window choice
        add_loss_shading(fig, losses, y_top)
        owners.append(-1)
    buttons = [{"label": window_label(w), "method": "restyle",
                "args": [{"visible": [o in (w, -1) for o in owners]}]} for w in windows]
    layout = style.base_layout(
        340, xaxis=_time_axis(t0_ns, t1_ns),
        yaxis={"title": {"text": "bus load"}, "tickformat": ".0%", "gridcolor": style.GRID,
               "rangemode": "tozero", "range": [0, y_top]})
    if len(buttons) > 1:
        layout["updatemenus"] = [{
            "type": "buttons", "direction": "right", "x": 1, "xanchor": "right", "y": 1.16,
            "yanchor": "bottom", "buttons": buttons, "showactive": True,
            "active": windows.index(default) if default in windows else 0,
            "bgcolor": style.PAGE, "bordercolor": style.GRID, "font": {"size": 11}}]
        layout["margin"] = {"l": 64, "r": 24, "t": 56, "b": 44}
    fig.update_layout(**layout)
    extend_layout(
        fig, [{"type": "line", "xref": "x domain", "yref": "y", "x0": 0, "x1": 1,
               "y0": load_limit, "y1": load_limit,
               "line": {"color": style.RULE, "width": 1.2, "dash": "longdash"}}],
        [{"xref": "x domain", "yref": "y", "x": 0, "y": load_limit, "xanchor": "left",
          "yanchor": "bottom", "text": f"recommended max {load_limit:.0%}", "showarrow": False,
          "font": {"size": 10, "color": style.MUTED}}])
    add_marks(fig, marks)
    return fig


def _alpha(hex_colour: str, alpha: float) -> str:
    r, g, b = (int(hex_colour[i:i + 2], 16) for i in (1, 3, 5))
    return f"rgba({r},{g},{b},{alpha})"


def deviation_figure(timing: pl.DataFrame, buses: Sequence[str], limit: int = 60) -> go.Figure:
    """Median interval minus the period (percent of the period) per message, the bar from
    the 1st to the 99th percentile of the cycle deviation; worst first. Only the messages that
    deviate are drawn at first (column ``deviates``); a button switches to all of them."""
    fig = go.Figure()
    rows = timing.filter(pl.col("deviation_pct").is_not_null()).head(limit) \
        if "deviation_pct" in timing.columns else pl.DataFrame()
    groups: list[tuple[str, pl.DataFrame]] = []
    if not rows.is_empty():
        flagged = rows.filter(pl.col("deviates")) if "deviates" in rows.columns else rows
        # one set when there is no choice (nothing deviates: the page hides the chart behind
        # "show all"; or every message deviates)
        groups = [("deviating", flagged), ("all", rows)] \
            if 0 < len(flagged) < len(rows) else [("all", rows)]
    for index, (group, part) in enumerate(groups):
        labels = [esc(message_label(b, i, e, n)) for b, i, e, n in
                  part.select("bus", "id", "ext", "name").iter_rows()]
        colours = [style.bus_colour(list(buses).index(b)) if b in buses else style.MUTED
                   for b in part["bus"].to_list()]
        fig.add_trace(go.Scatter(
            x=labels, y=part["deviation_pct"].to_numpy(), mode="markers", name=group,
            visible=index == 0, marker={"size": 8, "color": colours},
            error_y={"type": "data", "symmetric": False,
                     "array": part["err_plus_pct"].fill_null(0).to_numpy(),
                     "arrayminus": part["err_minus_pct"].fill_null(0).to_numpy(),
                     "color": style.MUTED, "thickness": 1.2, "width": 4},
            hovertemplate="%{x}<br>median interval %{y:+.3f}% of the period"
                          "<extra></extra>"))
    extra: dict[str, Any] = {}
    if len(groups) == 2:
        n_dev, n_all = len(groups[0][1]), len(groups[1][1])
        extra["updatemenus"] = [{
            "type": "buttons", "direction": "right", "x": 1, "xanchor": "right", "y": 1.02,
            "yanchor": "bottom", "showactive": True, "active": 0, "bgcolor": style.PAGE,
            "bordercolor": style.GRID, "font": {"size": 11},
            "buttons": [{"label": f"deviating ({n_dev})", "method": "restyle",
                         "args": [{"visible": [True, False]}]},
                        {"label": f"all ({n_all})", "method": "restyle",
                         "args": [{"visible": [False, True]}]}]}]
        extra["margin"] = {"l": 64, "r": 24, "t": 48, "b": 44}
    fig.update_layout(**style.base_layout(
        320, showlegend=False,
        xaxis={"title": {"text": "message (worst first)"}, "tickangle": -40,
               "automargin": True, "gridcolor": style.GRID},
        yaxis={"title": {"text": "deviation [% of period]"}, "gridcolor": style.GRID,
               "zeroline": True, "zerolinecolor": style.RULE, "exponentformat": "none",
               "range": _symmetric_range(rows, ("deviation_pct",), MIN_DEVIATION_RANGE_PCT,
                                         ("err_plus_pct", "err_minus_pct"))}, **extra))
    return fig


def _symmetric_range(frame: pl.DataFrame, columns: Sequence[str], floor: float,
                     spreads: Sequence[str] = ()) -> list[float]:
    """A y range centred on zero that shows every value (plus its error bar), never
    narrower than +-floor, so numerical noise does not fill the chart."""
    reach = floor
    for col in columns:
        if col in frame.columns and frame[col].null_count() < len(frame):
            extra = 0.0
            for spread in spreads:
                if spread in frame.columns:
                    extra += float(frame[spread].fill_null(0).max() or 0)  # type: ignore[arg-type]
            reach = max(reach, float(frame[col].abs().max()) + extra)  # type: ignore[arg-type]
    return [-1.1 * reach, 1.1 * reach]


def drift_figure(drift: pl.DataFrame) -> go.Figure:
    """Clock drift per node in ppm (from its messages' period drift), one horizontal bar per
    node that drifts beyond tolerance (column ``deviates``); the others are said in words."""
    fig = go.Figure()
    if "deviates" in drift.columns:
        drift = drift.filter(pl.col("deviates"))
    if not drift.is_empty():
        labels = [esc(n if b is None else f"{b} {n}") for b, n in
                  drift.select("bus", "node").iter_rows()]
        spread = {}
        if drift["min_drift_ppm"].null_count() < len(drift):
            spread = {"error_x": {"type": "data", "symmetric": False,
                                  "array": drift["spread_plus_ppm"].fill_null(0).to_numpy(),
                                  "arrayminus": drift["spread_minus_ppm"].fill_null(0)
                                  .to_numpy(), "color": style.MUTED, "thickness": 1.2}}
        fig.add_trace(go.Bar(y=labels, x=drift["drift_ppm"].to_numpy(), name="clock drift",
                             orientation="h", marker={"color": style.BUS_ACCENTS[1]},
                             width=0.6, **spread,
                             hovertemplate="%{y}: %{x:+.1f} ppm (median over its messages)"
                                           "<extra></extra>"))
    fig.update_layout(**style.base_layout(
        100 + 30 * max(1, len(drift)), showlegend=False,
        yaxis={"title": {"text": ""}, "gridcolor": style.GRID, "automargin": True,
               "type": "category"},
        xaxis={"title": {"text": "clock drift [ppm] (+ = slow clock, longer periods)"},
               "gridcolor": style.GRID, "zeroline": True, "zerolinecolor": style.RULE,
               "exponentformat": "none",
               "range": _symmetric_range(drift, ("max_drift_ppm", "min_drift_ppm",
                                                 "drift_ppm"), MIN_DRIFT_RANGE_PPM)}))
    return fig


def gaps_figure(cells: pl.DataFrame, bucket_ns: int, losses: pl.DataFrame, t0_ns: int,
                t1_ns: int, marks: pl.DataFrame, names: dict[tuple[Any, Any, Any], str]
                | None = None) -> go.Figure:
    """Time x message raster: dark cells where a message was missing on the bus, light cells
    where the logger lost it; logger-loss intervals shaded over the whole raster."""
    fig = go.Figure()
    names = names or {}
    keys: list[tuple[Any, Any, Any]] = []
    n_buckets = max(1, -(-(t1_ns - t0_ns) // bucket_ns) + 1)
    first_bucket = (t0_ns // bucket_ns) * bucket_ns
    height = 240
    if not cells.is_empty():
        keys = cells.select("bus", "id", "ext").unique(maintain_order=True).rows()
        row_of = {k: i for i, k in enumerate(keys)}
        z = np.full((len(keys), n_buckets), np.nan)
        rows = np.array([row_of[k] for k in cells.select("bus", "id", "ext").iter_rows()],
                        dtype=np.int64)
        cols = np.clip((cells["t_ns"].to_numpy() - first_bucket) // bucket_ns, 0,
                       n_buckets - 1).astype(np.int64)
        z[rows, cols] = np.where(cells["logger"].to_numpy(), 2.0, 1.0)
        labels = [esc(message_label(b, i, e, names.get((b, i, e)))) for b, i, e in keys]
        x = seconds(first_bucket + bucket_ns * np.arange(n_buckets) + bucket_ns // 2)
        fig.add_trace(go.Heatmap(
            z=z, x=x, y=labels, zmin=1, zmax=2, showscale=False, xgap=0, ygap=1,
            colorscale=[[0, style.GAP_BUS], [0.5, style.GAP_BUS], [0.5, style.GAP_LOGGER],
                        [1, style.GAP_LOGGER]],
            hovertemplate="%{y}<br>missing around %{x:.2f} s<extra></extra>"))
        height = max(240, min(900, 60 + 18 * len(keys)))
    # legend entries for the two cell kinds and the logger-loss shading
    for name, colour in (("missing on the bus", style.GAP_BUS),
                         ("lost by the logger", style.GAP_LOGGER)):
        fig.add_trace(go.Scatter(x=[None], y=[None], mode="markers", name=name,
                                 marker={"symbol": "square", "size": 10, "color": colour}))
    if loss_intervals(losses) and not cells.is_empty():
        fig.add_trace(go.Scatter(x=[None], y=[None], mode="markers", name=LOSS_NAME,
                                 marker={"symbol": "square-open", "size": 10,
                                         "color": style.LOGGER_SHADE,
                                         "line": {"width": 2}}))
        # each bus's losses over that bus's rows only (rows are grouped by bus)
        shapes = []
        bus_rows: dict[Any, list[int]] = {}
        for i, (bus, _, _) in enumerate(keys):
            bus_rows.setdefault(bus, []).append(i)
        for bus, idx in bus_rows.items():
            for a, b in loss_intervals(losses, bus):  # logger losses are rare events
                shapes.append({
                    "type": "rect", "xref": "x", "yref": "y", "x0": a / NS_PER_S,
                    "x1": b / NS_PER_S, "y0": min(idx) - 0.5, "y1": max(idx) + 0.5,
                    "fillcolor": _alpha(style.LOGGER_SHADE, 0.18), "layer": "above",
                    "line": {"width": 1.5, "color": style.LOGGER_SHADE, "dash": "dot"}})
        extend_layout(fig, shapes)
    fig.update_layout(**style.base_layout(
        height, xaxis=_time_axis(t0_ns, t1_ns),
        yaxis={"title": {"text": ""}, "automargin": True, "autorange": "reversed",
               "gridcolor": style.GRID, "type": "category"},
        legend={"orientation": "h", "y": 1.02, "yanchor": "bottom", "x": 0,
                "font": {"size": 11}},
        margin={"l": 64, "r": 24, "t": 48, "b": 44}))
    add_marks(fig, marks)
    return fig


def errors_figure(errors: pl.DataFrame, bucket_ns: int, t0_ns: int, t1_ns: int,
                  marks: pl.DataFrame, losses: pl.DataFrame | None = None) -> go.Figure:
    """Error events per time bucket, stacked by error type (shades of red, each type with a
    pattern of its own)."""
    fig = go.Figure()
    if not errors.is_empty():
        several = errors["bus"].n_unique() > 1
        for bus, kind in errors.select("bus", "type").unique().sort("type", "bus").rows():
            part = errors.filter((pl.col("bus") == bus) & (pl.col("type") == kind))
            name = esc(f"{bus} {kind}" if several else kind)
            fig.add_trace(go.Bar(
                x=seconds(part["t_ns"] + bucket_ns // 2), y=part["errors"].to_numpy(),
                width=bucket_ns / NS_PER_S, name=name,
                marker={"color": style.ERROR_TYPE_COLOURS.get(kind, style.ERROR_RED),
                        "pattern": {"shape": style.ERROR_TYPE_PATTERNS.get(kind, "-"),
                                    "fgcolor": "#ffffff", "fgopacity": 0.7, "size": 6},
                        "line": {"width": 0}},
                hovertemplate=f"{name} errors: %{{y}} around %{{x:.2f}} s<extra></extra>"))
    peak = 1.0
    if not errors.is_empty():
        per_bucket = errors.group_by("t_ns").agg(pl.col("errors").sum())["errors"].max()
        peak = float(per_bucket) if isinstance(per_bucket, int | float) else 1.0  # type: ignore[arg-type]
    add_loss_shading(fig, losses, peak * 1.1)
    fig.update_layout(**style.base_layout(
        260, barmode="stack", bargap=0, xaxis=_time_axis(t0_ns, t1_ns),
        yaxis={"title": {"text": f"errors per {window_label(bucket_ns)}"},
               "gridcolor": style.GRID, "rangemode": "tozero", "range": [0, peak * 1.1]}))
    add_marks(fig, marks)
    return fig


def counters_figure(counters: pl.DataFrame, states: pl.DataFrame, t0_ns: int, t1_ns: int,
                    marks: pl.DataFrame, losses: pl.DataFrame | None = None) -> go.Figure:
    """TEC and REC per node as step functions through real counter values (every change, or
    each bucket's first, lowest, highest and last value), with the 96 / 128 / 256 levels and
    state bands behind them, and a per-node state timeline below; one shared time axis."""
    nodes = (counters.select("bus", "node").unique(maintain_order=True).rows()
             if not counters.is_empty() else [])
    if not states.is_empty():
        for key in states.select("bus", "node").unique(maintain_order=True).rows():
            if key not in nodes:
                nodes.append(key)
    state_px = max(60, STATE_ROW_PX * len(nodes))
    fig = make_subplots(rows=3, cols=1, shared_xaxes=True, vertical_spacing=0.04,
                        row_heights=[COUNTER_PANEL_PX, COUNTER_PANEL_PX, state_px])
    labels = {k: esc(k[1] if len({b for b, _ in nodes}) <= 1 else f"{k[0]} {k[1]}")
              for k in nodes}
    top = 300
    if not counters.is_empty():
        peak = counters["value"].max()
        top = max(top, int(peak) + 20 if isinstance(peak, int | float) else top)
    for row_index in (1, 2):
        yref = "y" if row_index == 1 else f"y{row_index}"
        xref = "x domain" if row_index == 1 else f"x{row_index} domain"
        # REC has no bus-off level: only TEC > 255 takes a node off the bus
        levels = COUNTER_LEVELS if row_index == 1 else COUNTER_LEVELS[:2]
        bounds = (0, *(level for level, _ in levels), top)
        bands = [{"type": "rect", "xref": xref, "yref": yref, "x0": 0, "x1": 1, "y0": lo,
                  "y1": hi, "fillcolor": style.STATE_COLOURS[state], "opacity": 0.28,
                  "line": {"width": 0}, "layer": "below"}
                 for state, lo, hi in zip(STATE_ORDER, bounds[:-1], bounds[1:], strict=False)]
        lines = [{"type": "line", "xref": xref, "yref": yref, "x0": 0, "x1": 1, "y0": level,
                  "y1": level, "line": {"color": style.RULE, "width": 1, "dash": "dot"}}
                 for level, _ in levels]
        notes = [{"xref": xref, "yref": yref, "x": 1, "y": level, "xanchor": "right",
                  "yanchor": "bottom", "text": text, "showarrow": False,
                  "font": {"size": 9, "color": style.MUTED}} for level, text in levels]
        extend_layout(fig, bands + lines, notes)
    for index, key in enumerate(nodes):  # one trace pair per node: a handful
        part = counters.filter((pl.col("bus") == key[0]) & (pl.col("node") == key[1])) \
            if not counters.is_empty() else pl.DataFrame()
        if part.is_empty():
            continue
        colour = style.node_colour(index)
        dash = style.NODE_DASHES[index % len(style.NODE_DASHES)]
        for row_index, prefix in ((1, "tec"), (2, "rec")):
            series = part.filter(pl.col("counter") == prefix)
            fig.add_trace(go.Scatter(
                x=seconds(series["t_ns"]), y=series["value"].to_numpy(), mode="lines",
                name=labels[key], legendgroup=labels[key], showlegend=row_index == 1,
                line={"color": colour, "width": 1.6, "shape": "hv", "dash": dash},
                hovertemplate=f"{labels[key]} {prefix.upper()} %{{y}} from %{{x:.6f}} s"
                              "<extra></extra>"), row=row_index, col=1)
    if not states.is_empty():
        for state in states["state"].unique(maintain_order=True).to_list():  # four at most
            part = states.filter(pl.col("state") == state)
            fig.add_trace(go.Bar(
                x=seconds(part["duration_ns"]), base=seconds(part["from_ns"]),
                y=[labels.get(k, esc(k[1])) for k in part.select("bus", "node").iter_rows()],
                orientation="h", showlegend=False, name=esc(state),
                marker={"color": style.STATE_COLOURS.get(state, style.MUTED),
                        "pattern": {"shape": style.STATE_PATTERNS.get(state, "")},
                        "line": {"width": 0}},
                hovertemplate=f"%{{y}} {esc(state)}<br>from %{{base:.3f}} s for "
                              "%{x:.3f} s<extra></extra>"), row=3, col=1)
        for state in STATE_ORDER:  # a legend for the state colours
            fig.add_trace(go.Bar(x=[None], y=[None], name=state, orientation="h",
                                 marker={"color": style.STATE_COLOURS[state],
                                         "pattern": {"shape": style.STATE_PATTERNS[state]}},
                                 legendgroup="states"), row=3, col=1)
    height = 2 * COUNTER_PANEL_PX + state_px + 150
    fig.update_layout(**style.base_layout(height, barmode="overlay", bargap=0.3))
    fig.update_layout(legend={"orientation": "h", "y": -0.08, "x": 0})
    time_axis = _time_axis(t0_ns, t1_ns)
    for axis in ("xaxis", "xaxis2"):
        fig.layout[axis].update(range=time_axis["range"], gridcolor=style.GRID)
    fig.layout["xaxis3"].update(**time_axis)
    fig.layout["yaxis"].update(title={"text": "TEC (transmit)"}, range=[0, top], gridcolor=style.GRID)
    fig.layout["yaxis2"].update(title={"text": "REC (receive)"}, range=[0, top], gridcolor=style.GRID)
    fig.layout["yaxis3"].update(type="category", automargin=True, autorange="reversed",
                                title={"text": "state"})
    if losses is not None:
        add_loss_shading(fig, losses, top, rows=(1, 2))
    add_marks(fig, marks)
    return fig


def align_time_axes(figs: Sequence[go.Figure]) -> None:
    """Give every time figure the same left margin (room for the longest category label), so
    linked time axes also line up on the page."""
    longest = 0
    for fig in figs:
        for trace in fig.data:
            labels = trace.y if trace.type in ("heatmap", "bar") and trace.y is not None else ()
            longest = max([longest, *(len(html.unescape(str(v))) for v in labels if v)])
    left = int(min(MAX_LEFT_PX, max(MIN_LEFT_PX, LABEL_CHAR_PX * longest + 30)))
    for fig in figs:
        margin = fig.layout.margin
        fig.update_layout(margin={"l": left, "r": margin.r, "t": margin.t, "b": margin.b})
        fig.update_yaxes(automargin=False)
