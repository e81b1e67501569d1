"""A synthetic dataset (parts, manifest and analyses written directly) for report tests and
the report benchmark. The analyses here are stand-ins with the agreed column names; they
only need to be plausible, the report layer must draw whatever it is given."""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import numpy as np
import polars as pl

from tracelab.analyses.load import bus_load
from tracelab.analyses.timing import timing
from tracelab.network.catalog import BusSpec, Catalog, MessageSpec, NodeSpec
from tracelab.store import schema
from tracelab.store.dataset import create_or_open

RUN = "synthetic-run"
SCRIPT_MARK = "<script>window.__tl_injected = 1</script> step 2"
#: bus -> (nominal_bps, data_bps); messages: (bus, id, period_ms, sender, name)
BUSES = {"body": (500_000, None), "chassis": (500_000, 2_000_000)}
MESSAGES = (
    ("body", 0x100, 10, "vcu", "VcuStatus"), ("body", 0x120, 20, "bcm", "DoorState"),
    ("body", 0x1A0, 50, "bcm", "LampCmd"), ("body", 0x200, 100, "hvac", "CabinTemp"),
    ("chassis", 0x080, 10, "esc", "WheelSpeed"), ("chassis", 0x0C0, 20, "eps", "SteerAngle"),
    ("chassis", 0x300, 100, "esc", "BrakeInfo"),
)
SKIP = {0x120: (20.0, 21.0), 0x300: (30.0, 33.0)}  # (from_s, to_s): frames missing
LOSS = ("chassis", 30.5, 31.5)  # logger lost frames here
FRAME_NS = 230_000
DRIFT_PPM = {"vcu": 40.0, "esc": -15.0}  # sender clock drift  # 115 bits at 500 kbit/s, roughly


