"""Each figure builder on small prepared data: the traces it draws and the axis ranges."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from tracelab.report import figures, style

T0, T1 = 0, 10_000_000_000  # a 10 s run
MARKS = pl.DataFrame({"bus": ["*"], "t_ns": [4_000_000_000], "text": ["<script>x</script>"]})
NO_MARKS = pl.DataFrame(schema={"bus": pl.String, "t_ns": pl.Int64, "text": pl.String})


def _load() -> tuple[pl.DataFrame, pl.DataFrame]:
    rows, stats = [], []
    for bus, level in (("body", 0.2), ("chassis", 0.4)):
        for window_ns, n in ((100_000_000, 100), (1_000_000_000, 10)):
            t = np.arange(n, dtype=np.int64) * window_ns
            mean = np.full(n, level)
            rows.append(pl.DataFrame({"bus": bus, "window_ns": window_ns, "t_ns": t,
                                      "load_min": mean, "load_max": mean, "load_mean": mean}))
            stats.append(pl.DataFrame({"bus": [bus], "window_ns": [window_ns],
                                       "mean_ratio": [level], "peak_ratio": [level + 0.1],
                                       "peak_t_ns": [2_000_000_000], "windows": [n]}))
    return pl.concat(rows), pl.concat(stats)


def test_load_figure_offers_each_window_and_marks_mean_peak_and_limit() -> None:
    load, stats = _load()
    fig = figures.load_figure(load, stats, ["body", "chassis"], T0, T1, 0.7, MARKS)
    buttons = fig.layout.updatemenus[0].buttons
    assert [b.label for b in buttons] == ["100 ms", "1 s"]
    # per bus and window: the load line, the mean line and the peak marker
    assert len(fig.data) == 2 * 2 * 3
    visible = [t for t in fig.data if t.visible]
    assert len(visible) == 6  # only the 100 ms window at first
    lines = [t for t in visible if t.mode == "lines" and len(t.x) == 100]
    assert sorted(float(t.y[0]) for t in lines) == [0.2, 0.4]
    means = [t for t in visible if t.mode == "lines" and len(t.x) == 2]
    assert sorted(float(t.y[0]) for t in means) == [0.2, 0.4]
    peaks = [t for t in visible if t.mode == "markers+text"]
    assert sorted(float(t.y[0]) for t in peaks) == pytest.approx([0.3, 0.5])
    assert all(t.x[0] == 2.0 for t in peaks)
    # each button shows exactly the traces of its window
    assert sum(buttons[1].args[0]["visible"]) == 6
    assert list(fig.layout.xaxis.range) == [0.0, 10.0]
    assert fig.layout.yaxis.range[1] >= 0.7  # the reference line stays in view
    limit = [s for s in fig.layout.shapes if s.y0 == 0.7 and s.y1 == 0.7]
    assert len(limit) == 1
    mark = [s for s in fig.layout.shapes if s.x0 == 4.0]
    assert len(mark) == 1 and mark[0].yref == "paper"
    texts = [a.text for a in fig.layout.annotations]
    assert "&lt;script&gt;x&lt;/script&gt;" in texts and "<script>x</script>" not in texts


def test_load_figure_shades_min_max_when_buckets_hold_several_windows() -> None:
    load = pl.DataFrame({"bus": "body", "window_ns": 100_000_000, "t_ns": [0, 5_000_000_000],
                         "load_min": [0.1, 0.2], "load_max": [0.3, 0.6],
                         "load_mean": [0.2, 0.4]})
    stats = pl.DataFrame({"bus": ["body"], "window_ns": [100_000_000], "mean_ratio": [0.3],
                          "peak_ratio": [0.6], "peak_t_ns": [5_100_000_000], "windows": [100]})
    fig = figures.load_figure(load, stats, ["body"], T0, T1, 0.5, NO_MARKS)
    band = [t for t in fig.data if t.fill == "tonexty"]
    assert len(band) == 1 and list(band[0].y) == [0.1, 0.2]
    assert list(fig.data[0].y) == [0.3, 0.6]  # the upper edge drawn just before the band
    assert not fig.layout.updatemenus  # one window size: no buttons


def test_deviation_figure_plots_each_message_with_percentile_bars() -> None:
    timing = pl.DataFrame({
        "bus": ["body", "chassis"], "id": [0x100, 0x18FF0001], "ext": [False, True],
        "name": ["VcuStatus", None], "deviation_pct": [0.5, -1.25],
        "err_plus_pct": [1.0, 0.25], "err_minus_pct": [2.0, 0.5]})
    fig = figures.deviation_figure(timing, ["body", "chassis"])
    (trace,) = fig.data  # without a `deviates` column every message is drawn
    assert list(trace.x) == ["body 100 VcuStatus", "chassis 18FF0001"]
    assert list(trace.y) == [0.5, -1.25]
    assert list(trace.error_y.array) == [1.0, 0.25]
    assert list(trace.error_y.arrayminus) == [2.0, 0.5]
    assert trace.marker.color == (style.bus_colour(0), style.bus_colour(1))


def test_deviation_figure_draws_the_deviating_and_switches_to_all() -> None:
    timing = pl.DataFrame({
        "bus": ["body"] * 3, "id": [0x100, 0x101, 0x102], "ext": [False] * 3,
        "name": ["a", "b", "c"], "deviation_pct": [0.5, 0.0, 0.001],
        "err_plus_pct": [1.0, 0.1, 0.1], "err_minus_pct": [2.0, 0.1, 0.1],
        "deviates": [True, False, False]})
    fig = figures.deviation_figure(timing, ["body"])
    shown, every = fig.data
    assert shown.visible is True and list(shown.x) == ["body 100 a"]
    assert every.visible is False and len(every.x) == 3
    labels = [b.label for b in fig.layout.updatemenus[0].buttons]
    assert labels == ["deviating (1)", "all (3)"]


def test_drift_figure_has_one_bar_per_drifting_node() -> None:
    drift = pl.DataFrame({"bus": [None, None, None], "node": ["vcu", "esc", "bms"],
                          "drift_ppm": [40.0, -15.0, 0.2],
                          "min_drift_ppm": [38.0, -16.0, 0.1], "max_drift_ppm": [41.0, -14.0, 0.3],
                          "spread_plus_ppm": [1.0, 1.0, 0.1], "spread_minus_ppm": [2.0, 1.0, 0.1],
                          "deviates": [True, True, False]})
    (trace,) = figures.drift_figure(drift).data
    assert list(trace.y) == ["vcu", "esc"] and list(trace.x) == [40.0, -15.0]
    assert trace.orientation == "h"
    assert list(trace.error_x.arrayminus) == [2.0, 1.0]


def test_gaps_figure_places_bus_and_logger_cells_and_shades_losses() -> None:
    bucket = 1_000_000_000
    cells = pl.DataFrame({"bus": ["body", "body", "chassis"], "id": [0x120, 0x120, 0x300],
                          "ext": [False, False, False], "t_ns": [2 * bucket, 3 * bucket, 7 * bucket],
                          "gaps": [1, 1, 1], "logger": [False, False, True]})
    losses = pl.DataFrame({"bus": ["chassis"], "from_ns": [6_500_000_000],
                           "to_ns": [7_500_000_000], "count": [12]})
    fig = figures.gaps_figure(cells, bucket, losses, T0, T1, NO_MARKS,
                              {("body", 0x120, False): "DoorState"})
    heat = fig.data[0]
    z = np.array(heat.z, dtype=float)
    assert z.shape == (2, 11)  # two messages x buckets 0..10 s
    assert z[0, 2] == 1 and z[0, 3] == 1 and z[1, 7] == 2
    assert np.isnan(z).sum() == z.size - 3
    assert list(heat.y) == ["body 120 DoorState", "chassis 300"]
    assert heat.x[2] == pytest.approx(2.5)  # cell centres
    shade = [s for s in fig.layout.shapes if s.type == "rect"]
    assert [(s.x0, s.x1) for s in shade] == [(6.5, 7.5)]
    assert list(fig.layout.xaxis.range) == [0.0, 10.0]


def test_errors_figure_stacks_one_trace_per_type_in_reds() -> None:
    bucket = 500_000_000
    errors = pl.DataFrame({"bus": ["body"] * 3, "type": ["bit", "bit", "crc"],
                           "t_ns": [0, bucket, bucket], "errors": [3, 1, 2]})
    fig = figures.errors_figure(errors, bucket, T0, T1, MARKS)
    assert [t.name for t in fig.data] == ["bit", "crc"]
    assert [list(t.y) for t in fig.data] == [[3, 1], [2]]
    assert list(fig.data[0].x) == [0.25, 0.75] and fig.data[0].width == 0.5
    assert fig.data[0].marker.color == style.ERROR_TYPE_COLOURS["bit"]
    assert fig.layout.barmode == "stack"
    assert list(fig.layout.xaxis.range) == [0.0, 10.0]


def test_counters_figure_draws_levels_state_bands_and_node_states() -> None:
    counters = pl.DataFrame({"bus": ["body"] * 6, "node": ["bcm"] * 6,
                             "counter": ["tec"] * 3 + ["rec"] * 3,
                             "t_ns": [0, 1_000_000_000, 2_000_000_000] * 2,
                             "value": [8, 136, 264, 0, 1, 2]})
    states = pl.DataFrame({"bus": ["body"] * 2, "node": ["bcm"] * 2,
                           "state": ["error-passive", "bus-off"],
                           "from_ns": [1_000_000_000, 2_000_000_000],
                           "to_ns": [2_000_000_000, 10_000_000_000],
                           "duration_ns": [1_000_000_000, 8_000_000_000]})
    fig = figures.counters_figure(counters, states, T0, T1, MARKS)
    tec, rec = fig.data[0], fig.data[1]
    assert list(tec.y) == [8, 136, 264] and list(rec.y) == [0, 1, 2]
    assert tec.line.shape == "hv"
    levels = sorted({s.y0 for s in fig.layout.shapes if s.type == "line" and s.y0 == s.y1})
    # from memory: ISO 11898-1 fault confinement: error-passive when a counter exceeds 127, bus-off
    # when TEC exceeds 255; the warning limit of 96 is the common controller choice
    # (common practice, no source).
    assert levels == [96, 128, 256]
    bars = [t for t in fig.data if t.type == "bar" and t.base is not None]
    assert [(t.base[0], t.x[0]) for t in bars] == [(1.0, 1.0), (2.0, 8.0)]
    assert bars[1].marker.color == style.STATE_COLOURS["bus-off"] == style.ERROR_RED
    assert fig.layout.yaxis.range[1] > 264
    for axis in ("xaxis", "xaxis2", "xaxis3"):
        assert list(fig.layout[axis].range) == [0.0, 10.0]


def test_builders_accept_empty_inputs() -> None:
    empty = pl.DataFrame()
    assert len(figures.load_figure(empty, empty, [], T0, T1, 0.5, NO_MARKS).data) == 0
    assert len(figures.deviation_figure(empty, []).data) == 0
    assert len(figures.drift_figure(empty).data) == 0
    assert len(figures.errors_figure(empty, 1, T0, T1, NO_MARKS).data) == 0
    assert figures.counters_figure(empty, empty, T0, T1, NO_MARKS).layout.yaxis.range[1] == 300
