"""Mutation fuzzer over valid frame logs: whatever the bytes, ingest keeps its promises.

A valid log (random records of every kind on a classic and a CAN FD bus) is mutated (byte
flips, deleted and doubled TABs, truncation, CRLF, long lines, NUL bytes, bytes that are not
UTF-8, a BOM, huge and negative numbers) and stored plain, gzip or zstd (possibly corrupt or
cut). For every case:

- ``tracelab ingest`` exits 0 (bad lines collected) or 3 (a file-level fault), with no
  traceback and at most one ``tracelab: ...`` line on stderr;
- on exit 0 the manifest's ``lines`` is the real number of lines of the decompressed bytes
  (counted here, independently) and equals header/comment/blank + records + rejects;
- the fast and the exact path give identical tables, or the identical error;
- ``--strict`` into an existing dataset either succeeds (only when nothing was rejected) or
  exits 3 and leaves the dataset byte for byte as it was.

The short run is part of ``make test`` (derandomized, a few tens of seconds); the long one
runs with ``pytest -m slow tests/fuzz`` (``TRACELAB_FUZZ_EXAMPLES`` cases, default 1,500).
"""

from __future__ import annotations

import contextlib
import gzip
import io
import os
import random
import shutil
import tempfile
import zlib
from collections.abc import Callable
from pathlib import Path

import pytest
import zstandard
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from tracelab.cli import main
from tracelab.errors import LogFormatError
from tracelab.format.blocks import DAMAGE_PROBE_BYTES
from tracelab.format.compression import GZIP_MAGIC, ZSTD_MAGIC
from tracelab.format.reader import read_log

HEADER = ("%tracelab-frames 1\n%origin 2026-11-30T21:04:05.250Z\n"
          "%bus P nominal=500000 name=body\n%bus C nominal=500000 data=2000000 stamp=start\n"
          "%meta run=fuzz vehicle=rig-01\n# a comment\n")
FD_BYTES = (0, 1, 2, 3, 4, 5, 6, 7, 8, 12, 16, 20, 24, 32, 48, 64)
TABLES = ("frames", "errors", "status", "marks", "losses", "rejects")
#: ingest's documented exit codes for a log that exists and is readable (README, CLI reference)
INGEST_EXITS = {0, 3}


def _record(rng: random.Random, t_ns: int) -> str:
    kind = rng.choice(["frame"] * 6 + ["fd", "remote", "ext", "error", "status", "mark", "loss"])
    if kind == "frame":
        dlc = rng.randrange(16)
        return f"{t_ns}\tP\tframe\t{rng.randrange(0x800):03X}\ts\t{dlc}\t" + (
            rng.randbytes(min(dlc, 8)).hex().upper() or "-")
    if kind == "ext":
        return f"{t_ns}\tP\tframe\t{rng.randrange(1 << 29):08X}\tx\t8\t{rng.randbytes(8).hex()}"
    if kind == "fd":
        dlc = rng.randrange(16)
        form = rng.choice(["sf", "sfb", "sfe", "xfbe"])
        ident = f"{rng.randrange(1 << 29):08X}" if form[0] == "x" else f"{rng.randrange(0x800):03X}"
        return f"{t_ns}\tC\tframe\t{ident}\t{form}\t{dlc}\t" + (
            rng.randbytes(FD_BYTES[dlc]).hex() or "-")
    if kind == "remote":
        return f"{t_ns}\tP\tframe\t{rng.randrange(0x800):03X}\tsr\t{rng.randrange(9)}\t-"
    if kind == "error":
        return f"{t_ns}\tP\terror\tstuff\tdata\t0C0\ts\tbrake"
    if kind == "status":
        return f"{t_ns}\tC\tstatus\tgateway\t{rng.randrange(300)}\t{rng.randrange(200)}"
    if kind == "mark":
        return f"{t_ns}\t*\tmark\tstep {rng.randrange(99)} \u00e9t\u00e9"
    return f"{t_ns}\tP\tloss\t{rng.randrange(50)}\t{t_ns + 5000}"


