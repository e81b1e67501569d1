"""Scale bench: a long two-bus run of N frames, and what timing, load, faults and report cost
on it, each as its own child process under the memory budget, against a 20 M-frame run
measured in the same invocation.

    .venv/bin/python bench/scale.py --frames 400000000            # 24 h of two busy buses
    .venv/bin/python bench/scale.py --frames 20000000 --baseline 0  # the baseline alone

The dataset is written directly as Parquet parts (vectorised numpy/pyarrow, in chunks of
``--chunk`` frames, the layout and column encodings ``tracelab ingest`` writes) with a
matching catalog: 60 periodic identifiers from 10 nodes on two 500 kbit/s buses, Gaussian
jitter, a sprinkling of dropped frames (gaps), logger losses and error records (mostly on one
node's frames). Prints, per command, wall time, CPU time (the child's user + system) and peak
RSS (the child's ru_maxrss), whether it stayed within ``--memory``, and the per-frame cost
against the baseline run.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from tracelab.store import schema  # noqa: E402
from tracelab.store.dataset import sha16  # noqa: E402
from tracelab.store.ingest import DELTA_COLUMNS, PARQUET_ZSTD_LEVEL  # noqa: E402
from tracelab.store.limits import format_size, parse_size  # noqa: E402

BASELINE_FRAMES = 20_000_000
BIT_NS = 2_000  # 500 kbit/s on both buses
BUSES = ("A", "B")
NODES_PER_BUS = 5
IDS_PER_NODE = 6
#: Period of each of a node's six identifiers: 2 x 5 ms, 10 ms, 20 ms, 50 ms and 100 ms (or
#: 1 s for every second node): about 4,500 frames/s over both buses, 400 M frames in 24.6 h.
NODE_PERIODS_MS = ((5, 5, 10, 20, 50, 100), (5, 5, 10, 20, 50, 1000))
JITTER_NS = 30_000          # sigma of the release jitter
DROP_RATIO = 2e-6           # frames lost on the bus (gaps the timing analysis reports)
ERROR_RATIO = 2e-5          # error records per frame, 70 % of them on the hot node's frames
LOSS_EVERY_S = 600          # one logger loss (20 ms of one bus) every 10 minutes
LOSS_NS = 20_000_000
HOT_NODE = "n03"
RUN, VEHICLE, ORIGIN = "endurance-24h", "rig-07", "2026-11-30T18:00:00Z"
COMMANDS = ("timing", "load", "faults", "report")


@dataclass(frozen=True)
class Net:
    bus: np.ndarray       # bus index per identifier
    ids: np.ndarray       # uint32
    sender: list[str]
    period_ns: np.ndarray
    bits: np.ndarray      # exact-length stand-in: constant per identifier (118..135 bits)
    phase_ns: np.ndarray

    @property
    def rate_per_s(self) -> float:
        return float(np.sum(1e9 / self.period_ns))


def make_net(seed: int) -> Net:
    rng = np.random.default_rng(seed)
    bus, ids, sender, period = [], [], [], []
    for b in range(len(BUSES)):
        for n in range(NODES_PER_BUS):
            node = b * NODES_PER_BUS + n
            for k, ms in enumerate(NODE_PERIODS_MS[node % 2]):
                bus.append(b)
                ids.append(0x100 + 0x20 * node + k)
                sender.append(f"n{node:02d}")
                period.append(ms * 1_000_000)
    period_ns = np.array(period, dtype=np.int64)
    return Net(np.array(bus), np.array(ids, dtype=np.uint32), sender, period_ns,
               rng.integers(118, 136, len(ids)).astype(np.uint16),
               rng.integers(0, period_ns))


def write_catalog(path: Path, net: Net) -> Path:
    lines = []
    for alias in BUSES:
        lines += [f"[bus.{alias}]", "nominal = 500000", 'stamp = "end"', ""]
    for node in sorted(set(net.sender)):
        alias = BUSES[net.bus[net.sender.index(node)]]
        lines += [f"[node.{node}]", f'buses = ["{alias}"]', ""]
    for i in range(net.ids.size):
        lines += ["[[message]]", f'bus = "{BUSES[net.bus[i]]}"', f'id = "{int(net.ids[i]):03X}"',
                  'form = "s"', "dlc = 8", f'sender = "{net.sender[i]}"',
                  f'period = "{int(net.period_ns[i]) // 1_000_000}ms"', ""]
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def _dictionary(value: str, n: int) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(pa.array(np.zeros(n, np.int32)), pa.array([value]))


def _write(table: pa.Table, path: Path) -> None:
    """As store/ingest.py writes frames: dictionaries for the strings, delta-encoded rising
    columns, no payload statistics, no stored Arrow schema."""
    names = table.column_names
    pq.write_table(table, path, compression="zstd", compression_level=PARQUET_ZSTD_LEVEL,
                   use_dictionary=[c for c in names if c not in DELTA_COLUMNS and c != "data"],
                   column_encoding={c: "DELTA_BINARY_PACKED" for c in DELTA_COLUMNS
                                    if c in names},
                   write_statistics=[c for c in names if c != "data"], store_schema=False)


def _frames_chunk(net: Net, t_from: int, t_to: int, loss: tuple[int, int] | None,
                  rng: np.random.Generator,
                  line0: int) -> tuple[pa.Table, np.ndarray, np.ndarray, np.ndarray]:
    """Frames released in [t_from, t_to), time-sorted, without those a logger loss
    ``(t_ns, bus index)`` swallowed; also their (t_ns, id, bus) arrays."""
    k0 = -((net.phase_ns - t_from) // net.period_ns)           # ceil((t_from - phase) / p)
    k1 = -((net.phase_ns - t_to) // net.period_ns)
    counts = np.maximum(k1 - k0, 0)
    total = int(counts.sum())
    which = np.repeat(np.arange(net.ids.size), counts)
    k = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts) + k0[which]
    t = (net.phase_ns[which] + k * net.period_ns[which]
         + rng.normal(0, JITTER_NS, total).astype(np.int64))
    keep = rng.random(total) >= DROP_RATIO
    if loss is not None:
        keep &= ~((net.bus[which] == loss[1]) & (t >= loss[0]) & (t < loss[0] + LOSS_NS))
    which, t, k = which[keep], t[keep], k[keep]
    order = np.argsort(t, kind="stable")
    which, t, k = which[order], t[order], k[order]
    n = t.size
    bits = net.bits[which]
    dur = bits.astype(np.int64) * BIT_NS
    payload = np.zeros((n, 8), dtype=np.uint8)             # a rolling counter, then the id
    payload[:, 0] = k & 0xFF
    payload[:, 1] = (k >> 8) & 0xFF
    payload[:, 7] = net.ids[which] & 0xFF
    data = pa.FixedSizeBinaryArray.from_buffers(
        pa.binary(8), n, [None, pa.py_buffer(payload.tobytes())]).cast(pa.binary())
    false = pa.array(np.zeros(n, bool))
    columns = {
        "run": _dictionary(RUN, n),
        "bus": pa.DictionaryArray.from_arrays(pa.array(net.bus[which].astype(np.int32)),
                                              pa.array(list(BUSES))),
        "t_ns": pa.array(t), "start_ns": pa.array(t - (dur - 3 * BIT_NS)),
        "end_ns": pa.array(t + 3 * BIT_NS), "id": pa.array(net.ids[which]),
        "ext": false, "rtr": false, "fd": false, "brs": false, "esi": false,
        "dlc": pa.array(np.full(n, 8, np.uint8)), "data": data, "bits": pa.array(bits),
        "duration_ns": pa.array(dur), "file": _dictionary(f"{RUN}.frames", n),
        "line": pa.array(np.arange(line0, line0 + n, dtype=np.int64)),
    }
    assert list(columns) == list(schema.FRAMES)
    return pa.table(columns), t, net.ids[which], net.bus[which]


def _errors_chunk(net: Net, t: np.ndarray, ids: np.ndarray, bus: np.ndarray,
                  rng: np.random.Generator, line0: int) -> pa.Table:
    """Error records just before some frames: 70 % on the hot node's identifiers."""
    n = int(rng.binomial(t.size, ERROR_RATIO))
    at = np.sort(rng.choice(t.size, n, replace=False)) if n else np.zeros(0, np.int64)
    hot = net.ids[[s == HOT_NODE for s in net.sender]]
    hot_bus = int(net.bus[net.sender.index(HOT_NODE)])
    on_hot = rng.random(n) < 0.7
    err_id = np.where(on_hot, rng.choice(hot, n), ids[at]).astype(np.uint32)
    err_bus = np.where(on_hot, hot_bus, bus[at])
    return pa.table({
        "run": pa.array([RUN] * n, pa.string()),
        "bus": pa.array([BUSES[b] for b in err_bus], pa.string()),
        "t_ns": pa.array(t[at] - 140 * BIT_NS, pa.int64()),
        "type": pa.array(rng.choice(["bit", "stuff", "crc"], n).tolist(), pa.string()),
        "field": pa.array(["data"] * n, pa.string()), "id": pa.array(err_id),
        "ext": pa.array(np.zeros(n, bool)), "form": pa.array(["s"] * n, pa.string()),
        "by": pa.nulls(n, pa.string()), "file": pa.array([f"{RUN}.frames"] * n, pa.string()),
        "line": pa.array(np.arange(line0, line0 + n, dtype=np.int64)),
    }).cast(schema.empty("errors").to_arrow().schema)