def frames_table(duration_s: float, repeat: int = 1, seed: int = 7) -> pl.DataFrame:
    """All frames of the run; ``repeat`` copies each message at offset ids (bench scale)."""
    rng = np.random.default_rng(seed)
    parts = []
    for copy in range(repeat):
        for bus, ident, period_ms, sender, _ in MESSAGES:
            period_ns = period_ms * 1_000_000 * (1 + DRIFT_PPM.get(sender, 0.0) * 1e-6)
            n = int(duration_s * 1e9 // period_ns)
            t = ((np.arange(n) * period_ns).astype(np.int64) + 1_000_000 + copy * 37_000
                 + rng.integers(0, 200_000, n))
            if ident in SKIP and copy == 0:
                lo, hi = SKIP[ident]
                t = t[(t < lo * 1e9) | (t >= hi * 1e9)]
            parts.append(pl.DataFrame({"bus": bus, "t_ns": t,
                                       "id": np.full(len(t), ident + 0x400 * copy, np.uint32)}))
    frames = pl.concat(parts).sort("t_ns")
    n = len(frames)
    return frames.with_columns(
        run=pl.lit(RUN), start_ns=pl.col("t_ns") - FRAME_NS + 6_000,
        end_ns=pl.col("t_ns") + 6_000, ext=pl.lit(False), rtr=pl.lit(False),
        fd=pl.col("bus") == "chassis", brs=pl.col("bus") == "chassis", esi=pl.lit(False),
        dlc=pl.lit(8, pl.UInt8), data=pl.lit(b"\x11" * 8), bits=pl.lit(115, pl.UInt16),
        duration_ns=pl.lit(FRAME_NS, pl.Int64), file=pl.lit(f"{RUN}.frames"),
        line=pl.Series(np.arange(n, dtype=np.int64) + 10),
    ).pipe(schema.conform, "frames")


def record_tables(duration_s: float) -> dict[str, pl.DataFrame]:
    """Errors, status, marks, losses and rejects of the synthetic run."""
    err_t = np.linspace(40e9, 50e9, 60).astype(np.int64)
    types = np.array(["bit", "stuff", "crc", "ack", "form"])[np.arange(60) % 5]
    errors = pl.DataFrame({"run": RUN, "bus": "body", "t_ns": err_t, "type": types,
                           "field": "data", "id": np.full(60, 0x1A0, np.uint32), "ext": False,
                           "form": "s", "by": "bcm", "file": f"{RUN}.frames",
                           "line": np.arange(60, dtype=np.int64) + 5})
    marks = pl.DataFrame({"run": RUN, "bus": "*", "t_ns": [5_000_000_000, 25_000_000_000,
                                                           int(duration_s * 0.8e9)],
                          "text": ["step 1 engine on", SCRIPT_MARK, "step 3 & done"],
                          "file": f"{RUN}.frames", "line": [3, 4, 5]})
    losses = pl.DataFrame({"run": RUN, "bus": LOSS[0], "t_ns": [int(LOSS[1] * 1e9)],
                           "count": [12], "until_ns": [int(LOSS[2] * 1e9)],
                           "file": f"{RUN}.frames", "line": [7]})
    rejects = pl.DataFrame({"run": RUN, "file": f"{RUN}.frames", "line": [11, 12],
                            "raw": ["12\tbody\tframe\t1G0\ts\t8\t00", "<b>bad</b>"],
                            "reason": ["id '1G0' is not hex", "too few fields"]})
    return {"frames": pl.DataFrame(schema=schema.FRAMES), "errors": errors,
            "status": schema.empty("status"), "marks": marks, "losses": losses,
            "rejects": rejects}


def catalog() -> Catalog:
    buses = {a: BusSpec(a, n, d) for a, (n, d) in BUSES.items()}
    nodes = {}
    for bus, _, _, sender, _ in MESSAGES:
        nodes.setdefault(sender, NodeSpec(sender, (bus,)))
    messages = tuple(MessageSpec(bus, ident, False, False, bus == "chassis", bus == "chassis", 8,
                                 sender, period_ms * 1_000_000, name,
                                 "sfb" if bus == "chassis" else "s")
                     for bus, ident, period_ms, sender, name in MESSAGES)
    return Catalog(Path("synthetic.toml"), buses, nodes, messages)


def analyses(con: duckdb.DuckDBPyConnection, duration_s: float) -> dict[str, pl.DataFrame]:
    """The real timing and load analyses; stand-ins for the forensics outputs."""
    timed = timing(con, catalog())
    loaded = bus_load(con)
    out = {"load": loaded.windows, "load_summary": loaded.summary, "timing": timed.timing,
           "gaps": timed.gaps, "node_drift": timed.node_drift}
    t = np.arange(40_000, 60_001, 10, dtype=np.int64) * 1_000_000
    tec = np.minimum(np.arange(len(t)) * 2, 300) - np.maximum(np.arange(len(t)) - 1500, 0) * 3
    tec = np.clip(tec, 0, 300)
    counters = pl.DataFrame({"run": RUN, "bus": "body", "node": "bcm", "t_ns": t, "tec": tec,
                             "rec": np.zeros(len(t), np.int64), "state": "error-active"})
    states = pl.DataFrame({"run": RUN, "bus": "body", "node": ["bcm"] * 4 + ["vcu"],
                           "state": ["error-active", "warning", "error-passive", "bus-off",
                                     "error-active"],
                           "from_ns": [0, 40_480_000_000, 40_640_000_000, 41_280_000_000, 0],
                           "to_ns": [40_480_000_000, 40_640_000_000, 41_280_000_000,
                                     int(duration_s * 1e9), int(duration_s * 1e9)]})
    return {**out, "counters": counters, "node_states": states}


FAULTS = {"results": [{
    "run": RUN, "bus": "body",
    "first_degraded": {"node": "bcm", "state": "error-passive", "t_ns": 40_640_000_000,
                       "wall_time": "2026-03-01T08:00:40.640Z", "confidence": 0.86},
    "cause": {"kind": "transmit-fault", "node": "bcm"},
    "hypotheses": [{"name": "bcm transmit fault", "score": 0.86, "why": "TEC rose by 8 per error"},
                   {"name": "wiring fault near <b>vcu</b>", "score": 0.1, "why": "few REC"}],
    "nodes": [{"node": "bcm", "max_tec": 300, "max_rec": 0,
               "transitions": [{"t_ns": 40_480_000_000, "from": "error-active", "to": "warning"}],
               "bus_off": [{"from_ns": 41_280_000_000, "to_ns": None}]}],
    "verdict": "synthetic-run/body: bcm degraded first.",
    "evidence": {"errors": 60, "by_type": {"bit": 12, "stuff": 12}, "by_sender": {"bcm": 60},
                 "decisive": [{"t_ns": 40_000_000_000, "what": "first error frame",
                               "file": f"/logs/{RUN}.frames", "line": 5}]},
}, {"run": RUN, "bus": "chassis", "first_degraded": None, "cause": {"kind": "none", "node": None},
    "hypotheses": [], "nodes": [], "evidence": {"errors": 0, "decisive": []}}]}


def build_dataset(path: Path, duration_s: float = 60.0, repeat: int = 1,
                  with_analyses: bool = True) -> Path:
    """Write a one-file dataset for run RUN and (optionally) its analyses; returns path."""
    ds = create_or_open(path)
    frames = frames_table(duration_s, repeat)
    tables = record_tables(duration_s)
    tables["frames"] = frames
    sha = "5" * 64
    folder = ds.new_staging_dir()
    counts = {}
    for table, frame in tables.items():
        (folder / table).mkdir()
        frame.pipe(schema.conform, table).write_parquet(folder / table / "0.parquet")
        counts[table] = len(frame)
    buses = [{"alias": a, "nominal_bps": n, "data_bps": d, "stamp": "end", "name": None}
             for a, (n, d) in BUSES.items()]
    row = {name: None for name in schema.MANIFEST}
    row.update(file=f"/logs/{RUN}.frames", sha256=sha, bytes=1, lines=len(frames) + 20,
               header_lines=4, first_t_ns=0, last_t_ns=int(duration_s * 1e9), backward_steps=1,
               first_backward_line=99, origin="2026-03-01T08:00:00Z", buses=json.dumps(buses),
               meta=json.dumps({"run": RUN, "vehicle": "test-bench-3",
                                "driver": "<i>night shift</i>"}),
               run=RUN, vehicle="test-bench-3", tracelab_version="0.1.0",
               ingested_at="2026-03-02T00:00:00Z", **counts)
    ds.commit({sha: folder}, pl.DataFrame([row], schema=schema.MANIFEST))
    if with_analyses:
        for name, frame in analyses(ds.connect(), duration_s).items():
            ds.write_analysis(name, frame)
        ds.write_analysis_json("faults", FAULTS)
    return path