def valid_log(seed: int, n_records: int) -> bytes:
    rng = random.Random(seed)
    t_ns, lines = 0, []
    for _ in range(n_records):
        t_ns += rng.randrange(1, 2_000_000)
        lines.append(_record(rng, t_ns))
        if rng.random() < 0.05:
            lines.append(rng.choice(["", "# note", "  \t "]))
    return (HEADER + "\n".join(lines) + "\n").encode()


# --- mutations: (log bytes, random source) -> log bytes ---------------------------------------


def _at(data: bytes, rng: random.Random) -> int:
    return rng.randrange(len(data) + 1)


def _flip(data: bytes, rng: random.Random) -> bytes:
    if not data:
        return data
    i = rng.randrange(len(data))
    return data[:i] + bytes([data[i] ^ (1 << rng.randrange(8))]) + data[i + 1:]


def _tab(data: bytes, rng: random.Random, double: bool) -> bytes:
    tabs = [i for i, b in enumerate(data) if b == 9]
    if not tabs:
        return data
    i = rng.choice(tabs)
    return data[:i] + (b"\t\t" if double else b"") + data[i + 1:]


def _truncate(data: bytes, rng: random.Random) -> bytes:
    return data[:_at(data, rng)]


def _crlf(data: bytes, rng: random.Random) -> bytes:
    if rng.random() < 0.5:
        return data.replace(b"\n", b"\r\n")
    i = _at(data, rng)  # from here on only
    return data[:i] + data[i:].replace(b"\n", b"\r\n")


def _insert(data: bytes, rng: random.Random, piece: bytes) -> bytes:
    i = _at(data, rng)
    return data[:i] + piece + data[i:]


def _line_start(data: bytes, rng: random.Random) -> int:
    starts = [0] + [i + 1 for i, b in enumerate(data) if b == 10]
    return rng.choice(starts)


def _long_line(size: int) -> Callable[[bytes, random.Random], bytes]:
    def mutate(data: bytes, rng: random.Random) -> bytes:
        i = _line_start(data, rng)
        body = rng.choice([b"#" + b"c" * size, b"1\tP\tmark\t" + b"m" * size, b" " * size,
                           b"5\tP\tframe\t0C0\ts\t8\t" + b"A" * size])
        return data[:i] + body + b"\n" + data[i:]
    return mutate


def _number(data: bytes, rng: random.Random) -> bytes:
    """Replace a field with a huge, negative or odd number."""
    fields = [i for i, b in enumerate(data) if b == 9]
    if not fields:
        return data
    start = rng.choice(fields) + 1
    end = start
    while end < len(data) and data[end] not in (9, 10):
        end += 1
    value = rng.choice([str(2**63), str(2**63 - 1), str(2**64), "1" + "0" * 30, "-1", "-0",
                        "0" * 25 + "7", "+5", "9223372036854775806", "1e9", "0x10"]).encode()
    if rng.random() < 0.3:  # the line's t_ns instead
        start = data.rfind(b"\n", 0, start) + 1
        end = data.find(b"\t", start)
        if end < 0:
            return data
    return data[:start] + value + data[end:]


MUTATIONS: dict[str, Callable[[bytes, random.Random], bytes]] = {
    "flip": _flip,
    "delete-tab": lambda d, r: _tab(d, r, double=False),
    "double-tab": lambda d, r: _tab(d, r, double=True),
    "truncate": _truncate,
    "crlf": _crlf,
    "nul": lambda d, r: _insert(d, r, b"\x00" * r.randrange(1, 4)),
    "not-utf8": lambda d, r: _insert(d, r, r.choice([b"\xff", b"\xc3", b"\xe9t\xe9", b"\xed\xa0\x80"])),
    "bom": lambda d, r: b"\xef\xbb\xbf" + d if r.random() < 0.5 else _insert(d, r, b"\xef\xbb\xbf"),
    "control": lambda d, r: _insert(d, r, r.choice([b"\r", b"\x1b[2J", b"\x07", b"\x0c"])),
    "number": _number,
    "long-line": _long_line(70_000),
}
LONG_MUTATIONS = {**MUTATIONS, "10mb-line": _long_line(10_000_000)}


