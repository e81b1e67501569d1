"""The frames of one (run, bus) as columns cut into blocks, in memory or in a scratch file.

The replay asks a few things of the frames: how many (all, or one sender's) came before a
time, the time of the k-th one, the sender of the k-th one, and a pass over them in order.
A :class:`Column` answers those over blocks of up to ``BLOCK`` values. The blocks stay in
memory while the columns of a bus fit their allowance (:class:`Spill`, a quarter of the
memory budget); beyond it every further block goes to a scratch file and is read back on
demand (a small cache of the last blocks read), so the replay's memory stays bounded
whatever the log size. A column that stayed in memory is one numpy array (no overhead).
"""

from __future__ import annotations

import shutil
import tempfile
import weakref
from collections import OrderedDict
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from tracelab.store.dataset import storage_error

#: What a failed write to the scratch folder was doing (StorageError, exit 5).
SPILL_DOING = "cannot write the replay's frame columns (give --temp-dir a folder with room)"
#: Values per block (a column buffers this many before it stores a block).
BLOCK = 1 << 20
#: Blocks of a spilled column kept in memory after a read.
CACHED_BLOCKS = 2


class Spill:
    """The memory allowance shared by the columns of one bus, and their scratch folder."""

    def __init__(self, allowance_bytes: int, folder: Path | None) -> None:
        self.allowance = allowance_bytes
        self.held = 0  # bytes of blocks kept in memory
        self.parent = folder
        self.folder: Path | None = None
        self.files = 0

    def keep(self, nbytes: int) -> bool:
        """Whether a block of nbytes may stay in memory (else it goes to the scratch file)."""
        if self.held + nbytes <= self.allowance:
            self.held += nbytes
            return True
        return False

    @property
    def spilled(self) -> bool:
        return self.folder is not None

    def new_file(self) -> Path:
        if self.folder is None:
            parent = self.parent
            try:
                if parent is not None:
                    parent.mkdir(parents=True, exist_ok=True)
                self.folder = Path(tempfile.mkdtemp(prefix="tl-frames-", dir=parent))
            except OSError as error:
                raise storage_error(parent or Path.cwd(), error, SPILL_DOING) from error
            weakref.finalize(self, shutil.rmtree, self.folder, True)
        self.files += 1
        return self.folder / f"{self.files}.bin"


