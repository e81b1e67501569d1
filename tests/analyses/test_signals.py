"""`tracelab signals` end to end on a hand-built log whose payloads are written with Python
integers and crccheck (not with tracelab's encoder), so every finding has a known cause."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest
from crccheck.crc import Crc8SaeJ1850

from tracelab import workflow
from tracelab.analyses.signals import CHECK_COLUMNS, SIGNAL_COLUMNS, STATS_COLUMNS
from tracelab.cli import main
from tracelab.errors import UsageError
from tracelab.format.writer import BusDecl, LogHeader, LogWriter, frame_line, loss_line
from tracelab.query import open_session, run_query
from tracelab.store.ingest import ingest_logs

CATALOG = """
[bus.P]
nominal = 500000
[node.tms]
buses = ["P"]

[[message]]
bus = "P"
id = "310"
dlc = 8
sender = "tms"
period = "10ms"
name = "coolant_loop"

[[message.signal]]
name = "coolant_temp"
lsb = 12
length = 10
scale = 0.1
offset = -40.0
unit = "degC"
min = -40.0
max = 50.0
plot = true

[[message.signal]]
name = "pressure"
lsb = 47
length = 16
order = "big"
signed = true
scale = 0.5

[[message.signal]]
name = "mode"
lsb = 48
length = 4

[[message.signal]]
name = "alive"
lsb = 52
length = 4
role = "counter"

[[message.signal]]
name = "crc"
lsb = 56
length = 8
role = "checksum"
crc = { width = 8, poly = 0x1D, init = 0xFF, xorout = 0xFF }

[[message]]
bus = "P"
id = "311"
dlc = 3
sender = "tms"
name = "pump_fan_command"

[[message.signal]]
name = "page"
lsb = 0
length = 1

[[message.signal]]
name = "pump_cmd"
lsb = 8
length = 8
mux = "page"
mux_value = 0
unit = "%"