def _compress(data: bytes, codec: str, damage: str, rng: random.Random) -> bytes:
    if codec == "plain":
        return data
    packed = gzip.compress(data, mtime=0) if codec == "gzip" else zstandard.compress(data)
    if damage == "cut":
        return packed[: rng.randrange(len(packed))]
    if damage == "flip":
        return _flip(packed, rng)
    return packed


def reference_content(packed: bytes, codec: str) -> bytes | None:
    """The decompressed bytes by the codecs' own one-shot functions (None: they refuse)."""
    try:
        if codec == "gzip":
            return gzip.decompress(packed)
        if codec == "zstd":
            return zstandard.ZstdDecompressor().decompress(packed)
    except (OSError, EOFError, zlib.error, zstandard.ZstdError):
        return None
    return packed


def decodable_prefix(packed: bytes, codec: str) -> int:
    """How many bytes the codec's streaming decompressor gives before it stops or fails."""
    obj = zlib.decompressobj(31) if codec == "gzip" else zstandard.ZstdDecompressor().decompressobj()
    total = 0
    try:
        for i in range(0, len(packed), 1 << 12):
            total += len(obj.decompress(packed[i: i + (1 << 12)]))
    except (zlib.error, zstandard.ZstdError):
        pass
    return total


def real_lines(content: bytes) -> int:
    """Lines as the format counts them: LF-terminated, plus a final fragment without one."""
    return content.count(b"\n") + (1 if content and not content.endswith(b"\n") else 0)


# --- running tracelab -------------------------------------------------------------------------


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def _snapshot(dataset: Path) -> dict[str, bytes]:
    return {str(p.relative_to(dataset)): p.read_bytes() for p in sorted(dataset.rglob("*"))
            if p.is_file()}


def _read(path: Path, fast: bool) -> tuple[str, object]:
    try:
        return "ok", read_log(path, fast=fast)
    except LogFormatError as error:
        return "error", (error.line, error.reason)


def check_case(log: bytes, codec: str, damage: str, seed: int, base: Path) -> None:
    rng = random.Random(seed)
    packed = _compress(log, codec, damage, rng)
    content = reference_content(packed, codec)
    with tempfile.TemporaryDirectory(prefix="tracelab-fuzz-") as tmp:
        work = Path(tmp)
        path = work / ("case.frames" + {"plain": "", "gzip": ".gz", "zstd": ".zst"}[codec])
        path.write_bytes(packed)

        code, out, err = _run(["ingest", str(path), "-o", str(work / "ds"), "-q"])
        assert code in INGEST_EXITS, (code, err)
        assert "Traceback" not in err + out
        assert len(err.splitlines()) <= 1 and (not err or err.startswith("tracelab: ")), err
        if content is None:  # the codec itself refuses the bytes: so must we
            assert code == 3, (code, err)
            # named as damage unless a fault stopped the read before it (more than the
            # reader's probe of DAMAGE_PROBE_BYTES past a fault; half of it, as decoders
            # notice damage a little apart)
            # (and a file whose magic bytes are cut or damaged is not recognisably compressed)
            magic = GZIP_MAGIC if codec == "gzip" else ZSTD_MAGIC
            if packed.startswith(magic) and decodable_prefix(packed, codec) <= DAMAGE_PROBE_BYTES // 2:
                assert "corrupt or truncated" in err, err
            return
        if code == 0:
            import polars as pl

            manifest = pl.read_parquet(work / "ds" / "manifest.parquet").row(0, named=True)
            assert manifest["lines"] == real_lines(content), (manifest["lines"], real_lines(content))
            records = sum(manifest[t] for t in ("frames", "errors", "status", "marks", "losses"))
            assert manifest["lines"] == manifest["header_lines"] + records + manifest["rejects"]

        fast, exact = _read(path, fast=True), _read(path, fast=False)
        assert fast[0] == exact[0], (fast, exact)
        if fast[0] == "ok":
            for name in TABLES:
                assert getattr(fast[1], name).equals(getattr(exact[1], name)), name
            assert code == 0
        else:
            assert fast[1] == exact[1] and code == 3

        dataset = work / "strict-ds"
        shutil.copytree(base, dataset)
        before = _snapshot(dataset)
        strict_code, _, strict_err = _run(["ingest", str(path), "-o", str(dataset), "--strict",
                                           "-q"])
        assert strict_code in INGEST_EXITS and "Traceback" not in strict_err
        if strict_code == 3:
            assert len(strict_err.splitlines()) == 1 and strict_err.startswith("tracelab: ")
            assert _snapshot(dataset) == before
        else:
            assert code == 0 and manifest["rejects"] == 0


