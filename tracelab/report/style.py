"""The report's look as data: a calm neutral base, one accent per bus, red only for errors."""

from __future__ import annotations

from string import Template
from typing import Any

INK = "#26292e"
MUTED = "#6a6f78"
GRID = "#e6e4df"
PAPER = "#ffffff"
PAGE = "#f5f4f0"
RULE = "#8a8f98"  # reference lines (recommended maximum, counter levels)

#: One accent per bus, in the order buses are declared; none of them is red.
BUS_ACCENTS = ("#2d7d8a", "#5a62a8", "#7d8c3c", "#a87a33", "#7f5a86", "#4e6a74", "#3f8f6b")
#: Per-node line colours (TEC / REC), also free of red.
NODE_COLOURS = ("#2d7d8a", "#5a62a8", "#a87a33", "#7d8c3c", "#7f5a86", "#4e6a74", "#3f8f6b",
                "#8c6d4f", "#5f7f9f", "#6b8f3f")

#: Line dashes per node, so counter lines differ by more than hue (colour-blind readers).
NODE_DASHES = ("solid", "dash", "dot", "dashdot", "longdash", "longdashdot")

#: Red is reserved for errors: each error type gets a shade of it and, so that the types
#: differ without colour too, a fill pattern of its own.
ERROR_RED = "#c0392b"
ERROR_TYPE_COLOURS = {
    "bit": "#c0392b", "stuff": "#e0665a", "crc": "#7a1f16", "form": "#f0a096",
    "ack": "#a8433a", "other": "#d98880",
}
ERROR_TYPE_PATTERNS = {"bit": "", "stuff": "/", "crc": "x", "form": ".", "ack": "+",
                       "other": "-"}

#: Fault-confinement state bands, from calm to alarming (bus-off is an error: red).
STATE_COLOURS = {
    "error-active": "#d9e6dc",
    "warning": "#f2dfa6",
    "error-passive": "#eeb07a",
    "bus-off": "#c0392b",
}

#: State bands also carry a pattern (the timeline must read in greyscale too).
STATE_PATTERNS = {"error-active": "", "warning": ".", "error-passive": "/", "bus-off": "x"}

GAP_BUS = "#36414f"  # frames missing on the bus: dark slate
GAP_LOGGER = "#d6b46a"  # frames the logger lost: warm sand, far from slate and from violet
#: Logger-loss intervals (the logger recorded nothing): violet, hatched on every time chart,
#: so "no data here" never reads as a level or as a gap cell.
LOGGER_SHADE = "#7b6fb0"
LOGGER_PATTERN = "\\"


def bus_colour(index: int) -> str:
    return BUS_ACCENTS[index % len(BUS_ACCENTS)]


def node_colour(index: int) -> str:
    return NODE_COLOURS[index % len(NODE_COLOURS)]


def base_layout(height: int, **extra: Any) -> dict[str, Any]:
    """Layout every figure starts from."""
    layout: dict[str, Any] = {
        "height": height,
        "margin": {"l": 64, "r": 24, "t": 36, "b": 44},
        "paper_bgcolor": PAPER,
        "plot_bgcolor": PAPER,
        "font": {"family": "Inter, 'Segoe UI', 'Helvetica Neue', Arial, sans-serif",
                 "size": 12, "color": INK},
        "hovermode": "closest",
        "legend": {"orientation": "h", "y": -0.18, "x": 0, "font": {"size": 11}},
        "xaxis": {"gridcolor": GRID, "zeroline": False, "linecolor": GRID},
        "yaxis": {"gridcolor": GRID, "zeroline": False, "linecolor": GRID},
    }
    layout.update(extra)
    return layout


