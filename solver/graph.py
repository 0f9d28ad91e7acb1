"""A dynamic, weighted, directed graph kept in flat arrays.

The graph is stored for two access patterns that the solver needs:

* *point updates*: ``insert`` sets the weight of ``u -> v``, ``delete`` removes
  it. An open-addressing hash table (linear probing, backward-shift deletion,
  so no tombstones) maps the pair ``(u, v)`` to an *edge slot* in O(1)
  expected time.
* *out-neighbour scans*: the out-edges of node ``u`` sit side by side in a
  *block* of slots, ``start[u] .. start[u] + out_degree[u] - 1``, with
  ``cap[u]`` slots reserved. A push reads them in one sequential run (a
  linked list of slots, the first design, cost a cache miss per edge). A
  delete moves the block's last edge into the hole, so blocks stay packed; an
  insert into a full block moves it to a block twice as large (amortised
  O(1)); freed blocks wait in lists by size class and are reused; when slack
  passes :data:`COMPACT_SLACK` of the stored edges the whole store is rewritten
  in node order (:meth:`DynamicGraph.compact`).

Edge slots live in parallel arrays (``src``, ``dst``, ``weight``); every slot
not holding an edge has ``src = -1``. A global sweep reads the slot arrays
front to back, which needs no compressed-row copy of the graph.

Memory per stored edge: 16 bytes of slot arrays times the blocks' fill (a
bulk load leaves a quarter of slack) plus 4 bytes per hash cell (load factor
kept between 0.35 and 0.7): about 26 to 36 bytes in all.

All mutation happens inside the compiled kernels of :mod:`solver.kernels`;
this module owns the arrays, their amortised growth and read-only views.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numba import njit

#: Largest hash-table load before it doubles. Linear probing stays short below 0.7.
MAX_LOAD = 0.7
#: Slack (slots handed out to blocks but holding no edge) that triggers a compaction,
#: as a share of the stored edges; plus a floor so that small graphs never compact.
COMPACT_SLACK = 0.6
COMPACT_FLOOR = 1 << 16
_EMPTY = np.int32(-1)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


@njit(cache=True, inline="always")
def hash_home(u: int, v: int, shift: int) -> int:
    """Home cell of the pair ``(u, v)``: Fibonacci hashing of ``u << 32 | v``."""
    key = (np.uint64(u) << np.uint64(32)) | np.uint64(v)
    return np.int64((key * _GOLDEN) >> np.uint64(shift))


@njit(cache=True, nogil=True)
def compact_blocks(start, cap, out_degree, n, sizes, e_dst, e_w, new_src, new_dst, new_w, free_blocks, counters):
    """Copy every node's out-edges into blocks of ``sizes[u]`` slots, in node order, in the ``new_`` arrays.

    Drops the slack that relocations and deletions leave; the caller swaps the
    arrays in and rebuilds the hash table.
    """
    top = 0
    for u in range(n):
        deg = out_degree[u]
        old = start[u]
        start[u] = top
        cap[u] = sizes[u]
        for j in range(deg):
            new_src[top + j] = u
            new_dst[top + j] = e_dst[old + j]
            new_w[top + j] = e_w[old + j]
        top += sizes[u]
    free_blocks[:] = -1
    counters[0] = top


@njit(cache=True, nogil=True)
def rebuild_hash(table: np.ndarray, shift: int, src: np.ndarray, dst: np.ndarray, top: int) -> None:
    """Fill an empty ``table`` with every live slot below ``top``."""
    mask = table.shape[0] - 1
    for e in range(top):
        if src[e] < 0:
            continue
        i = hash_home(src[e], dst[e], shift)
        while table[i] != -1:
            i = (i + 1) & mask
        table[i] = e


@dataclass
class GraphArrays:
    """The arrays of a :class:`DynamicGraph`; passed as a whole to the kernels.

    Attributes
    ----------
    out_weight : float64[node_capacity]
        Sum of out-edge weights ``W(u)``; 0 for a dangling node.
    out_degree : int32[node_capacity]
        Number of out-edges.
    start, cap : int32[node_capacity]
        First slot and size of each node's block (``cap`` 0: no block).
    src, dst : int32[edge_capacity]
        Slot arrays; ``src == -1`` in a slot holding no edge. The first slot of
        a free block links the next free block of its size class in ``dst``.
    weight : float64[edge_capacity]
        Weight of the edge in each slot.
    free_blocks : int32[32]
        First free block of each size class ``c`` (at least ``2**c`` slots), -1 if none.
    table : int32[2**bits]
        Hash cells holding slot numbers, -1 when empty.
    """

    out_weight: np.ndarray
    out_degree: np.ndarray
    start: np.ndarray
    cap: np.ndarray
    src: np.ndarray
    dst: np.ndarray
    weight: np.ndarray
    table: np.ndarray
    free_blocks: np.ndarray = field(default_factory=lambda: np.full(32, -1, dtype=np.int32))
    # scalars packed in one array so that kernels can update them in place:
    # [0] slots handed out to blocks (top), [1] unused, [2] live edges, [3] hash shift,
    # [4] live edges whose weight is not 1 (0 lets sweeps skip reading the weights)
    counters: np.ndarray = field(default_factory=lambda: np.array([0, -1, 0, 0, 0], dtype=np.int64))


def _grown(array: np.ndarray, size: int, fill: float | int) -> np.ndarray:
    out = np.full(size, fill, dtype=array.dtype)
    out[: array.shape[0]] = array
    return out


class DynamicGraph:
    """Owner of the graph arrays, with amortised growth.

    Parameters
    ----------
    node_capacity, edge_capacity : int
        Initial sizes; both grow by doubling (nodes) or by a quarter (edges)
        when a batch needs more room.
    """

    def __init__(self, node_capacity: int = 1024, edge_capacity: int = 4096) -> None:
        node_capacity = max(int(node_capacity), 16)
        edge_capacity = max(int(edge_capacity), 16)
        bits = _table_bits(int(edge_capacity / MAX_LOAD) + 1)
        self.arrays = GraphArrays(
            out_weight=np.zeros(node_capacity, dtype=np.float64),
            out_degree=np.zeros(node_capacity, dtype=np.int32),
            start=np.zeros(node_capacity, dtype=np.int32),
            cap=np.zeros(node_capacity, dtype=np.int32),
            src=np.full(edge_capacity, _EMPTY, dtype=np.int32),
            dst=np.full(edge_capacity, _EMPTY, dtype=np.int32),
            weight=np.zeros(edge_capacity, dtype=np.float64),
            table=np.full(1 << bits, _EMPTY, dtype=np.int32),
        )
        self.arrays.counters[3] = 64 - bits
        self.n_nodes = 0

    # ------------------------------------------------------------------ sizes
    @property
    def n_edges(self) -> int:
        """Number of stored (live) edges."""
        return int(self.arrays.counters[2])

    @property
    def unit_weights(self) -> bool:
        """True when every live edge has weight 1 (an unweighted graph)."""
        return int(self.arrays.counters[4]) == 0

    @property
    def node_capacity(self) -> int:
        return int(self.arrays.start.shape[0])

    @property
    def top(self) -> int:
        """Slots handed out to blocks so far (live edges plus slack)."""
        return int(self.arrays.counters[0])

    def reserve(self, n_nodes: int, n_new_edges: int) -> bool:
        """Make room for ``n_nodes`` nodes and ``n_new_edges`` more edges.

        Returns True when the node arrays were reallocated (callers that keep
        per-node arrays of their own grow them too).
        """
        grew_nodes = False
        if n_nodes > self.node_capacity:
            self._grow_nodes(max(n_nodes, 2 * self.node_capacity))
            grew_nodes = True
        a = self.arrays
        # new edges mostly go into the blocks' slack or into doubled blocks: room for two
        # slots each at the tail covers the usual case; the kernels report the rest
        self.reserve_slots(2 * n_new_edges)
        if (self.n_edges + n_new_edges) > MAX_LOAD * a.table.shape[0]:
            self._rehash(self.n_edges + n_new_edges)
        self.n_nodes = max(self.n_nodes, n_nodes)
        return grew_nodes

    def reserve_slots(self, slots: int) -> None:
        """Make ``slots`` more slots available at the tail of the slot arrays."""
        a = self.arrays
        if self.top + slots > a.src.shape[0]:
            self._grow_edges(max(self.top + slots, a.src.shape[0] + a.src.shape[0] // 4))

    def slots_for(self, degree: np.ndarray) -> np.ndarray:
        """Block sizes of a bulk load or compaction: the degree plus a quarter, at least 1 for a source."""
        return degree + degree // 4 + (degree > 0)

    def _grow_nodes(self, size: int) -> None:
        a = self.arrays
        a.out_weight = _grown(a.out_weight, size, 0.0)
        a.out_degree = _grown(a.out_degree, size, 0)
        a.start = _grown(a.start, size, 0)
        a.cap = _grown(a.cap, size, 0)

    def _grow_edges(self, size: int) -> None:
        a = self.arrays
        a.src = _grown(a.src, size, -1)
        a.dst = _grown(a.dst, size, -1)
        a.weight = _grown(a.weight, size, 0.0)

    def needs_compaction(self) -> bool:
        """Slack passed :data:`COMPACT_SLACK` of the stored edges (and the floor)."""
        return self.top - self.n_edges > max(COMPACT_SLACK * self.n_edges, COMPACT_FLOOR)

    def compact(self) -> None:
        """Rewrite every block in node order with a quarter of slack; rebuild the hash table (O(edges))."""
        a = self.arrays
        sizes = self.slots_for(a.out_degree[: self.n_nodes].astype(np.int64))
        size = max(int(sizes.sum()) + int(sizes.sum()) // 4, 16)
        src = np.full(size, _EMPTY, dtype=np.int32)
        dst = np.full(size, _EMPTY, dtype=np.int32)
        weight = np.zeros(size, dtype=np.float64)
        compact_blocks(a.start, a.cap, a.out_degree, self.n_nodes, sizes, a.dst, a.weight, src, dst, weight,
                       a.free_blocks, a.counters)
        a.src, a.dst, a.weight = src, dst, weight
        self._rehash(self.n_edges)

    def _rehash(self, n_edges: int) -> None:
        a = self.arrays
        bits = _table_bits(int(n_edges / MAX_LOAD) + 1)
        a.table = np.full(1 << bits, _EMPTY, dtype=np.int32)
        a.counters[3] = 64 - bits
        rebuild_hash(a.table, int(a.counters[3]), a.src, a.dst, self.top)

    # ------------------------------------------------------------------ views
    def edge_list(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Live edges as ``(src, dst, weight)`` arrays, in slot order."""
        a = self.arrays
        top = int(a.counters[0])
        live = a.src[:top] >= 0
        return a.src[:top][live].copy(), a.dst[:top][live].copy(), a.weight[:top][live].copy()

    def exact_out_weight(self) -> np.ndarray:
        """Out-weights summed afresh from the edges (removes rounding drift)."""
        src, _, w = self.edge_list()
        return np.bincount(src, weights=w, minlength=self.n_nodes)[: self.n_nodes]

    def transition_transpose(self):
        """``P^T`` as a SciPy CSR matrix (see :func:`solver.exact.transition_transpose`)."""
        from .exact import transition_transpose

        src, dst, w = self.edge_list()
        return transition_transpose(src, dst, w, self.n_nodes)

    def memory_bytes(self) -> int:
        """Bytes held by the graph arrays (capacity included)."""
        a = self.arrays
        parts = (a.out_weight, a.out_degree, a.start, a.cap, a.src, a.dst, a.weight, a.table)
        return int(sum(x.nbytes for x in parts))

    def edge_memory_bytes(self) -> int:
        """Bytes of the per-edge arrays (slots and hash cells)."""
        a = self.arrays
        return int(sum(x.nbytes for x in (a.src, a.dst, a.weight, a.table)))


def _table_bits(cells: int) -> int:
    return max(4, int(np.ceil(np.log2(max(cells, 16)))))