class Column:
    """A column of values cut into blocks; ``sorted`` columns answer searchsorted.

    Indexing, searchsorted and slicing behave as on the numpy array the blocks make up.
    """

    def __init__(self, dtype: Any, spill: Spill | None = None) -> None:
        self.dtype = np.dtype(dtype)
        self._spill = spill
        self._pending: list[np.ndarray] = []
        self._pending_n = 0
        self._blocks: list[np.ndarray | None] = []  # None: in the scratch file
        self._kept: list[list[np.ndarray] | None] = []  # while building: a block's pieces
        self._offsets_of: dict[int, int] = {}       # block -> byte offset in the file
        self._starts: list[int] = [0]               # index of each block's first value
        self._first: list[Any] = []                 # per block, its first and last value
        self._last: list[Any] = []
        self._file: Path | None = None
        self._offsets: list[int] = []               # byte offset of each block in the file
        self._cache: OrderedDict[int, np.ndarray] = OrderedDict()
        self._one: np.ndarray | None = None         # the whole column, when in one block
        self._coarse: np.ndarray | None = None      # every COARSE_STEP-th value of _one
        self._lo, self._hi = 0, 0                   # a view's range over the blocks
        self._of: Column | None = None               # a view's column (no self-reference)

    # --- building ------------------------------------------------------------------------

    @classmethod
    def of(cls, values: np.ndarray) -> Column:
        """A column over an array already in memory."""
        col = cls(values.dtype)
        col._one = values
        col._hi = int(values.size)
        col._blocks = [values]
        col._starts = [0, int(values.size)]
        if values.size:
            col._first, col._last = [values[0]], [values[-1]]
        return col

    def append(self, values: np.ndarray) -> None:
        if values.size == 0:
            return
        self._pending.append(np.asarray(values, dtype=self.dtype))
        self._pending_n += int(values.size)
        if self._pending_n >= BLOCK:
            self._flush()

    def _flush(self) -> None:
        """The pending values become a block: kept as pieces while the allowance lasts (one
        concatenation at the end), else written to the scratch file."""
        pieces, n = self._pending, self._pending_n
        self._pending, self._pending_n = [], 0
        nbytes = n * self.dtype.itemsize
        self._first.append(pieces[0][0])
        self._last.append(pieces[-1][-1])
        self._starts.append(self._starts[-1] + n)
        if self._spill is None or self._spill.keep(nbytes):
            self._kept.append(pieces)
            self._blocks.append(None)
            return
        if self._file is None:
            self._file = self._spill.new_file()
        try:
            with open(self._file, "ab") as out:
                self._offsets.append(out.tell())
                for piece in pieces:
                    piece.tofile(out)
        except OSError as error:  # a full scratch disk, most likely
            raise storage_error(self._file, error, SPILL_DOING) from error
        self._kept.append(None)
        self._blocks.append(None)

    def finish(self) -> Column:
        """Store the last partial block; a column that stayed in memory becomes one array."""
        if self._pending:
            self._flush()
        self._hi = self._starts[-1]
        if self._file is None:
            pieces = [p for group in self._kept if group is not None for p in group]
            one = pieces[0] if len(pieces) == 1 else (
                np.concatenate(pieces) if pieces else np.zeros(0, dtype=self.dtype))
            self._one = one
            self._blocks = [one]
            self._starts = [0, int(one.size)]
        else:
            self._offsets_of = {}
            offsets = iter(self._offsets)
            for b, group in enumerate(self._kept):
                if group is not None:
                    self._blocks[b] = group[0] if len(group) == 1 else np.concatenate(group)
                else:
                    self._offsets_of[b] = next(offsets)
        self._kept = []
        return self

    # --- reading -------------------------------------------------------------------------

    @property
    def _root(self) -> Column:
        return self if self._of is None else self._of

    @property
    def size(self) -> int:
        return self._hi - self._lo

    def __len__(self) -> int:
        return self.size

    @property
    def in_memory(self) -> bool:
        return self._root._one is not None

    def _block(self, b: int) -> np.ndarray:
        base = self._root
        block = base._blocks[b]
        if block is not None:
            return block
        cached = base._cache.get(b)
        if cached is not None:
            base._cache.move_to_end(b)
            return cached
        assert base._file is not None
        n = base._starts[b + 1] - base._starts[b]
        block = np.fromfile(base._file, dtype=base.dtype, count=n,
                            offset=base._offsets_of[b])
        base._cache[b] = block
        while len(base._cache) > CACHED_BLOCKS:
            base._cache.popitem(last=False)
        return block

    def _gather(self, idx: np.ndarray) -> np.ndarray:
        """Values at base indices idx (an int64 array)."""
        base = self._root
        if base._one is not None:
            return base._one[idx]
        out = np.empty(idx.size, dtype=base.dtype)
        which = np.searchsorted(np.asarray(base._starts, dtype=np.int64), idx, side="right") - 1
        for b in np.unique(which).tolist():  # a loop over the blocks touched
            sel = which == b
            out[sel] = self._block(b)[idx[sel] - base._starts[b]]
        return out

    def __getitem__(self, key: Any) -> Any:
        if isinstance(key, slice):
            start, stop, step = key.indices(self.size)
            if step != 1:
                raise IndexError("Column slices take no step")
            return self.view(start, max(start, stop))
        if isinstance(key, int | np.integer):
            i = int(key)
            if i < 0:
                i += self.size
            if not 0 <= i < self.size:
                raise IndexError(f"index {int(key)} out of a column of {self.size}")
            return self._gather(np.array([i + self._lo], dtype=np.int64))[0]
        idx = np.asarray(key)
        if idx.dtype == bool:
            raise TypeError("Column takes index arrays, not masks (use chunks())")
        idx = idx.astype(np.int64)
        if idx.size and (int(idx.min()) < 0 or int(idx.max()) >= self.size):
            raise IndexError("index out of the column")
        return self._gather(idx + self._lo)

    def view(self, i: int, j: int) -> Column:
        """The values [i, j) as a column sharing these blocks (no copy)."""
        base = self._root
        if base._one is not None:
            return Column.of(base._one[self._lo + i:self._lo + j])
        out = Column(base.dtype)
        out._of = base
        out._lo, out._hi = self._lo + i, self._lo + j
        return out

    def searchsorted(self, values: Any, side: str = "left", sorter: Any = None) -> Any:
        """np.searchsorted over the whole (sorted) column: ints give an int, arrays an array."""
        if sorter is not None:
            raise TypeError("Column.searchsorted takes no sorter")
        base = self._root
        scalar = np.ndim(values) == 0
        v = np.atleast_1d(np.asarray(values))
        if base._one is not None:
            pos = _two_level(base, v, side)
        else:
            # the block holding the answer: the first whose last value is >= v (left) or
            # > v (right); then a search inside it
            lasts = np.asarray(base._last)
            which = np.searchsorted(lasts, v, side=side)  # type: ignore[call-overload]
            pos = np.full(v.size, base._starts[-1], dtype=np.int64)
            for b in np.unique(which).tolist():  # a loop over the blocks touched
                if b >= len(base._blocks):
                    continue
                sel = which == b
                pos[sel] = base._starts[b] + np.searchsorted(  # type: ignore[call-overload]
                    self._block(b), v[sel], side=side)
        pos = np.clip(np.asarray(pos, dtype=np.int64) - self._lo, 0, self.size)
        return int(pos[0]) if scalar else pos

    def chunks(self, i: int = 0, j: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
        """(index of the chunk's first value, values) over [i, j), block by block."""
        base = self._root
        lo = self._lo + i
        hi = self._lo + (self.size if j is None else min(j, self.size))
        if base._one is not None:
            if hi > lo:
                yield i, base._one[lo:hi]
            return
        for b in range(len(base._blocks)):
            s, e = base._starts[b], base._starts[b + 1]
            if e <= lo or s >= hi:
                continue
            block = self._block(b)
            a, z = max(lo, s), min(hi, e)
            yield a - self._lo, block[a - s:z - s]

    def count(self, value: Any) -> int:
        """How many values equal value (a pass over the blocks)."""
        return sum(int(np.count_nonzero(c == value)) for _, c in self.chunks())

    def to_numpy(self) -> np.ndarray:
        """The values as one array (for small columns: tests, short windows)."""
        parts = [c for _, c in self.chunks()]
        return np.concatenate(parts) if parts else np.zeros(0, dtype=self.dtype)


#: In-memory columns longer than this answer many searches through a coarse index first.
COARSE_FROM = 1 << 20
#: Values per coarse index entry (a power of two).
COARSE_STEP = 256


def _two_level(col: Column, v: np.ndarray, side: str) -> np.ndarray:
    """np.searchsorted(col._one, v, side) for an in-memory column. For many searches into a
    long array: a search in every COARSE_STEP-th value (small, in cache) finds the stretch
    of COARSE_STEP values holding each answer, then a branch-free binary search of fixed
    depth inside it (vectorised over the searches), instead of each search wandering through
    the whole array (a cache miss per step)."""
    a = col._one
    assert a is not None
    if a.size < COARSE_FROM or v.size < 64:
        return np.searchsorted(a, v, side=side)  # type: ignore[call-overload, no-any-return]
    coarse = col._coarse
    if coarse is None:
        coarse = col._coarse = a[::COARSE_STEP].copy()
    # the answer lies in (lo, hi]: a[lo] < v <= a[hi] for side="left" (<= / < for "right")
    j = np.searchsorted(coarse, v, side=side)  # type: ignore[call-overload]
    lo = (j - 1) * COARSE_STEP  # index of the last coarse value before the answer, or < 0
    hi = np.minimum(j * COARSE_STEP, a.size)
    lo = np.maximum(lo, -1)
    # invariant: the answer is in (lo, hi]; halve the interval until it is one value wide
    for _ in range(COARSE_STEP.bit_length()):  # fixed depth: log2(COARSE_STEP) + 1 steps
        mid = (lo + hi) // 2
        probe = a[np.clip(mid, 0, a.size - 1)]
        below = (probe < v) if side == "left" else (probe <= v)
        open_ = hi - lo > 1
        lo = np.where(open_ & below, mid, lo)
        hi = np.where(open_ & ~below, mid, hi)
    return np.asarray(hi, dtype=np.int64)


def _in_memory_values(col: Column) -> np.ndarray:
    """An in-memory column's values as a view of its array (to_numpy copies them)."""
    one = col._root._one
    assert one is not None
    return one[col._lo:col._hi]


def step_sample(own: Column, target: int) -> np.ndarray:
    """``np.diff(own)[::max(1, steps // target)]`` (the steps between consecutive values),
    computed block by block."""
    steps = own.size - 1
    if steps <= 0:
        return np.zeros(0, dtype=np.int64)
    k = max(1, steps // target)
    if own.in_memory:
        values = _in_memory_values(own)
        at = np.arange(0, steps, k)
        return values[at + 1] - values[at]
    out = []
    prev: np.ndarray | None = None
    for start, chunk in own.chunks():
        vals = chunk if prev is None else np.concatenate([prev, chunk])
        first = start - (0 if prev is None else 1)  # value index of vals[0]; step j = v[j+1]-v[j]
        d = np.diff(vals)
        j0 = -(-first // k) * k  # first multiple of k at or after first
        out.append(d[j0 - first::k])
        prev = chunk[-1:]
    return np.concatenate(out) if out else np.zeros(0, dtype=np.int64)


def steps_over(own: Column, limit: float) -> np.ndarray:
    """Indices i with own[i + 1] - own[i] > limit, block by block."""
    if own.size < 2:
        return np.zeros(0, dtype=np.int64)
    if own.in_memory:
        return _steps_over(_in_memory_values(own), limit)
    out = []
    prev: np.ndarray | None = None
    for start, chunk in own.chunks():
        vals = chunk if prev is None else np.concatenate([prev, chunk])
        first = start - (0 if prev is None else 1)
        out.append(np.flatnonzero(np.diff(vals) > limit) + first)
        prev = chunk[-1:]
    return np.concatenate(out) if out else np.zeros(0, dtype=np.int64)


#: Steps per stretch in _steps_over's first look.
STRETCH = 8


def _steps_over(values: np.ndarray, limit: float) -> np.ndarray:
    """Indices i with values[i + 1] - values[i] > limit, for sorted values. A step lies inside
    a stretch of STRETCH steps and is no longer than the stretch's span, so only the stretches
    that span more than ``limit`` are looked into (an eighth of the work of a full diff on a
    busy node); when many do, the full diff."""
    n = values.size
    coarse = values[::STRETCH]
    if (n - 1) % STRETCH:
        coarse = np.append(coarse, values[-1])
    wide = np.flatnonzero(np.diff(coarse) > limit)
    if wide.size * STRETCH * 4 > n:
        return np.flatnonzero(np.diff(values) > limit)
    i = (wide[:, None] * STRETCH + np.arange(STRETCH)).ravel()
    i = i[i < n - 1]
    return i[values[i + 1] - values[i] > limit]
