"""Interning of string node ids to dense integers."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc


class NodeIds:
    """Two-way map between node names (strings) and dense ids ``0 .. n-1``.

    Ids are handed out in order of first appearance, so replaying the same
    events always gives the same ids.
    """

    def __init__(self, names: list[str] | None = None) -> None:
        self._names: list[str] = []
        self._index: dict[str, int] = {}
        for name in names or []:
            self._add(name)

    def __len__(self) -> int:
        return len(self._names)

    def _add(self, name: str) -> int:
        idx = self._index.get(name)
        if idx is None:
            idx = len(self._names)
            self._index[name] = idx
            self._names.append(name)
        return idx

    def intern(self, names: pa.Array) -> np.ndarray:
        """Ids of ``names`` (a pyarrow string array), adding unknown names.

        Works per distinct name, not per element: the array is
        dictionary-encoded by Arrow first.
        """
        if len(names) == 0:
            return np.zeros(0, dtype=np.int32)
        encoded = pc.dictionary_encode(names)
        if isinstance(encoded, pa.ChunkedArray):
            encoded = encoded.combine_chunks()
        distinct = encoded.dictionary.to_pylist()
        codes = np.fromiter((self._add(x) for x in distinct), dtype=np.int32, count=len(distinct))
        return codes[encoded.indices.to_numpy(zero_copy_only=False)]

    def lookup(self, name: str) -> int | None:
        """Id of ``name``, or None when it is unknown."""
        return self._index.get(name)

    def name(self, idx: int) -> str:
        return self._names[idx]

    def names(self) -> pa.Array:
        """All names in id order, as a pyarrow string array."""
        return pa.array(self._names, type=pa.string())
