"""The table-lookup hex decoder of the reader's fast path, against Python's bytes.fromhex."""

from __future__ import annotations

import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st

from tracelab.format.fast import decode_hex

payloads = st.lists(st.one_of(st.none(), st.binary(max_size=64)), max_size=40)


@settings(max_examples=200, deadline=None)
@given(payloads, st.booleans(), st.integers(0, 5))
def test_decode_hex_matches_bytes_fromhex(values: list[bytes | None], upper: bool,
                                          skip: int) -> None:
    texts = [None if v is None else (v.hex().upper() if upper else v.hex()) for v in values]
    # a sliced column: its character buffer starts past other rows' text
    column = pl.Series("data", ["ab"] * skip + texts, dtype=pl.String).slice(skip)
    decoded = decode_hex(column)
    assert decoded is not None
    # source: the Python standard library, bytes.fromhex
    expected = [None if t is None else bytes.fromhex(t) for t in texts]
    assert decoded.dtype == pl.Binary
    assert decoded.to_list() == expected


def test_decode_hex_declines_what_is_not_an_even_run_of_hex_digits() -> None:
    # the caller then decodes with polars, which nulls these values
    for bad in (["0A", "0"], ["0A", "zz"], ["-"], ["0A0g"]):
        assert decode_hex(pl.Series(bad)) is None
    assert decode_hex(pl.Series(["", "00"])).to_list() == [b"", b"\x00"]  # type: ignore[union-attr]


@settings(max_examples=100, deadline=None)
@given(st.sampled_from([1, 8, 12, 13, 64]), st.lists(st.booleans(), min_size=1, max_size=50),
       st.integers(0, 2**32))
def test_decode_hex_of_one_length_and_empty_values(width: int, present: list[bool],
                                                   seed: int) -> None:
    # the one-length shortcut (classic 8-byte logs, FD 64-byte logs) with '' rows between
    values = [seed.to_bytes(5, "little").ljust(width, b"\xa5")[:width] if p else b""
              for p in present]
    decoded = decode_hex(pl.Series("data", [v.hex() for v in values]))
    assert decoded is not None
    # source: the Python standard library, bytes.hex / bytes.fromhex
    assert decoded.to_list() == values
