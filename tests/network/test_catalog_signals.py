"""``[[message.signal]]`` in the catalog: positions, defaults and one-line validation errors."""

from __future__ import annotations

from pathlib import Path

import pytest

from tracelab.errors import CatalogError
from tracelab.network.catalog import CrcSpec, load_catalog

GOOD = """
[bus.P]
nominal = 500000
[node.tms]
buses = ["P"]

[[message]]
bus = "P"
id = "310"
dlc = 8
sender = "tms"
period = "100ms"
name = "coolant_loop"

[[message.signal]]
name = "coolant_temp"
lsb = 12
length = 10
scale = 0.1
offset = -40.0
unit = "degC"
min = -40.0
max = 150.0
plot = true

[[message.signal]]
name = "pump_state"
lsb = 22
length = 2
values = { 0 = "off", 1 = "on" }

[[message.signal]]
name = "pressure"
lsb = 47
length = 16
order = "big"
signed = true

[[message.signal]]
name = "alive"
lsb = 48
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
dlc = 4
sender = "tms"
period = "50ms"
name = "pump_fan_command"

[[message.signal]]
name = "page"
lsb = 0
length = 2

[[message.signal]]
name = "pump_cmd"
lsb = 8
length = 8
mux = "page"
mux_value = 0

[[message.signal]]
name = "fan_cmd"
lsb = 8
length = 16
mux = "page"
mux_value = 1

[[message.signal]]
name = "seq"
lsb = 24
length = 8
role = "counter"
step = 2
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "net.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_signals_load_with_defaults(tmp_path: Path) -> None:
    cat = load_catalog(write(tmp_path, GOOD))
    loop, pump = cat.messages
    temp, state, pressure, alive, crc = loop.signals
    assert (temp.lsb, temp.length, temp.order, temp.signed, temp.scale, temp.offset) == (
        12, 10, "little", False, 0.1, -40.0)
    assert (temp.unit, temp.min, temp.max, temp.plot, temp.nbytes) == ("degC", -40.0, 150.0,
                                                                        True, 8)
    assert state.values == ((0, "off"), (1, "on")) and state.scale == 1.0 and not state.plot
    assert alive.role == "counter" and alive.step == 1
    assert crc.crc == CrcSpec(8, 0x1D, 0xFF, 0xFF, False, False)
    assert crc.over == (0, 1, 2, 3, 4, 5, 6)  # default: every byte but the checksum's own
    assert pump.signals[3].step == 2
    assert pump.signals[1].mux == "page" and pump.signals[1].mux_value == 0
    # derived: big order, lsb = 8*5 + 7 -> shift 8*(8-1-5) + 7 = 23; 16 bits: byte 5 bit 7,
    # byte 4 whole, byte 3 bits 0..6
    assert pressure.shift == 23
    assert pressure.byte_indices() == [3, 4, 5]


def test_bit_positions_of_both_orders(tmp_path: Path) -> None:
    cat = load_catalog(write(tmp_path, GOOD))
    temp = cat.messages[0].signals[0]
    # derived: little, bits 12..21 = byte 1 bits 4..7 and byte 2 bits 0..5
    assert temp.bit_positions() == list(range(12, 22))
    pressure = cat.messages[0].signals[2]
    # derived: big order from byte 5 bit 7 towards byte 0: 47, then 32..39, then 24..30
    assert sorted(pressure.bit_positions()) == [*range(24, 31), *range(32, 40), 47]


def broken(old: str, new: str) -> str:
    assert old in GOOD
    return GOOD.replace(old, new, 1)


@pytest.mark.parametrize(("old", "new", "expected"), [
    ("lsb = 12\nlength = 10", "lsb = 60\nlength = 10",
     "[message 1 signal 'coolant_temp'] bits 60..69 do not fit the 8-byte payload (64 bits)"),
    ("lsb = 47\nlength = 16", "lsb = 7\nlength = 16",
     "16 bits from byte 0 bit 7 towards byte 0 do not fit the 8-byte payload"),
    ("lsb = 22\nlength = 2", "lsb = 20\nlength = 2",
     "[message 1 signal 'pump_state'] overlaps signal 'coolant_temp' at byte 2 bit 4"),
    ("scale = 0.1", "scael = 0.1",
     "[message 1 signal 1] unknown key 'scael'; did you mean 'scale'?"),
    ('order = "big"', 'order = "bigg"', "order must be \"little\" or \"big\", got 'bigg'; "
                                        "did you mean 'big'?"),
    ('role = "counter"\n', 'role = "countr"\n', "did you mean 'counter'?"),
    ("crc = { width = 8,", "crc = { width = 16,", "crc width 16 differs from the signal's length 8"),
    ("crc = { width = 8, poly = 0x1D,", "crc = { width = 8, polly = 0x1D,",
     "[message 1 signal 'crc' crc] unknown key 'polly'; did you mean 'poly'?"),
    ("xorout = 0xFF }", "xorout = 0xFF }\nover = [0, 7]", "over: byte 7 holds the checksum itself"),
    ("xorout = 0xFF }", "xorout = 0xFF }\nover = [0, 8]", "over: byte 8 is outside the 8-byte"),
    ('role = "checksum"\ncrc', 'role = "counter"\ncrc', "crc is only for role = \"checksum\""),
    ('length = 8\nrole = "counter"\nstep = 2', 'length = 8\nstep = 2',
     "step is only for role = \"counter\""),
    ('mux = "page"\nmux_value = 0', 'mux = "pag"\nmux_value = 0',
     "mux selector 'pag' is not a signal of this message; did you mean 'page'?"),
    ('mux = "page"\nmux_value = 0', "mux_value = 0", "mux_value needs mux"),
    ('mux = "page"\nmux_value = 1', 'mux = "page"\nmux_value = 0',
     "[message 2 signal 'fan_cmd'] overlaps signal 'pump_cmd' at byte 1 bit 0"),
    ('mux = "page"\nmux_value = 1', 'mux = "page"\nmux_value = 4',
     "mux_value 4 does not fit the 2-bit selector 'page'"),
    ('name = "pump_state"', 'name = "coolant_temp"', "name is used twice in this message"),
    ('values = { 0 = "off", 1 = "on" }', 'values = { 4 = "?" }',
     "values key 4 does not fit the 2-bit raw value (0..3)"),
    ('length = 10\nscale = 0.1', 'length = 65\nscale = 0.1', "length = 65 is outside 1..64"),
    ("min = -40.0\nmax = 150.0", "min = 150.0\nmax = -40.0", "min 150.0 is above max -40.0"),
    ('lsb = 48\nlength = 4\nrole = "counter"', 'lsb = 48\nlength = 4\nrole = "counter"\n'
                                               "signed = true", "a counter is unsigned"),
])
def test_bad_signal_one_line_error(tmp_path: Path, old: str, new: str, expected: str) -> None:
    path = write(tmp_path, broken(old, new))
    with pytest.raises(CatalogError) as info:
        load_catalog(path)
    message = str(info.value)
    assert message.startswith(f"{path}: ")
    assert expected in message, message
    assert "\n" not in message


def test_signal_in_a_remote_frame_is_refused(tmp_path: Path) -> None:
    text = broken('id = "311"\ndlc = 4', 'id = "311"\nform = "sr"\ndlc = 4')
    with pytest.raises(CatalogError, match="carries no payload bytes"):
        load_catalog(write(tmp_path, text))


def test_scenario_profile_key_is_accepted(tmp_path: Path) -> None:
    text = broken("plot = true", 'plot = true\nprofile = { kind = "ramp", from = 20.0, to = 90.0 }')
    temp = load_catalog(write(tmp_path, text)).messages[0].signals[0]
    assert temp.profile == {"kind": "ramp", "from": 20.0, "to": 90.0}