@pytest.fixture(scope="module")
def base_dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("fuzz-base")
    log = root / "base.frames"
    log.write_bytes(valid_log(seed=1, n_records=20).replace(b"run=fuzz", b"run=base"))
    assert main(["ingest", str(log), "-o", str(root / "ds"), "-q"]) == 0
    return root / "ds"


def cases(mutations: dict[str, Callable[[bytes, random.Random], bytes]]) -> st.SearchStrategy:
    return st.tuples(
        st.integers(0, 2**32 - 1),  # the log and every random choice of the mutations
        st.integers(1, 60),  # records
        st.lists(st.sampled_from(sorted(mutations)), min_size=0, max_size=3),
        st.sampled_from(["plain", "plain", "gzip", "zstd"]),
        st.sampled_from(["none", "none", "cut", "flip"]),
    )


def _case(case: tuple, mutations: dict[str, Callable[[bytes, random.Random], bytes]],
          base: Path) -> None:
    seed, n_records, names, codec, damage = case
    rng = random.Random(seed)
    log = valid_log(seed, n_records)
    for name in names:
        log = mutations[name](log, rng)
    check_case(log, codec, damage if codec != "plain" else "none", seed, base)


_SETTINGS = dict(deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                        HealthCheck.too_slow])


def test_valid_logs_pass_every_check(base_dataset: Path) -> None:
    for seed in range(2):  # the unmutated logs: ingest clean, strict succeeds
        check_case(valid_log(seed, 40), "plain", "none", seed, base_dataset)
        check_case(valid_log(seed, 40), "zstd", "none", seed, base_dataset)


@settings(max_examples=30, derandomize=True, **_SETTINGS)  # type: ignore[arg-type]
@given(case=cases(MUTATIONS))
@example(case=(71, 1, [], "gzip", "flip"))  # found: a flip garbled %origin before the CRC
def test_mutated_logs_keep_the_promises(base_dataset: Path, case: tuple) -> None:
    _case(case, MUTATIONS, base_dataset)


@pytest.mark.slow
@settings(max_examples=int(os.environ.get("TRACELAB_FUZZ_EXAMPLES", "1500")),
          **_SETTINGS)  # type: ignore[arg-type]
@given(case=cases(LONG_MUTATIONS))
@example(case=(10, 1, ["10mb-line"], "gzip", "cut"))  # found: damage past the probe
@example(case=(10, 1, ["not-utf8", "10mb-line"], "gzip", "flip"))  # found: at the probe's end
@example(case=(10000001, 1, [], "gzip", "cut"))  # found: cut to one byte of the magic
@example(case=(10000001, 1, [], "gzip", "flip"))  # found: a flip in the magic itself
def test_mutated_logs_keep_the_promises_long(base_dataset: Path, case: tuple) -> None:
    _case(case, LONG_MUTATIONS, base_dataset)