CSS = Template("""
:root { --ink: $ink; --muted: $muted; --grid: $grid; --page: $page;
        --paper: $paper; --red: $red; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--page); color: var(--ink);
       font: 14px/1.5 Inter, 'Segoe UI', 'Helvetica Neue', Arial, sans-serif; }
main { max-width: 1240px; margin: 0 auto; padding: 28px 24px 48px; }
h1 { font-size: 22px; font-weight: 600; margin: 0 0 4px; letter-spacing: .2px; }
h2 { font-size: 16px; font-weight: 600; margin: 0 0 12px; }
h3 { font-size: 13px; font-weight: 600; margin: 18px 0 6px; color: var(--muted);
     text-transform: uppercase; letter-spacing: .6px; }
.sub { color: var(--muted); margin: 0 0 16px; }
section { background: var(--paper); border: 1px solid var(--grid); border-radius: 8px;
          padding: 18px 20px; margin: 0 0 18px; }
.facts { display: grid; grid-template-columns: repeat(auto-fill, minmax(200px, 1fr));
         gap: 10px 24px; margin: 0; }
.facts div { border-left: 2px solid var(--grid); padding-left: 10px; }
.facts dt { color: var(--muted); font-size: 12px; }
.facts dd { margin: 0; font-variant-numeric: tabular-nums; }
.swatch { display: inline-block; width: 9px; height: 9px; border-radius: 2px;
          margin-right: 5px; vertical-align: baseline; }
.verdict { font-size: 15px; padding: 10px 14px; border-radius: 6px; margin: 14px 0 0;
           background: #eef3ef; border-left: 4px solid #5f8f6f; }
.verdict.bad { background: #fbefed; border-left-color: var(--red); }
.verdict.unknown { background: #f1f1ef; border-left-color: var(--muted); }
table { border-collapse: collapse; width: 100%; font-variant-numeric: tabular-nums;
        font-size: 13px; }
th, td { text-align: left; padding: 5px 7px; border-bottom: 1px solid var(--grid);
         vertical-align: top; }
th { color: var(--muted); font-weight: 600; font-size: 12px; white-space: nowrap; }
th.sort { cursor: pointer; user-select: none; }
th.sort::after { content: " \\2195"; color: #b5b8be; }
td.num, th.num { text-align: right; white-space: nowrap; }
td.msg { white-space: nowrap; }
thead th { position: sticky; top: 0; background: var(--paper); z-index: 1;
           box-shadow: inset 0 -1px 0 var(--grid); }
.wide { overflow-x: auto; }
.pager { display: flex; gap: 6px; align-items: center; margin: 8px 0 0; flex-wrap: wrap;
         color: var(--muted); font-size: 12px; }
.pager button, .tools button { font: inherit; font-size: 12px; color: var(--ink);
         background: var(--page); border: 1px solid var(--grid); border-radius: 4px;
         padding: 2px 8px; cursor: pointer; }
.pager button[aria-current="true"] { background: var(--ink); color: var(--paper); }
.tools { display: flex; justify-content: flex-end; margin: 0 0 4px; }
nav.toc { font-size: 13px; margin: 0 0 18px; }
nav.toc a { color: var(--ink); margin-right: 14px; text-decoration: none;
            border-bottom: 1px dotted var(--muted); }
.caption { color: var(--ink); font-size: 13px; margin: 4px 0 10px; }
details.tech, details.more { margin: 12px 0 0; }
details.more > summary { cursor: pointer; color: var(--muted); font-size: 13px; }
details.tech > summary { cursor: pointer; color: var(--muted); font-size: 13px; }
.statement { font-size: 15px; padding: 10px 14px; border-radius: 6px; margin: 0 0 12px;
             background: #eef3ef; border-left: 4px solid #5f8f6f; }
.statement.bad { background: #fbefed; border-left-color: var(--red); }
.statement.unknown { background: #f1f1ef; border-left-color: var(--muted); }
.bad-cell { color: var(--red); font-weight: 600; }
.muted { color: var(--muted); }
code, .raw { font-family: 'JetBrains Mono', Menlo, Consolas, monospace; font-size: 12px; }
ul.evidence { margin: 6px 0 0; padding-left: 18px; }
.fig { width: 100%; }
.note { color: var(--muted); font-size: 12px; margin: 6px 0 0; }
footer { color: var(--muted); font-size: 12px; border-top: 1px solid var(--grid);
         padding-top: 12px; margin-top: 8px; }
""").substitute(ink=INK, muted=MUTED, grid=GRID, page=PAGE, paper=PAPER, red=ERROR_RED)
