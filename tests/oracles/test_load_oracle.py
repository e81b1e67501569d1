"""Bus load against the brute-force per-nanosecond oracle in tests/oracles/load_oracle.py.

Small logs with frames and error frames in every field, windows whose edges the oracle
computes itself (k * W, also below 0), spans straddling edges, negative start_ns, extended
frames, spans longer than a window (125 kbit/s frames are longer than 1 ms), at 125 k,
250 k, 500 k and 1 M nominal bit rates; then the same through `tracelab ingest` +
`tracelab load` with frame durations from the independent frame oracle.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.analyses.synth import connect_tables
from tests.oracles import frame_oracle as fo
from tests.oracles import load_oracle as lo
from tracelab.analyses.load import bus_load
from tracelab.store import schema

NOMINAL = [125_000, 250_000, 500_000, 1_000_000]
FIELDS = ["sof", "arbitration", "control", "data", "crc", "ack", "eof", "interframe",
          "unknown"]


def _frames(spans: list[tuple[int, int, int, bool, bool]], bus: str = "P") -> pl.DataFrame:
    """(start_ns, duration_ns, bits, ext, brs) rows as a frames table."""
    n = len(spans)
    return schema.conform(pl.DataFrame({
        "run": ["r1"] * n, "bus": [bus] * n, "t_ns": [s for s, *_ in spans],
        "start_ns": [s for s, *_ in spans], "end_ns": [s + d for s, d, *_ in spans],
        "id": [0x100 + i % 7 for i in range(n)], "ext": [x for *_, x, _ in spans],
        "rtr": [False] * n, "fd": [b for *_, b in spans], "brs": [b for *_, b in spans],
        "esi": [False] * n, "dlc": [8] * n, "data": [bytes(8)] * n,
        "bits": [b for _, _, b, _, _ in spans], "duration_ns": [d for _, d, *_ in spans],
        "file": ["x.frames"] * n, "line": list(range(1, n + 1)),
    }), "frames")


def _errors(rows: list[tuple[int, str, bool]], bus: str = "P") -> pl.DataFrame:
    n = len(rows)
    return pl.DataFrame({
        "run": ["r1"] * n, "bus": [bus] * n, "t_ns": [t for t, _, _ in rows],
        "type": ["bit"] * n, "field": [f for _, f, _ in rows], "id": [0x100] * n,
        "ext": [x for _, _, x in rows], "form": ["s"] * n, "by": [None] * n,
        "file": ["x.frames"] * n, "line": list(range(1, n + 1)),
    }, schema=schema.ERRORS)


def _check(frames: list[tuple[int, int, int, bool, bool]], errors: list[tuple[int, str, bool]],
           bit_ns: int, window_ns: int) -> None:
    con = connect_tables(_frames(frames), errors=_errors(errors) if errors else None)
    result = bus_load(con, window_ns=window_ns)
    spans = [(s, s + d) for s, d, *_ in frames]
    err_spans = [lo.error_span(t, f, x, bit_ns) for t, f, x in errors]
    want = lo.windows(spans, err_spans, window_ns)
    got = result.windows
    assert got["t_ns"].to_list() == [w.t_ns for w in want]
    assert got["busy_ns"].to_list() == [w.busy_ns for w in want]
    assert got["frames"].to_list() == [w.frames for w in want]
    assert got["error_frames"].to_list() == [w.error_frames for w in want]
    assert got["load_ratio"].to_list() == [w.busy_ns / window_ns for w in want]
    ratio = np.array([w.busy_ns / window_ns for w in want])
    summary = result.summary.row(0, named=True)
    # source: numpy.percentile (linear interpolation), numpy.mean
    for key, q in (("p50", 50), ("p95", 95), ("p99", 99)):
        assert summary[key] == pytest.approx(np.percentile(ratio, q), rel=1e-12, abs=1e-15)
    assert summary["mean"] == pytest.approx(ratio.mean(), rel=1e-12)
    assert summary["max"] == ratio.max()
    assert summary["max_t_ns"] == want[int(np.argmax(ratio))].t_ns
    assert summary["windows"] == len(want)
    assert (summary["frames"], summary["error_frames"]) == (len(frames), len(errors))
    assert summary["busy_ns"] == sum(e - s for s, e in spans + err_spans)
    first = min(s for s, _ in spans)
    last = max(e for _, e in spans)
    assert summary["span_ns"] == last - first
    assert summary["frames_per_s"] == pytest.approx(len(frames) / ((last - first) / 1e9))


def test_oracle_field_bits_match_the_documented_estimate() -> None:
    # derived from the oracle's field lists; docs/analyses.md states the same numbers
    assert [lo.bits_before(f, False) for f in FIELDS] == [1, 13, 19, 83, 99, 101, 108, 0, 0]
    assert [lo.bits_before(f, True) - lo.bits_before(f, False) for f in FIELDS] == \
        [0, 20, 20, 20, 20, 20, 20, 0, 0]


@pytest.mark.parametrize("bps", NOMINAL)
def test_every_error_field_straddling_window_edges(bps: int) -> None:
    bit_ns = 10**9 // bps
    w = 1_000_000
    # frames back to back from below zero across three window edges, 125 bits each
    d = 125 * bit_ns
    frames = [(-w // 2 + i * d, d, 125, i % 3 == 0, False) for i in range(12)]
    # one error in every field, each placed so that its span crosses a window edge
    # (t_ns a few bits after an edge), base and extended
    errors = [(k * w + 5 * bit_ns, f, k % 2 == 1) for k, f in enumerate(FIELDS, start=1)]
    _check(frames, errors, bit_ns, w)


@pytest.mark.parametrize("bps", NOMINAL)
@pytest.mark.parametrize("window_ns", [1_000_000, 3_000_000])
def test_negative_starts_and_exact_edges(bps: int, window_ns: int) -> None:
    bit_ns = 10**9 // bps
    d = 111 * bit_ns
    frames = [
        (-window_ns - d, d, 111, False, False),     # ends exactly on an edge below zero
        (-d // 2, d, 111, True, False),             # straddles t = 0
        (window_ns - d, d, 111, False, False),      # ends exactly on an edge: no spill
        (2 * window_ns - 1, d, 111, False, False),  # starts 1 ns before an edge
        (3 * window_ns, d, 111, True, False),       # starts exactly on an edge
        (5 * window_ns - d + 1, d, 111, False, False),  # the last: 1 ns into the next window
    ]
    errors = [(-3 * bit_ns, "crc", False), (2 * window_ns + 2 * bit_ns, "eof", True)]
    _check(frames, errors, bit_ns, window_ns)


_spans = st.lists(st.tuples(st.integers(-4_000_000, 5_000_000), st.integers(47, 160),
                            st.booleans()), min_size=1, max_size=25)
_errs = st.lists(st.tuples(st.integers(-3_000_000, 5_000_000), st.sampled_from(FIELDS),
                           st.booleans()), max_size=6)


@settings(max_examples=25, deadline=None)
@given(_spans, _errs, st.sampled_from(NOMINAL), st.sampled_from([1_000_000, 2_000_000]),
       st.lists(st.tuples(st.integers(-2_000_000, 4_000_000), st.integers(60, 700)),
                max_size=3))
def test_random_small_logs_equal_the_oracle(frames: list[tuple[int, int, bool]],
                                            errors: list[tuple[int, str, bool]], bps: int,
                                            window_ns: int, brs: list[tuple[int, int]]) -> None:
    bit_ns = 10**9 // bps
    rows = [(s, b * bit_ns, b, x, False) for s, b, x in frames]
    # BRS frames: durations shorter than bits x nominal bit time; the error-frame bit time
    # must still come from the non-BRS frames only
    rows += [(s, b * bit_ns // 3, b, False, True) for s, b in brs]
    _check(rows, errors, bit_ns, window_ns)


@pytest.mark.parametrize("bps,data_bps", [(250_000, 2_000_000), (500_000, 5_000_000),
                                          (1_000_000, 5_000_000), (125_000, 2_000_000)])
def test_cli_load_on_an_ingested_log(tmp_path: Path, bps: int, data_bps: int,
                                     capsys: pytest.CaptureFixture[str]) -> None:
    from tracelab.cli import main
    from tracelab.format.writer import BusDecl, LogHeader, LogWriter, error_line, frame_line

    bit_ns = 10**9 // bps
    rng = np.random.default_rng(bps)
    specs = []
    t = -40_000  # the first frame starts before t = 0 (stamp=end, its t_ns > 0)
    for i in range(40):  # test data generation
        ext, fd = i % 3 == 1, i % 4 == 2
        brs = fd and i % 8 == 2
        dlc = int(rng.integers(0, 16 if fd else 9))
        n = fo.n_data_bytes(dlc, fd, False)
        data = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        ident = int(rng.integers(1 << (29 if ext else 11)))
        wire = fo.build(ident, ext, False, fd, brs, False, dlc, data)
        dur = wire.duration_ns(bps, data_bps)
        start = t
        t_eof = start + dur - 3 * bit_ns  # stamp=end: the end of EOF (DEVELOPERS.md)
        specs.append((t_eof, frame_line(t_eof, "P", ident, ext, False, fd, brs, False, dlc,
                                        data), (start, dur)))
        t += dur + int(rng.integers(0, 600_000))
    errs = [(150_000, "crc", False), (1_990_000, "data", True), (3_000_000, "sof", False)]
    lines = [(tt, line) for tt, line, _ in specs]
    lines += [(tt, error_line(tt, "P", "bit", f, 0x100, x, "x" if x else "s", None)) for tt, f, x in errs]
    header = LogHeader(buses=[BusDecl("P", bps, data_bps)], origin="2026-03-01T08:00:00Z",
                       meta={"run": "r1"})
    log = tmp_path / "r1.frames"
    with LogWriter(log, header) as writer:
        writer.lines([line for _, line in sorted(lines)])
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds"), "--quiet"]) == 0
    assert main(["load", str(tmp_path / "ds"), "--window", "1ms", "--json"]) == 0
    (summary,) = _json_tail(capsys.readouterr().out)
    got = pl.read_parquet(tmp_path / "ds" / "analyses" / "load.parquet")
    spans = [(s, s + d) for _, _, (s, d) in specs]
    want = lo.windows(spans, [lo.error_span(tt, f, x, bit_ns) for tt, f, x in errs], 1_000_000)
    assert got["t_ns"].to_list() == [w.t_ns for w in want]
    assert got["busy_ns"].to_list() == [w.busy_ns for w in want]
    assert got["frames"].to_list() == [w.frames for w in want]
    assert got["error_frames"].to_list() == [w.error_frames for w in want]
    assert summary["max"] == max(w.busy_ns for w in want) / 1_000_000


def _json_tail(out: str) -> list[dict[str, object]]:
    return json.loads(out[out.index("["):])
