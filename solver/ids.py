"""Interning of string node ids to dense integers, compiled.

Names are kept as UTF-8 bytes in one growing buffer with an offsets array
(the layout of an Arrow string column), and an open-addressing hash table
(FNV-1a hash, linear probing) maps them to ids. :meth:`NodeIds.intern`
reads the buffers of an Arrow string array directly, so a batch of events is
interned in one compiled pass with no Python object per element. Ids are
handed out in order of first appearance: the same events always give the
same ids.

Memory per node: its name's bytes plus 8 (offset) + 8 (hash) + about 8
(hash-table cells at load <= 0.5) bytes.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
from numba import njit

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


@njit(cache=True, nogil=True)
def _intern(offsets, data, table, shift, store_off, store_data, hashes, counters, out):
    """Ids of the strings ``data[offsets[i]:offsets[i+1]]``, adding new ones.

    ``counters``: [0] names held, [1] bytes used. Room must have been made.
    """
    mask = table.shape[0] - 1
    for i in range(offsets.shape[0] - 1):
        a = offsets[i]
        b = offsets[i + 1]
        h = _fnv1a(data, a, b)
        cell = np.int64((h * _GOLDEN) >> np.uint64(shift))
        while True:
            idx = table[cell]
            if idx == -1:
                idx = counters[0]
                used = counters[1]
                for j in range(b - a):
                    store_data[used + j] = data[a + j]
                store_off[idx + 1] = used + (b - a)
                hashes[idx] = h
                counters[0] = idx + 1
                counters[1] = used + (b - a)
                table[cell] = idx
                break
            if hashes[idx] == h and _same(store_data, store_off[idx], store_off[idx + 1], data, a, b):
                break
            cell = (cell + 1) & mask
        out[i] = idx


@njit(cache=True, nogil=True)
def _rehash(table, shift, hashes, n):
    mask = table.shape[0] - 1
    for idx in range(n):
        cell = np.int64((hashes[idx] * _GOLDEN) >> np.uint64(shift))
        while table[cell] != -1:
            cell = (cell + 1) & mask
        table[cell] = idx


def _lookup(name: str, off: np.ndarray, data: np.ndarray, hashes: np.ndarray, table: np.ndarray, shift: int,
            n: int) -> int | None:
    """Id below ``n`` of ``name`` in the hash table, or None (ids at or above ``n`` are stepped over)."""
    raw = np.frombuffer(name.encode("utf-8"), dtype=np.uint8)
    h = _fnv1a(raw, 0, raw.shape[0])
    mask = table.shape[0] - 1
    cell = ((int(h) * int(_GOLDEN)) & 0xFFFFFFFFFFFFFFFF) >> shift
    while True:
        idx = int(table[cell])
        if idx == -1:
            return None
        if idx < n:
            a, b = off[idx], off[idx + 1]
            if hashes[idx] == h and bytes(data[a:b]) == raw.tobytes():
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
        self._hashes = np.zeros(1024, dtype=np.uint64)
        self._table = np.full(2048, -1, dtype=np.int32)
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
            self._hashes = _grow(self._hashes, n + more_names + 1)
        if used + more_bytes > self._data.shape[0]:
            self._data = _grow(self._data, used + more_bytes)
        if 2 * (n + more_names) > self._table.shape[0]:
            bits = int(np.ceil(np.log2(2 * (n + more_names) + 1)))
            self._table = np.full(1 << bits, -1, dtype=np.int32)
            self._shift = 64 - bits
            _rehash(self._table, self._shift, self._hashes, n)

    def intern(self, names: pa.Array) -> np.ndarray:
        """Ids of ``names`` (an Arrow string array), adding unknown names."""
        offsets, data = _string_buffers(names)
        count = offsets.shape[0] - 1
        out = np.zeros(count, dtype=np.int32)
        if count == 0:
            return out
        self._reserve(count, int(offsets[-1] - offsets[0]))
        _intern(offsets, data, self._table, self._shift, self._off, self._data, self._hashes, self._counters, out)
        return out

    def lookup(self, name: str) -> int | None:
        """Id of ``name``, or None when it is unknown (adds nothing)."""
        return _lookup(name, self._off, self._data, self._hashes, self._table, self._shift, len(self))

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
        return FrozenIds(self._off, self._data, self._hashes, self._table, self._shift, len(self))

    def memory_bytes(self) -> int:
        return int(self._off.nbytes + self._data.nbytes + self._hashes.nbytes + self._table.nbytes)


class FrozenIds:
    """The names ``0 .. n-1`` of a :class:`NodeIds` as they were when it was taken.

    It holds the arrays of the :class:`NodeIds` of that moment, not copies, and
    stays correct while the :class:`NodeIds` goes on interning in another
    thread, because interning only appends: entries below ``n`` (offsets,
    bytes, hashes) are never written again; a hash-table cell is written only
    while it is empty (-1), and only with an id >= ``n``, which a lookup here
    steps over as if it were a different name, so the probe sequence of a held
    name is the one it had; and growth (:meth:`NodeIds._reserve`) moves to new
    arrays, leaving these untouched. Aligned 4-byte cells are read whole.

    Parameters
    ----------
    off, data, hashes, table : arrays
        The :class:`NodeIds` buffers (see its module docstring).
    shift : int
        Hash shift of ``table``.
    n : int
        Names held.
    """

    def __init__(self, off: np.ndarray, data: np.ndarray, hashes: np.ndarray, table: np.ndarray,
                 shift: int, n: int) -> None:
        self._off, self._data, self._hashes, self._table = off, data, hashes, table
        self._shift = shift
        self.n = int(n)

    def __len__(self) -> int:
        return self.n

    def lookup(self, name: str) -> int | None:
        """Id of ``name``, or None when it was not held."""
        return _lookup(name, self._off, self._data, self._hashes, self._table, self._shift, self.n)

    def name(self, idx: int) -> str:
        """Name of id ``idx`` (below ``n``)."""
        if not 0 <= idx < self.n:
            raise IndexError(idx)
        a, b = self._off[idx], self._off[idx + 1]
        return bytes(self._data[a:b]).decode("utf-8")