def write_dataset(path: Path, frames: int, chunk: int, seed: int = 1) -> tuple[Path, Net]:
    """About ``frames`` frames (drops and losses take a few) of one run, as Parquet parts."""
    t_start = time.perf_counter()
    net = make_net(seed)
    rng = np.random.default_rng(seed + 1)
    duration_ns = int(frames / net.rate_per_s * 1e9)
    step_ns = max(1, int(chunk / net.rate_per_s * 1e9))
    sha = hashlib.sha256(f"scale-{frames}-{seed}".encode()).hexdigest()
    part = path / "parts" / sha16(sha)
    for table in schema.TABLES:
        (part / table).mkdir(parents=True, exist_ok=True)
    n_frames = n_errors = line = 0
    losses: list[tuple[int, int, str]] = []
    errors: list[pa.Table] = []
    first_t = last_t = None
    for index, t_from in enumerate(range(0, duration_ns, step_ns)):
        t_to = min(duration_ns, t_from + step_ns)
        every_ns = LOSS_EVERY_S * 10**9
        loss = None
        if t_from // every_ns != (t_to - 1) // every_ns:  # a loss falls in this chunk
            at = min((t_to - 1) // every_ns * every_ns, t_to - LOSS_NS)
            loss = (at, len(losses) % len(BUSES))
            losses.append((at, at + LOSS_NS, BUSES[loss[1]]))
        table, t, ids, bus = _frames_chunk(net, t_from, t_to, loss, rng, line + 6)
        _write(table, part / "frames" / f"{index}.parquet")
        errors.append(_errors_chunk(net, t, ids, bus, rng, 0))
        n_frames += t.size
        line += t.size
        first_t = int(t[0]) if first_t is None and t.size else first_t
        last_t = int(t[-1]) if t.size else last_t
    error_table = pa.concat_tables(errors).sort_by("t_ns")
    n_errors = error_table.num_rows
    error_table = error_table.set_column(
        error_table.column_names.index("line"), "line",
        pa.array(np.arange(n_errors, dtype=np.int64) + line + 6))
    loss_table = pa.table({
        "run": pa.array([RUN] * len(losses), pa.string()),
        "bus": pa.array([b for _, _, b in losses], pa.string()),
        "t_ns": pa.array([a for a, _, _ in losses], pa.int64()),
        "count": pa.nulls(len(losses), pa.int64()),
        "until_ns": pa.array([u for _, u, _ in losses], pa.int64()),
        "file": pa.array([f"{RUN}.frames"] * len(losses), pa.string()),
        "line": pa.array(np.arange(len(losses), dtype=np.int64) + line + n_errors + 6)})
    for name, table in (("errors", error_table), ("losses", loss_table)):
        pq.write_table(table.cast(schema.empty(name).to_arrow().schema),
                       part / name / "0.parquet", compression="zstd")
    for name in ("status", "marks", "rejects"):
        schema.empty(name).write_parquet(part / name / "0.parquet", compression="zstd")
    buses = [{"alias": b, "nominal_bps": 500_000, "data_bps": None, "stamp": "end", "name": None}
             for b in BUSES]
    row = {name: None for name in schema.MANIFEST}
    row.update(file=f"{RUN}.frames", sha256=sha, lines=n_frames + n_errors + len(losses) + 6,
               header_lines=6, frames=n_frames, errors=n_errors, status=0, marks=0,
               losses=len(losses), rejects=0, first_t_ns=first_t, last_t_ns=last_t,
               backward_steps=0, origin=ORIGIN, buses=json.dumps(buses),
               meta=json.dumps({"run": RUN, "vehicle": VEHICLE}), run=RUN, vehicle=VEHICLE,
               tracelab_version="bench", ingested_at="2026-12-01T00:00:00Z")
    manifest = pa.Table.from_pylist([row], schema=schema.empty("manifest").to_arrow().schema)
    pq.write_table(manifest, path / "manifest.parquet", compression="zstd")
    write_catalog(path.parent / "catalog.toml", net)
    size = sum(f.stat().st_size for f in path.rglob("*.parquet"))
    print(f"dataset: {n_frames:,} frames, {n_errors:,} error records, {len(losses)} losses, "
          f"{duration_ns / 3.6e12:.1f} h of bus time, {size / 1e9:.1f} GB, "
          f"written in {time.perf_counter() - t_start:.0f} s", flush=True)
    return path, net


@dataclass
class Cost:
    command: str
    wall_s: float
    cpu_s: float
    rss_bytes: int
    code: int


#: Runs a command and reports its rusage. Linux keeps the pre-exec RSS of a forked child in
#: its ru_maxrss, so the bench (hundreds of MB after writing the data) does not fork the
#: commands itself; this small interpreter does.
LAUNCHER = """
import json, os, sys
pid = os.posix_spawn(sys.argv[2], sys.argv[2:], os.environ)
_, status, usage = os.wait4(pid, 0)
with open(sys.argv[1], "w") as out:
    json.dump({"code": os.waitstatus_to_exitcode(status), "maxrss_kib": usage.ru_maxrss,
               "cpu_s": usage.ru_utime + usage.ru_stime}, out)
"""


def run_command(command: str, dataset: Path, memory: str) -> Cost:
    """One tracelab command in a child process: wall, CPU (user + system), peak RSS."""
    catalog = dataset.parent / "catalog.toml"
    args = {"timing": ["--catalog", str(catalog)], "load": [],
            "faults": ["--catalog", str(catalog)],
            "report": ["-o", str(dataset.parent / "report.html"), "--catalog", str(catalog),
                       "--shared-plotly"]}[command]
    cmd = [sys.executable, "-m", "tracelab.cli", command, str(dataset), *args, "--memory", memory]
    report = dataset.parent / f".{command}.rusage.json"
    start = time.perf_counter()
    subprocess.run([sys.executable, "-S", "-c", LAUNCHER, str(report), *cmd],
                   stdout=subprocess.DEVNULL, check=True)
    wall = time.perf_counter() - start
    usage = json.loads(report.read_text(encoding="utf-8"))
    return Cost(command, wall, usage["cpu_s"], usage["maxrss_kib"] * 1024, usage["code"])


def measure(frames: int, folder: Path, memory: str, chunk: int, keep: bool,
            commands: tuple[str, ...] = COMMANDS) -> tuple[int, list[Cost]]:
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    dataset, _ = write_dataset(folder / "dataset", frames, chunk)
    written = int(pq.read_table(dataset / "manifest.parquet").column("frames")[0].as_py())
    costs = []
    budget = parse_size(memory)
    for command in commands:
        cost = run_command(command, dataset, memory)
        costs.append(cost)
        state = "ok" if cost.code == 0 else f"FAILED (exit {cost.code})"
        bound = "within" if cost.rss_bytes <= budget else "OVER"
        print(f"  {command:7s} {written / 1e6:7.1f} M frames: wall {cost.wall_s:7.1f} s, "
              f"CPU {cost.cpu_s:7.1f} s, peak RSS {format_size(cost.rss_bytes):>9s} "
              f"({bound} {memory}), {state}", flush=True)
    if not keep:
        shutil.rmtree(folder, ignore_errors=True)
    return written, costs


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--frames", type=int, default=BASELINE_FRAMES)
    parser.add_argument("--baseline", type=int, default=BASELINE_FRAMES,
                        help="frames of the baseline run (0: none)")
    parser.add_argument("--memory", default="2GiB", help="budget of every command")
    parser.add_argument("--chunk", type=int, default=5_000_000, help="frames per Parquet part")
    parser.add_argument("--dir", type=Path, default=Path(__file__).resolve().parent / "out" / "scale")
    parser.add_argument("--keep", action="store_true", help="keep the datasets")
    parser.add_argument("--commands", default=",".join(COMMANDS),
                        help="comma-separated subset of " + ",".join(COMMANDS))
    args = parser.parse_args()
    commands = tuple(c for c in args.commands.split(",") if c)
    if not commands or set(commands) - set(COMMANDS):
        parser.error(f"--commands: choose from {','.join(COMMANDS)}")
    runs = []
    if args.baseline and args.baseline != args.frames:
        print(f"baseline: {args.baseline:,} frames", flush=True)
        runs.append(measure(args.baseline, args.dir / "baseline", args.memory, args.chunk,
                            args.keep, commands))
    print(f"run: {args.frames:,} frames", flush=True)
    runs.append(measure(args.frames, args.dir / "run", args.memory, args.chunk, args.keep,
                        commands))
    print("\n| frames | command | wall s | CPU s | peak RSS | CPU ns/frame | vs baseline |")
    print("|---|---|---|---|---|---|---|")
    base_n, base = runs[0]
    for n, costs in runs:
        for cost, ref in zip(costs, base, strict=True):
            ratio = (cost.cpu_s / n) / (ref.cpu_s / base_n)
            print(f"| {n / 1e6:.0f} M | {cost.command} | {cost.wall_s:.1f} | {cost.cpu_s:.1f} | "
                  f"{format_size(cost.rss_bytes)} | {cost.cpu_s / n * 1e9:.0f} | {ratio:.2f}x |")
    failed = [c for _, costs in runs for c in costs
              if c.code != 0 or c.rss_bytes > parse_size(args.memory)]
    sys.exit(1 if failed else 0)


if __name__ == "__main__":
    main()