[[message.signal]]
name = "fan_cmd"
lsb = 8
length = 16
mux = "page"
mux_value = 1
"""
FRAMES = 1000
PERIOD_NS = 10_000_000
LOST_ON_BUS = 100        # frame k=100 absent, counter jumps by 2 after it
SENDER_SKIP = 200        # counter advances by 2 at k=200, frame timing regular
REPEAT = 300             # counter of k=300 equals that of k=299
LOGGER_LOST = (400, 401)  # frames absent inside a logger-loss record
CORRUPT = 500            # one payload bit flipped after the checksum was computed
SHORT = 600              # k=600 sent with 4 bytes


def payload(k: int, counter: int) -> bytes:
    """coolant_temp raw = k (bits 12..21, little), pressure = -k (16 bits big from byte 5
    bit 7), mode 3, alive counter, CRC-8/SAE-J1850 over bytes 0..6 (crccheck)."""
    little = (k & 0x3FF) << 12 | 3 << 48 | (counter & 0xF) << 52
    data = bytearray(little.to_bytes(8, "little"))
    # big order: shift 8*(8-1-5) + 7 = 23 in the big-endian integer
    big = int.from_bytes(data, "big") | ((-k) & 0xFFFF) << 23
    data = bytearray(big.to_bytes(8, "big"))
    data[7] = Crc8SaeJ1850.calc(bytes(data[:7]))
    return bytes(data)


def build_log(path: Path) -> dict[int, int]:
    """The log; returns the counter value of each sent k."""
    lines, counters = [], {}
    counter = 0
    for k in range(FRAMES):
        if k == SENDER_SKIP:
            counter += 1  # the sender skipped one value
        if k != REPEAT:
            counter = counter + 1 if k else 0
        t = 1_000_000 + k * PERIOD_NS
        if k == LOST_ON_BUS or k in LOGGER_LOST:
            continue
        data = payload(k, counter)
        if k == CORRUPT:
            data = bytes([data[0] ^ 0x01]) + data[1:]
        if k == SHORT:
            data = data[:4]
        counters[k] = counter
        lines.append((t, frame_line(t, "P", 0x310, False, False, False, False, False, len(data),
                                    data)))
    loss_from = 1_000_000 + LOGGER_LOST[0] * PERIOD_NS - 2_000_000
    lines.append((loss_from, loss_line(loss_from, "P", 2, loss_from + 25_000_000)))
    for j in range(40):  # multiplexed: even j page 0 (pump %), odd j page 1 (fan rpm)
        t = 5_000_000 + j * 250_000_000
        data = bytes([0, j, 0]) if j % 2 == 0 else bytes([1]) + (1000 + j).to_bytes(2, "little")
        lines.append((t, frame_line(t, "P", 0x311, False, False, False, False, False, 3, data)))
    lines.sort(key=lambda r: r[0])
    header = LogHeader(buses=[BusDecl("P", 500_000)], meta={"run": "sig-01"})
    with LogWriter(path, header) as writer:
        writer.lines([line for _, line in lines])
    return counters


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("signals")
    build_log(root / "sig-01.frames")
    ingest_logs([root / "sig-01.frames"], root / "ds", quiet=True)
    (root / "net.toml").write_text(CATALOG, encoding="utf-8")
    workflow.timing(root / "ds", catalog=root / "net.toml")
    return root / "ds", root / "net.toml"


def test_outputs_and_values(dataset: tuple[Path, Path]) -> None:
    ds, cat = dataset
    result = workflow.signals(ds, cat, stuck="3s")
    values = pl.read_parquet(ds / "analyses" / "signals.parquet")
    assert tuple(values.columns) == SIGNAL_COLUMNS
    assert tuple(pl.read_parquet(ds / "analyses" / "signal_stats.parquet").columns) == \
        STATS_COLUMNS
    assert tuple(pl.read_parquet(ds / "analyses" / "signal_checks.parquet").columns) == \
        CHECK_COLUMNS
    temp = values.filter(pl.col("signal") == "coolant_temp").sort("t_ns")
    # ground truth: raw = k for every decoded frame (sent, 8 bytes)
    sent = [k for k in range(FRAMES) if k not in (LOST_ON_BUS, *LOGGER_LOST, SHORT)]
    assert temp["raw"].to_list() == sent
    # source: exact decimal arithmetic: raw * 0.1 - 40 for raw = 123 is 12.3 - 40 = -27.7
    assert temp.filter(pl.col("raw") == 123)["value"].item() == -27.7
    pressure = values.filter(pl.col("signal") == "pressure").sort("t_ns")
    assert pressure["raw"].to_list() == [-k for k in sent]  # signed, big order
    assert pressure.filter(pl.col("raw") == -3)["value"].item() == -1.5
    assert set(temp["file"].str.split("/").list.last()) == {"sig-01.frames"}
    pump = values.filter(pl.col("signal") == "pump_cmd")
    fan = values.filter(pl.col("signal") == "fan_cmd")
    assert pump["raw"].to_list() == list(range(0, 40, 2))
    assert fan["raw"].to_list() == [1000 + j for j in range(1, 40, 2)]
    assert values.filter(pl.col("signal") == "page").height == 40
    stats = result.stats.filter(pl.col("signal") == "coolant_temp").row(0, named=True)
    assert stats["count"] == len(sent) and stats["min"] == -40.0
    # derived: 50 degC is raw 900; raw 901..999 are above max, minus the absent k
    assert stats["out_of_range"] == 99
    assert stats["first_out_of_range_ns"] == 1_000_000 + 901 * PERIOD_NS
    assert stats["plot"] is True


def test_findings_have_known_causes(dataset: tuple[Path, Path]) -> None:
    ds, cat = dataset
    checks = workflow.signals(ds, cat, stuck="3s").checks
    alive = checks.filter(pl.col("signal") == "alive").sort("t_ns")
    at = {(r["kind"], (r["t_ns"] - 1_000_000) // PERIOD_NS): r
          for r in alive.iter_rows(named=True)}
    assert ("counter-lost", LOST_ON_BUS + 1) in at
    assert at[("counter-lost", LOST_ON_BUS + 1)]["count"] == 1
    assert at[("counter-lost", LOST_ON_BUS + 1)]["missing"] == 1
    assert at[("counter-skip", SENDER_SKIP)]["count"] == 1
    assert at[("counter-skip", SENDER_SKIP)]["missing"] is None
    assert ("counter-repeat", REPEAT) in at
    assert at[("counter-in-loss", LOGGER_LOST[1] + 1)]["count"] == 2
    # the 4-byte frame k=600 is on the bus (no timing gap) but not decoded: the counter
    # jump across it reads as a skip, and the length finding below names the frame
    assert ("counter-skip", SHORT + 1) in at
    assert len(at) == 5
    crc = checks.filter(pl.col("kind") == "checksum")
    assert crc.height == 1 and (crc["t_ns"].item() - 1_000_000) // PERIOD_NS == CORRUPT
    assert crc["expected"].item() != crc["raw"].item()
    assert crc["line"].item() > 0 and crc["file"].item().endswith("sig-01.frames")
    stuck = checks.filter(pl.col("kind") == "stuck")
    assert set(stuck["signal"]) == {"mode"}  # constant 3 all run; others change
    length = checks.filter(pl.col("kind") == "length")
    assert length["count"].to_list() == [1]
    ranged = checks.filter(pl.col("kind") == "range")
    assert ranged.height == 1 and ranged["count"].item() == 99
    assert workflow.signals(ds, cat).checks.filter(pl.col("kind") == "stuck").is_empty()


def test_cli_json_sql_view_and_macro(dataset: tuple[Path, Path],
                                     capsys: pytest.CaptureFixture[str]) -> None:
    ds, cat = dataset
    assert main(["signals", str(ds), "--catalog", str(cat), "--signal", "coolant_temp",
                 "--from", "1s", "--to", "2s", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [s["signal"] for s in out["stats"]] == ["coolant_temp"]
    assert out["stats"][0]["count"] == 99  # k = 100 .. 199 without the lost k = 100
    con = open_session(ds)
    frame = run_query(con, "SELECT count(*) AS n, min(t_s) AS t FROM sig('coolant_temp')")
    assert frame["n"].item() == 99 and frame["t"].item() >= 1.0
    frame = run_query(con, "SELECT count(*) AS n FROM signals")
    assert frame["n"].item() == 99
    assert run_query(con, "SELECT count(*) AS n FROM sig('coolant_loop.coolant_temp')")[
        "n"].item() == 99
    con.close()


def test_bad_options(dataset: tuple[Path, Path]) -> None:
    ds, cat = dataset
    with pytest.raises(UsageError, match="did you mean 'coolant_temp'"):
        workflow.signals(ds, cat, names=["coolant_tmp"])
    with pytest.raises(UsageError, match="--stuck"):
        workflow.signals(ds, cat, stuck="ten")
    with pytest.raises(UsageError, match="later than"):
        workflow.signals(ds, cat, from_="2s", to="1s")
    assert main(["signals", str(ds), "--catalog", str(cat), "--run", "nope"]) == 2


def test_counter_wrap_is_explained_by_the_gap() -> None:
    from tracelab.analyses.signals import SIGNAL_SCHEMA, counter_checks
    from tracelab.network.catalog import SignalSpec

    spec = SignalSpec("alive", 0, 4, 8, role="counter")
    # counters 0 1 2, then 15 frames missing (counter back at 2 + 16 = 2: delta 0), then
    # 16 frames missing (delta 1 = step), then a plain repeat with no gap
    t = [0, 10, 20, 180, 350, 360]
    raw = [0, 1, 2, 2, 3, 3]
    decoded = pl.DataFrame({
        "run": ["r"] * 6, "bus": ["P"] * 6, "t_ns": t, "id": [0x310] * 6, "ext": [False] * 6,
        "message": ["m"] * 6, "signal": ["alive"] * 6, "raw": raw, "value": [float(r) for r in raw],
        "unit": [""] * 6, "file": ["f"] * 6, "line": list(range(1, 7))}, schema=SIGNAL_SCHEMA)
    gaps = pl.DataFrame({"run": ["r", "r"], "bus": ["P", "P"], "id": [0x310, 0x310],
                         "ext": [False, False], "from_ns": [20, 180], "to_ns": [180, 350],
                         "missing": [15, 16], "in_loss": [False, False]},
                        schema_overrides={"id": pl.UInt32})
    losses = pl.DataFrame(schema={"run": pl.String, "bus": pl.String, "t_ns": pl.Int64,
                                  "until_ns": pl.Int64})
    found = counter_checks(decoded, {("m", "alive"): spec}, gaps, losses)
    # derived: a 4-bit counter wraps every 16 releases; 15 + 1 = 16 = 0 and 16 + 1 = 1 mod 16
    assert found.select("t_ns", "kind", "count").rows() == [
        (180, "counter-lost", 15), (350, "counter-lost", 16), (360, "counter-repeat", None)]


def test_plain_signal_names_of_a_message_whose_name_has_a_dot(tmp_path: Path) -> None:
    """A message name may hold dots (the catalog takes any name without blanks); the plain
    signal name is the signal's own name, not what follows the first dot of message.signal."""
    from tracelab.analyses.signals import select_signals
    from tracelab.network.catalog import load_catalog

    text = CATALOG.replace('name = "coolant_loop"', 'name = "coolant.loop"')
    (tmp_path / "net.toml").write_text(text, encoding="utf-8")
    catalog = load_catalog(tmp_path / "net.toml")
    (msg, chosen), = select_signals(catalog, ["coolant_temp"])
    assert (msg.label, [s.name for s in chosen]) == ("coolant.loop", ["coolant_temp"])
    (msg, chosen), = select_signals(catalog, ["coolant.loop.alive"])
    assert [s.name for s in chosen] == ["alive"]
    with pytest.raises(UsageError, match="did you mean 'coolant_temp'"):
        select_signals(catalog, ["coolant_tmp"])


def test_decode_signals_decodes_only_the_named_ones(dataset: tuple[Path, Path]) -> None:
    from tracelab.analyses.signals import decode_signals
    from tracelab.network.catalog import load_catalog

    ds, cat = dataset
    con = open_session(ds)
    try:
        got = decode_signals(con, load_catalog(cat), names=["coolant_temp"])
        # one value per 8-byte frame of 0x310 (the catalog's length), counted in SQL here
        (frames,) = con.sql("SELECT count(*) FROM frames WHERE id = 784 AND NOT ext "
                            "AND octet_length(data) = 8").fetchall()[0]
    finally:
        con.close()
    assert got["signal"].unique().to_list() == ["coolant_temp"]
    assert got.height == frames > 0
