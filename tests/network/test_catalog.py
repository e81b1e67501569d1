"""Catalog loading: durations, dataclasses, lookups and one-line validation errors."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from tracelab.errors import CatalogError
from tracelab.network.catalog import load_catalog, parse_duration_ns

GOOD = """
[bus.P]
nominal = 500000
[bus.C]
nominal = 500000
data = 2000000
stamp = "start"

[node.vcu]
buses = ["P", "C"]
[node.inv]
buses = ["P"]

[[message]]
bus = "P"
id = "0C0"
form = "s"
dlc = 8
sender = "vcu"
period = "10ms"
name = "drive_command"

[[message]]
bus = "P"
id = "18FF0010"
form = "x"
dlc = 8
sender = "inv"
period = "100ms"

[[message]]
bus = "C"
id = "0C0"
form = "sfb"
dlc = 15
sender = "vcu"
name = "chassis_state"

[[message]]
bus = "P"
id = "0C0"
form = "x"
dlc = 2
sender = "inv"
period = "1s"
"""


def write(tmp_path: Path, text: str, name: str = "net.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize(("text", "ns"), [
    ("10ms", 10_000_000), ("150us", 150_000), ("1.5s", 1_500_000_000), ("10m", 600_000_000_000),
    ("1h", 3_600_000_000_000), ("7ns", 7), (" 2 ms ", 2_000_000), (".5s", 500_000_000),
    (42, 42), ("0s", 0), ("6m40s", 400_000_000_000), ("1h 30m", 5_400_000_000_000),
    ("1s500ms", 1_500_000_000),
])
def test_parse_duration(text: str | int, ns: int) -> None:
    # source: SI prefixes (BIPM SI Brochure, 9th ed.): 1 ms = 1e6 ns, 1 us = 1e3 ns
    assert parse_duration_ns(text) == ns


@pytest.mark.parametrize("text", ["10", "ten ms", "10 parsecs", "-1s", "1.5ns", "", -3, 1.5, "5m10"])
def test_parse_duration_rejects(text: object) -> None:
    with pytest.raises(ValueError, match="duration"):
        parse_duration_ns(text)  # type: ignore[arg-type]


def test_parse_duration_unit_typo_suggests() -> None:
    with pytest.raises(ValueError, match="did you mean 'ms'"):
        parse_duration_ns("10mss")


def test_load_good_catalog(tmp_path: Path) -> None:
    cat = load_catalog(write(tmp_path, GOOD))
    assert set(cat.buses) == {"P", "C"}
    assert cat.buses["C"].data_bps == 2_000_000 and cat.buses["C"].stamp == "start"
    assert cat.buses["P"].stamp == "end" and cat.buses["P"].data_bps is None
    assert cat.nodes["vcu"].buses == ("P", "C")
    first = cat.messages[0]
    assert (first.bus, first.id, first.ext, first.dlc, first.period_ns, first.name) == (
        "P", 0xC0, False, 8, 10_000_000, "drive_command")
    fd = cat.messages[2]
    assert fd.fd and fd.brs and not fd.ext and fd.period_ns is None
    assert cat.sender_of("P", 0x18FF0010, True) == "inv"
    # Same identifier in base and extended form are different messages.
    assert cat.sender_of("P", 0xC0, False) == "vcu"
    assert cat.sender_of("P", 0xC0, True) == "inv"
    assert cat.sender_of("P", 0x123, False) is None
    assert cat.nodes_on("P") == ["vcu", "inv"]
    assert cat.nodes_on("C") == ["vcu"]


def test_messages_frame_schema(tmp_path: Path) -> None:
    frame = load_catalog(write(tmp_path, GOOD)).messages_frame()
    assert frame.schema == pl.Schema({
        "bus": pl.Utf8, "id": pl.UInt32, "ext": pl.Boolean, "name": pl.Utf8,
        "sender": pl.Utf8, "period_ns": pl.Int64, "dlc": pl.UInt8, "fd": pl.Boolean,
        "brs": pl.Boolean})
    assert frame.height == 4
    assert frame["name"].to_list()[1] == "18FF0010"  # no name: the hex identifier
    assert frame["period_ns"].null_count() == 1


def broken(good: str, old: str, new: str) -> str:
    assert old in good
    return good.replace(old, new, 1)


@pytest.mark.parametrize(("old", "new", "expected"), [
    ('sender = "vcu"\nperiod = "10ms"', 'sender = "vcx"\nperiod = "10ms"',
     "[message 1] sender 'vcx' is not a declared node; did you mean 'vcu'?"),
    ('buses = ["P"]', 'buses = ["Q"]', "[node.inv] bus 'Q' is not declared"),
    ('id = "18FF0010"', 'id = "0C0"\nxx = 1', "[message 2] unknown key 'xx'"),
    ('period = "10ms"', 'perod = "10ms"', "unknown key 'perod'; did you mean 'period'?"),
    ('period = "10ms"', 'period = "10"', "[message 1] period: duration '10' is not a number"),
    ('period = "1s"', 'period = "0s"', "[message 4] period must be longer than 0"),
    ('form = "x"\ndlc = 2', 'form = "s"\ndlc = 2',
     "[message 4] id 0C0 is already used on bus 'P' by message 1 (drive_command)"),
    ('id = "18FF0010"\nform = "x"', 'id = "18FF0010"\nform = "s"',
     "[message 2] id 18FF0010 does not fit a 11-bit identifier"),
    ('form = "x"\ndlc = 8', 'form = "xfb"\ndlc = 8', "bus 'P' declares no data rate"),
    ('form = "x"\ndlc = 8', 'form = "xq"\ndlc = 8', "[message 2] form 'xq' is not a frame form"),
    ("dlc = 15", "dlc = 16", "[message 3] dlc = 16 is outside 0..15"),
    ('id = "0C0"\nform = "sfb"', 'id = "0G0"\nform = "sfb"', "[message 3] id '0G0' is not hex"),
    ("nominal = 500000\n[bus.C]", "nominal = 5000000\n[bus.C]", "[bus.P] nominal = 5000000 is outside"),
    ('stamp = "start"', 'stamp = "middle"', "[bus.C] stamp must be one of start, end"),
    ("[node.inv]", "[nodes.inv]", "[top level] unknown key 'nodes'; did you mean 'node'?"),
    ('sender = "inv"\nperiod = "100ms"', 'sender = "inv"\nperiod = "100ms"\ndrift_ppm = 3',
     "[message 2] unknown key 'drift_ppm'"),
])
def test_bad_catalog_one_line_error(tmp_path: Path, old: str, new: str, expected: str) -> None:
    path = write(tmp_path, broken(GOOD, old, new))
    with pytest.raises(CatalogError) as info:
        load_catalog(path)
    message = str(info.value)
    assert message.startswith(f"{path}: ")
    assert expected in message
    assert "\n" not in message


def test_sender_must_be_on_the_bus(tmp_path: Path) -> None:
    text = broken(GOOD, 'id = "0C0"\nform = "sfb"\ndlc = 15\nsender = "vcu"',
                  'id = "0C0"\nform = "sfb"\ndlc = 15\nsender = "inv"')
    with pytest.raises(CatalogError, match=r"\[message 3\] sender 'inv' is not on bus 'C'"):
        load_catalog(write(tmp_path, text))


def test_toml_syntax_and_missing_file(tmp_path: Path) -> None:
    with pytest.raises(CatalogError, match=r"\[toml\].*line 2"):
        load_catalog(write(tmp_path, "[bus.P]\nnominal = = 3\n"))
    with pytest.raises(CatalogError, match="file not found"):
        load_catalog(tmp_path / "absent.toml")


def test_scenario_keys_are_accepted(tmp_path: Path) -> None:
    text = GOOD + '\n[run]\nname = "x"\n[[fault]]\nnode = "inv"\nkind = "silent"\n'
    text = broken(text, 'buses = ["P"]', 'buses = ["P"]\ndrift_ppm = 35')
    text = broken(text, 'period = "10ms"', 'period = "10ms"\njitter = "150us"')
    cat = load_catalog(write(tmp_path, text))
    assert len(cat.messages) == 4


def test_period_shorter_than_frame(tmp_path: Path) -> None:
    # An 8-byte base frame is at least 111 bits = 222 us at 500 kbit/s.
    # source: Davis et al. 2007, Real-Time Systems 35(3), eq. for C_m (47 + 8n bits unstuffed)
    text = broken(GOOD, 'period = "10ms"', 'period = "200us"')
    with pytest.raises(CatalogError, match=r"\[message 1\] period 200us is shorter than the frame"):
        load_catalog(write(tmp_path, text))
    load_catalog(write(tmp_path, broken(GOOD, 'period = "10ms"', 'period = "400us"')))
