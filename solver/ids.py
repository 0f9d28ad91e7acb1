"""Interning of string node ids to dense integers, compiled.

Names are kept as UTF-8 bytes in one growing buffer with an offsets array
(the layout of an Arrow string column), and an open-addressing hash table
(FNV-1a hash, linear probing) maps them to ids. :meth:`NodeIds.intern`
reads the buffers of an Arrow string array directly, so a batch of events is
interned in one compiled pass with no Python object per element. Ids are
handed out in order of first appearance: the same events always give the
same ids.

A hash-table cell holds the id and 31 bits of the name's hash (a tag), so
a probe reads the stored name only when the tags agree. Interning a batch
hashes all its names first and prefetches each name's cell a few dozen names
ahead, so the cache misses of a table larger than the cache overlap instead of
coming one after the other (software pipelining, as in [1]_): interning the
2.2M names of a million-event log became 2.5-4 times faster than probing name
by name (DEVELOPERS.md, "The replay path").

Memory per node: its name's bytes plus 8 (offset) + about 16 (8-byte
hash-table cells at load <= 0.5) bytes.

References
----------
.. [1] S. Chen, A. Ailamaki, P. B. Gibbons, T. C. Mowry, "Improving hash join
   performance through prefetching", ICDE 2004.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
from numba import njit

from .prefetch import prefetch

_FNV_OFFSET = np.uint64(0xCBF29CE484222325)
_FNV_PRIME = np.uint64(0x100000001B3)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


@njit(cache=True, inline="always")
def _fnv1a(data, start, stop):
    h = _FNV_OFFSET
    for j in range(start, stop):
        h = (h ^ np.uint64(data[j])) * _FNV_PRIME
    return h


@njit(cache=True, inline="always")
def _same(a, a0, a1, b, b0, b1):
    if a1 - a0 != b1 - b0:
        return False
    for j in range(a1 - a0):
        if a[a0 + j] != b[b0 + j]:
            return False
    return True


#: An empty hash-table cell.
_EMPTY = -1
#: Names interned ahead of the one probed: its cell is prefetched this many names
#: before, the offsets of the id found there half as many.
_AHEAD = 32
_TAG_SHIFT = np.uint64(33)
_ID_MASK = 0xFFFFFFFF


@njit(cache=True, inline="always")
def _cell(h, shift):
    return np.int64((h * _GOLDEN) >> np.uint64(shift))


@njit(cache=True, inline="always")
def _tag(h):
    """31 bits of the hash, kept in a cell beside the id (a cell stays >= 0, empty is -1)."""
    return np.int64(h >> _TAG_SHIFT)


@njit(cache=True, nogil=True)
def _intern(offsets, data, table, shift, store_off, store_data, counters, out):
    """Ids of the strings ``data[offsets[i]:offsets[i+1]]``, adding new ones.

    ``counters``: [0] names held, [1] bytes used. Room must have been made.
    """
    mask = table.shape[0] - 1
    count = offsets.shape[0] - 1
    hashes = np.empty(count, np.uint64)
    for i in range(count):
        hashes[i] = _fnv1a(data, offsets[i], offsets[i + 1])
    for i in range(count):
        if i + _AHEAD < count:
            prefetch(table, _cell(hashes[i + _AHEAD], shift))
        if i + _AHEAD // 2 < count:
            ahead = table[_cell(hashes[i + _AHEAD // 2], shift)]  # in cache by now: prefetched earlier
            if ahead != _EMPTY:
                prefetch(store_off, ahead & _ID_MASK)
        a = offsets[i]
        b = offsets[i + 1]
        tag = _tag(hashes[i])
        cell = _cell(hashes[i], shift)
        while True:
            held = table[cell]
            if held == _EMPTY:
                idx = counters[0]
                used = counters[1]
                for j in range(b - a):
                    store_data[used + j] = data[a + j]
                store_off[idx + 1] = used + (b - a)
                counters[0] = idx + 1
                counters[1] = used + (b - a)
                table[cell] = (tag << 32) | idx
                break
            idx = held & _ID_MASK
            if held >> 32 == tag and _same(store_data, store_off[idx], store_off[idx + 1], data, a, b):
                break
            cell = (cell + 1) & mask
        out[i] = idx


@njit(cache=True, nogil=True)
def _rehash(table, shift, store_off, store_data, n):
    """Put names ``0 .. n-1`` into the empty ``table`` (their hashes recomputed from the stored bytes)."""
    mask = table.shape[0] - 1
    for idx in range(n):
        h = _fnv1a(store_data, store_off[idx], store_off[idx + 1])
        cell = _cell(h, shift)
        while table[cell] != _EMPTY:
            cell = (cell + 1) & mask
        table[cell] = (_tag(h) << 32) | idx


def _lookup(name: str, off: np.ndarray, data: np.ndarray, table: np.ndarray, shift: int, n: int) -> int | None:
    """Id below ``n`` of ``name`` in the hash table, or None (ids at or above ``n`` are stepped over)."""
    raw = np.frombuffer(name.encode("utf-8"), dtype=np.uint8)
    h = int(_fnv1a(raw, 0, raw.shape[0]))
    mask = table.shape[0] - 1
    cell = ((h * int(_GOLDEN)) & 0xFFFFFFFFFFFFFFFF) >> shift
    tag = h >> int(_TAG_SHIFT)
    while True:
        held = int(table[cell])  # one aligned 8-byte read: the cell as it was, whole
        if held == _EMPTY:
            return None
        idx = held & _ID_MASK
        if idx < n and held >> 32 == tag:
            a, b = off[idx], off[idx + 1]
            if bytes(data[a:b]) == raw.tobytes():
                return idx
        cell = (cell + 1) & mask


def _string_buffers(names: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(offsets int64, data uint8) of a string array, whatever its offset and offset width."""
    if isinstance(names, pa.ChunkedArray):
        names = names.combine_chunks()
    if not pa.types.is_large_string(names.type):
        names = names.cast(pa.large_string())
    if names.null_count:
        raise ValueError("node ids must not be null")
    _, off_buf, data_buf = names.buffers()
    offsets = np.frombuffer(off_buf, dtype=np.int64, count=len(names) + 1, offset=names.offset * 8)
    data = np.frombuffer(data_buf, dtype=np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
    return offsets, data


def _grow(array: np.ndarray, size: int) -> np.ndarray:
    out = np.zeros(max(size, 2 * array.shape[0]), dtype=array.dtype)
    out[: array.shape[0]] = array
    return out


class NodeIds:
    """Two-way map between node names (strings) and dense ids ``0 .. n-1``."""

    def __init__(self, names: pa.Array | list[str] | None = None) -> None:
        self._off = np.zeros(1024, dtype=np.int64)
        self._data = np.zeros(16 << 10, dtype=np.uint8)
        self._table = np.full(2048, _EMPTY, dtype=np.int64)
        self._shift = 64 - 11
        self._counters = np.zeros(2, dtype=np.int64)
        if names is not None and len(names):
            self.intern(names if isinstance(names, (pa.Array, pa.ChunkedArray)) else pa.array(names, pa.string()))

    def __len__(self) -> int:
        return int(self._counters[0])

    def _reserve(self, more_names: int, more_bytes: int) -> None:
        n, used = int(self._counters[0]), int(self._counters[1])
        if n + more_names + 1 > self._off.shape[0]:
            self._off = _grow(self._off, n + more_names + 1)
        if used + more_bytes > self._data.shape[0]:
            self._data = _grow(self._data, used + more_bytes)
        if 2 * (n + more_names) > self._table.shape[0]:
            bits = int(np.ceil(np.log2(2 * (n + more_names) + 1)))
            self._table = np.full(1 << bits, _EMPTY, dtype=np.int64)
            self._shift = 64 - bits
            _rehash(self._table, self._shift, self._off, self._data, n)

    def intern(self, names: pa.Array) -> np.ndarray:
        """Ids of ``names`` (an Arrow string array), adding unknown names."""
        offsets, data = _string_buffers(names)
        count = offsets.shape[0] - 1
        out = np.zeros(count, dtype=np.int32)
        if count == 0:
            return out
        self._reserve(count, int(offsets[-1] - offsets[0]))
        _intern(offsets, data, self._table, self._shift, self._off, self._data, self._counters, out)
        return out

    def lookup(self, name: str) -> int | None:
        """Id of ``name``, or None when it is unknown (adds nothing)."""
        return _lookup(name, self._off, self._data, self._table, self._shift, len(self))

    def name(self, idx: int) -> str:
        a, b = self._off[idx], self._off[idx + 1]
        return bytes(self._data[a:b]).decode("utf-8")

    def names(self) -> pa.Array:
        """All names in id order, as an Arrow string array (no per-name Python work)."""
        n, used = len(self), int(self._counters[1])
        large = pa.Array.from_buffers(
            pa.large_string(), n,
            [None, pa.py_buffer(self._off[: n + 1].copy()), pa.py_buffer(self._data[:used].copy())],
        )
        return large.cast(pa.string())

    def frozen(self) -> "FrozenIds":
        """A read-only view of the names held now, safe to read from another thread.

        See :class:`FrozenIds`: it costs no copy.
        """
        return FrozenIds(self._off, self._data, self._table, self._shift, len(self))

    def memory_bytes(self) -> int:
        return int(self._off.nbytes + self._data.nbytes + self._table.nbytes)


class FrozenIds:
    """The names ``0 .. n-1`` of a :class:`NodeIds` as they were when it was taken.

    It holds the arrays of the :class:`NodeIds` of that moment, not copies, and
    stays correct while the :class:`NodeIds` goes on interning in another
    thread, because interning only appends: entries below ``n`` (offsets,
    bytes) are never written again; a hash-table cell is written only while it
    is empty (-1), and only with an id >= ``n``, which a lookup here steps
    over as if it were a different name, so the probe sequence of a held name
    is the one it had; and growth (:meth:`NodeIds._reserve`) moves to new
    arrays, leaving these untouched. Aligned 8-byte cells are read whole.

    Parameters
    ----------
    off, data, table : arrays
        The :class:`NodeIds` buffers (see its module docstring).
    shift : int
        Hash shift of ``table``.
    n : int
        Names held.
    """

    def __init__(self, off: np.ndarray, data: np.ndarray, table: np.ndarray, shift: int, n: int) -> None:
        self._off, self._data, self._table = off, data, table
        self._shift = shift
        self.n = int(n)

    def __len__(self) -> int:
        return self.n

    def lookup(self, name: str) -> int | None:
        """Id of ``name``, or None when it was not held."""
        return _lookup(name, self._off, self._data, self._table, self._shift, self.n)

    def name(self, idx: int) -> str:
        """Name of id ``idx`` (below ``n``)."""
        if not 0 <= idx < self.n:
            raise IndexError(idx)
        a, b = self._off[idx], self._off[idx + 1]
        return bytes(self._data[a:b]).decode("utf-8")
