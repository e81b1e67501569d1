"""The frame columns the replay reads (tracelab/forensics/framestore.py), in memory and spilled
to a scratch file in small blocks, against numpy over the same values; and the whole replay
with its frames spilled against the replay with them in memory."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.forensics import synth
from tracelab.forensics import framestore
from tracelab.forensics.framestore import Column, Spill, step_sample, steps_over


def _column(values: np.ndarray, allowance: int, folder: Path) -> Column:
    col = Column(values.dtype, Spill(allowance, folder))
    rng = np.random.default_rng(5)
    i = 0
    while i < values.size:  # uneven pieces, as record batches arrive
        n = int(rng.integers(1, 700))
        col.append(values[i:i + n])
        i += n
    return col.finish()


@pytest.fixture
def small_blocks(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(framestore, "BLOCK", 1000)


@pytest.mark.parametrize("allowance", [0, 40_000, 10**9])  # all spilled, mixed, in memory
def test_column_answers_as_numpy_does(tmp_path: Path, small_blocks: None,
                                      allowance: int) -> None:
    rng = np.random.default_rng(1)
    values = np.cumsum(rng.integers(0, 50, 12_345)).astype(np.int64)  # sorted, with ties
    col = _column(values, allowance, tmp_path)
    assert col.in_memory == (allowance == 10**9)
    assert col.size == values.size
    # source: numpy.searchsorted / indexing / diff are the reference
    probe = np.concatenate([rng.integers(-10, int(values[-1]) + 10, 3000), values[::97]])
    for side in ("left", "right"):
        assert np.array_equal(col.searchsorted(probe, side=side),
                              np.searchsorted(values, probe, side=side))
        assert col.searchsorted(int(values[4321]), side=side) == \
            int(np.searchsorted(values, values[4321], side=side))
    idx = rng.integers(0, values.size, 2000)
    assert np.array_equal(col[idx], values[idx])
    assert col[-1] == values[-1] and col[0] == values[0] and col[7777] == values[7777]
    with pytest.raises(IndexError):
        col[values.size]
    view = col[2500:9100]
    ref = values[2500:9100]
    assert view.size == ref.size
    for side in ("left", "right"):
        assert np.array_equal(view.searchsorted(probe, side=side),
                              np.searchsorted(ref, probe, side=side))
    assert np.array_equal(view[np.arange(0, ref.size, 13)], ref[::13])
    assert np.array_equal(view.to_numpy(), ref)
    assert np.array_equal(np.concatenate([c for _, c in view.chunks(100, 5000)]), ref[100:5000])
    assert view[1000:1200].to_numpy().tolist() == ref[1000:1200].tolist()
    for target in (1, 7, 100, 10**6):
        want = np.diff(values)[::max(1, (values.size - 1) // target)]
        assert np.array_equal(step_sample(col, target), want)
    for limit in (0, 60, 90):
        assert np.array_equal(steps_over(col, limit), np.flatnonzero(np.diff(values) > limit))
    assert col.count(int(values[100])) == int(np.sum(values == values[100]))


def test_batches_of_a_whole_block_kept_beside_spilled_ones(tmp_path: Path,
                                                          small_blocks: None) -> None:
    """A record batch at least a block long is a block of one piece (derived from
    Column.append: it flushes as soon as a block's worth is pending); with an allowance for
    some blocks only, the kept ones and the spilled ones read back as numpy has them."""
    values = np.arange(0, 3 * 10_500, 3, dtype=np.int64)
    col = Column(values.dtype, Spill(24_000, tmp_path))  # three 1,500-value blocks kept
    for i in range(0, values.size, 1500):
        col.append(values[i:i + 1500])
    col.finish()
    assert not col.in_memory and col.size == values.size
    # source: numpy indexing and searchsorted are the reference
    assert np.array_equal(col[np.arange(values.size)], values)
    assert np.array_equal(col.searchsorted(values[::7] + 1), np.searchsorted(values, values[::7] + 1))


@pytest.mark.parametrize("step", [4, 256])
def test_the_two_level_search_answers_as_numpy_does(monkeypatch: pytest.MonkeyPatch,
                                                     step: int) -> None:
    monkeypatch.setattr(framestore, "COARSE_FROM", 0)
    monkeypatch.setattr(framestore, "COARSE_STEP", step)
    rng = np.random.default_rng(2)
    for size in (1, 5, step, step + 1, 3 * step - 1, 10_007):
        values = np.sort(rng.integers(0, size * 3, size)).astype(np.int64)  # with ties
        col = Column.of(values)
        probe = np.concatenate([rng.integers(-5, size * 3 + 5, 500), values])
        for side in ("left", "right"):
            # source: numpy.searchsorted is the reference
            assert np.array_equal(col.searchsorted(probe, side=side),
                                  np.searchsorted(values, probe, side=side)), (size, side)


def test_spilled_blocks_live_in_the_scratch_folder_until_dropped(tmp_path: Path,
                                                                 small_blocks: None) -> None:
    spill = Spill(0, tmp_path)
    col = Column(np.int64, spill)
    col.append(np.arange(5000))
    col.finish()
    assert spill.folder is not None and any(spill.folder.iterdir())
    folder = spill.folder
    del col, spill
    import gc

    gc.collect()
    assert not folder.exists()


def test_a_scratch_folder_that_cannot_be_made_is_a_storage_error(tmp_path: Path,
                                                                  small_blocks: None) -> None:
    from tracelab.errors import StorageError

    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    col = Column(np.int64, Spill(0, blocker / "scratch"))
    with pytest.raises(StorageError, match="cannot write the replay's frame columns"):
        col.append(np.arange(5000))


@pytest.mark.parametrize("fault, fd", [("tx", False), ("rx", True), ("bus", False)])
def test_replay_with_spilled_frames_equals_the_replay_in_memory(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fault: str, fd: bool) -> None:
    from tracelab.forensics import evidence, replay_faults

    s = synth.generate(6000, fault=fault, culprit="bravo", p=0.3, seed=2, fault_from_slot=500,
                       fd=fd, status_every=0)
    cat = synth.catalog(fd=fd)
    monkeypatch.chdir(tmp_path)  # the in-memory connection spills to ./.tmp
    kept = replay_faults(s.connect(), cat)
    monkeypatch.setattr(evidence, "FRAMES_SHARE", 0.0)
    monkeypatch.setattr(evidence, "BATCH_ROWS", 700)
    monkeypatch.setattr(framestore, "BLOCK", 1000)
    spilled = replay_faults(s.connect(), cat)
    assert spilled.as_json() == kept.as_json()
    assert spilled.counters.equals(kept.counters)
    assert spilled.node_states.equals(kept.node_states)
    # the scenario exercises transitions and bus-off recovery (and ESI with FD frames)
    result = kept.as_json()["results"][0]
    assert sum(len(n["transitions"]) for n in result["nodes"]) > 20
    assert any(n["bus_off"] for n in result["nodes"])
    assert (result["evidence"]["esi_frames"] > 0) == fd


@pytest.mark.parametrize("fault, fd", [("tx", False), ("rx", True)])
def test_frames_read_from_the_part_files_give_the_replay_of_the_view(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fault: str, fd: bool) -> None:
    """The frame pass over the stored columns of the part files (row groups decoded ahead
    by pyarrow) gives what the pass over the DuckDB view gives, ESI flags included."""
    import polars as pl

    from tracelab.forensics import replay_faults
    from tracelab.store import schema
    from tracelab.store.row_groups import PartFiles

    s = synth.generate(6000, fault=fault, culprit="bravo", p=0.3, seed=2, fault_from_slot=500,
                       fd=fd, status_every=0)
    cat = synth.catalog(fd=fd)
    monkeypatch.chdir(tmp_path)
    files = [tmp_path / "0.parquet", tmp_path / "1.parquet"]  # two files, small row groups
    frames = schema.conform(pl.DataFrame(s.frames, schema=schema.TABLES["frames"], orient="row"),
                            "frames")
    half = frames.height // 2
    frames[:half].write_parquet(files[0], row_group_size=700)
    frames[half:].write_parquet(files[1], row_group_size=700)
    reads: list[list[str]] = []
    real = PartFiles.row_groups

    def counted(self: PartFiles, columns: list[str], *args, **kwargs):  # type: ignore[no-untyped-def]
        reads.append(list(columns))
        return real(self, columns, *args, **kwargs)

    monkeypatch.setattr(PartFiles, "row_groups", counted)
    con = s.connect()
    con.execute("DROP VIEW frames")
    listing = ", ".join(f"'{f}'" for f in files)
    con.execute(f"CREATE VIEW frames AS SELECT * FROM read_parquet([{listing}])")
    direct = replay_faults(con, cat, frame_files=files)
    assert reads == [["t_ns", "id"] + (["fd", "esi"] if fd else [])]  # the direct path ran
    viewed = replay_faults(s.connect(), cat)
    assert direct.as_json() == viewed.as_json()
    assert direct.counters.equals(viewed.counters)
    assert direct.node_states.equals(viewed.node_states)
    assert (viewed.as_json()["results"][0]["evidence"]["esi_frames"] > 0) == fd


@given(st.lists(st.integers(0, 50), min_size=2, max_size=200), st.integers(0, 60),
       st.booleans())
@settings(max_examples=300, deadline=None)
def test_steps_over_a_limit_are_those_numpy_diff_finds(steps: list[int], limit: int,
                                                       half: bool) -> None:
    """The stretch-wise search finds exactly the steps numpy's diff finds over the limit."""
    values = np.cumsum(np.asarray(steps, dtype=np.int64))
    lim = limit + (0.5 if half else 0.0)
    assert np.array_equal(framestore._steps_over(values, lim),
                          np.flatnonzero(np.diff(values) > lim))


@pytest.mark.parametrize("nominal", [500_000, 83_333])  # whole and not whole ns per bit
def test_counts_per_identifier_from_the_part_files_equal_the_views_sums(
        tmp_path: Path, nominal: int) -> None:
    """frames_by_id from the stored id and bits equals DuckDB's count and sum of the view's
    derived durations per identifier, exactly."""
    from tracelab.forensics.evidence import frames_by_id
    from tracelab.store.dataset import open_dataset
    from tracelab.store.ingest import ingest_logs
    from tracelab.store.row_groups import PartFiles

    rng = np.random.default_rng(11)
    lines = ["%tracelab-frames 1", "%origin 2026-11-30T21:04:05Z",
             f"%bus S nominal={nominal} stamp=end", "%meta run=counted"]
    t = 0
    for _ in range(3000):  # varying lengths: the stuffing of random payloads differs too
        t += int(rng.integers(300_000, 2_000_000))
        dlc = int(rng.integers(0, 9))
        data = bytes(rng.integers(0, 256, dlc, dtype=np.uint8)).hex().upper() or "-"
        lines.append(f"{t}\tS\tframe\t{int(rng.integers(0, 0x800)):03X}\ts\t{dlc}\t{data}")
    log = tmp_path / "counted.frames"
    log.write_text("\n".join(lines) + "\n")
    ingest_logs([log], tmp_path / "ds", quiet=True)
    ds = open_dataset(tmp_path / "ds")
    with ds.connect() as con:
        assert ds.frame_files
        stored = frames_by_id(con, None, ("counted", "S"), PartFiles(ds.frame_files))
        viewed = con.sql("SELECT id, count(*) AS frames, sum(duration_ns)::BIGINT AS busy_ns "
                         "FROM frames GROUP BY id ORDER BY id").pl()
    assert stored["id"].to_list() == viewed["id"].to_list()
    assert stored["frames"].to_list() == viewed["frames"].to_list()
    assert stored["busy_ns"].to_list() == viewed["busy_ns"].to_list()
    assert not stored["ext"].any() and stored["fd_frames"].sum() == 0
