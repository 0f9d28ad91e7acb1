"""A dynamic, weighted, directed graph kept in flat arrays.

The graph is stored for two access patterns that the solver needs:

* *point updates*: ``insert`` sets the weight of ``u -> v``, ``delete`` removes
  it. An open-addressing hash table (linear probing) maps the pair ``(u, v)``
  to an *edge slot* in O(1) expected time. A cell holds only the slot number:
  a cell holding slot ``e`` is the pair ``(u, v)`` when ``e`` lies in ``u``'s
  block and ``dst[e] == v`` (blocks never overlap), so no source array is
  stored and a probe past another node's cell costs no memory access outside
  the table. A delete leaves a *tombstone* (the home cell of the other
  entries cannot be recomputed without their source); the table is rebuilt
  from the blocks when entries and tombstones pass :data:`MAX_LOAD`.
* *out-neighbour scans*: the out-edges of node ``u`` sit side by side in a
  *block* of slots, ``start[u] .. start[u] + out_degree[u] - 1``, with
  ``cap[u]`` slots reserved. A push reads them in one sequential run (a
  linked list of slots, the first design, cost a cache miss per edge). A
  delete moves the block's last edge into the hole, so blocks stay packed; an
  insert into a full block moves it to a block of the next power of two
  (amortised O(1)); a batch of many inserts first moves every block it would
  overflow to one sized for its final degree plus a quarter
  (:func:`solver.kernels.presize_blocks`), so a bulk insert packs like a bulk
  load; freed blocks wait in lists by size class and are reused; when slack
  passes :data:`COMPACT_SLACK` of the stored edges the whole store is
  rewritten in node order (:meth:`DynamicGraph.compact`).

Edge slots live in two parallel arrays (``dst``, ``weight``); a slot outside
every block's first ``out_degree`` slots holds nothing meaningful. A global
sweep reads the blocks node by node.

Memory per stored edge: 12 bytes per slot (a bulk load or bulk insert leaves
a quarter of slack, so about 15 bytes) plus 4 bytes per hash cell (at most
:data:`MAX_LOAD` of the cells used, at least 0.3 after a rebuild): about
21 to 29 bytes in all. :meth:`DynamicGraph.memory_bytes` counts the arrays'
capacity, not only the slots in use.

All mutation happens inside the compiled kernels of :mod:`solver.kernels`;
this module owns the arrays, their amortised growth and read-only views.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numba import njit

#: Largest share of hash cells holding an entry or a tombstone; above it the table is
#: rebuilt. Linear probing stays short below 0.7.
MAX_LOAD = 0.7
#: Largest load right after a rebuild: the table then takes at least ``MAX_LOAD - REHASH_LOAD``
#: of its cells in new entries or tombstones before the next rebuild (amortised O(1)).
#: 0.6 keeps 10M edges in 2**24 cells (0.5 would double the table at the large size).
REHASH_LOAD = 0.6
#: Slack (slots handed out to blocks but holding no edge) that triggers a compaction,
#: as a share of the stored edges; plus a floor so that small graphs never compact.
COMPACT_SLACK = 0.6
COMPACT_FLOOR = 1 << 16
_EMPTY = np.int32(-1)
#: A hash cell whose entry was deleted: probes go on past it, inserts may reuse it.
TOMBSTONE = -2
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


@njit(cache=True, inline="always")
def hash_home(u: int, v: int, shift: int) -> int:
    """Home cell of the pair ``(u, v)``: Fibonacci hashing of ``u << 32 | v``."""
    key = (np.uint64(u) << np.uint64(32)) | np.uint64(v)
    return np.int64((key * _GOLDEN) >> np.uint64(shift))


@njit(cache=True, nogil=True)
def compact_blocks(start, cap, out_degree, n, sizes, e_dst, e_w, new_dst, new_w, free_blocks, counters):
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
            new_dst[top + j] = e_dst[old + j]
            new_w[top + j] = e_w[old + j]
        top += sizes[u]
    free_blocks[:] = -1
    counters[0] = top


@njit(cache=True, nogil=True)
def rebuild_hash(table: np.ndarray, shift: int, start: np.ndarray, out_degree: np.ndarray, dst: np.ndarray,
                 n: int) -> None:
    """Fill an empty ``table`` with every live edge, walking the nodes' blocks."""
    mask = table.shape[0] - 1
    for u in range(n):
        first = start[u]
        for e in range(first, first + out_degree[u]):
            i = hash_home(u, dst[e], shift)
            while table[i] != -1:
                i = (i + 1) & mask
            table[i] = e


@njit(cache=True, nogil=True)
def gather_edges(start: np.ndarray, out_degree: np.ndarray, dst: np.ndarray, weight: np.ndarray, n: int):
    """Every live edge as ``(src, dst, weight)`` arrays, node by node in block order."""
    m = 0
    for u in range(n):
        m += out_degree[u]
    out_src = np.empty(m, np.int32)
    out_dst = np.empty(m, np.int32)
    out_w = np.empty(m, np.float64)
    i = 0
    for u in range(n):
        first = start[u]
        for e in range(first, first + out_degree[u]):
            out_src[i] = u
            out_dst[i] = dst[e]
            out_w[i] = weight[e]
            i += 1
    return out_src, out_dst, out_w


@njit(cache=True, nogil=True)
def slot_owners(start: np.ndarray, out_degree: np.ndarray, slots: int) -> np.ndarray:
    """Owner node of every slot holding an edge, -1 elsewhere (a check, not stored)."""
    owner = np.full(slots, -1, np.int32)
    for u in range(start.shape[0]):
        first = start[u]
        for e in range(first, first + out_degree[u]):
            owner[e] = u
    return owner


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
    dst : int32[edge_capacity]
        Target of the edge in each slot. The first slot of a free block links
        the next free block of its size class.
    weight : float64[edge_capacity]
        Weight of the edge in each slot.
    free_blocks : int32[32]
        First free block of each size class ``c`` (at least ``2**c`` slots), -1 if none.
    table : int32[2**bits]
        Hash cells holding slot numbers, -1 when empty, :data:`TOMBSTONE` when deleted.
    """

    out_weight: np.ndarray
    out_degree: np.ndarray
    start: np.ndarray
    cap: np.ndarray
    dst: np.ndarray
    weight: np.ndarray
    table: np.ndarray
    free_blocks: np.ndarray = field(default_factory=lambda: np.full(32, -1, dtype=np.int32))
    # scalars packed in one array so that kernels can update them in place:
    # [0] slots handed out to blocks (top), [1] tombstones in the hash table, [2] live edges,
    # [3] hash shift, [4] live edges whose weight is not 1 (0 lets sweeps skip reading the weights)
    counters: np.ndarray = field(default_factory=lambda: np.array([0, 0, 0, 0, 0], dtype=np.int64))

    @property
    def src(self) -> np.ndarray:
        """Source of the edge in each slot, -1 in a slot holding none.

        Derived from the blocks on each access (O(slots)), for checks and
        tests: the store itself keeps no source per slot.
        """
        return slot_owners(self.start, self.out_degree, self.dst.shape[0])


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
        bits = _table_bits(int(edge_capacity / REHASH_LOAD) + 1)
        self.arrays = GraphArrays(
            out_weight=np.zeros(node_capacity, dtype=np.float64),
            out_degree=np.zeros(node_capacity, dtype=np.int32),
            start=np.zeros(node_capacity, dtype=np.int32),
            cap=np.zeros(node_capacity, dtype=np.int32),
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
    def slot_capacity(self) -> int:
        """Slots allocated (handed out to blocks or not)."""
        return int(self.arrays.dst.shape[0])

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
        self.reserve_edges(n_new_edges, max(n_nodes - self.n_nodes, 0))
        self.n_nodes = max(self.n_nodes, n_nodes)
        return grew_nodes

    def reserve_edges(self, n_new_edges: int, n_new_nodes: int = 0) -> None:
        """Slots and hash cells for ``n_new_edges`` more edges (of which ``n_new_nodes`` start a block)."""
        # a bulk insert packs each block to its degree plus a quarter plus one slot
        # (presize_blocks); smaller batches mostly fill the blocks' slack. When a block
        # must move and no room is left, the kernels stop and Engine.apply grows the arrays.
        self.reserve_slots(n_new_edges + n_new_edges // 4 + n_new_nodes)
        self.reserve_cells(n_new_edges)

    def reserve_cells(self, n_new_edges: int) -> None:
        """Rebuild the hash table (larger, or just without tombstones) unless ``n_new_edges`` entries fit."""
        a = self.arrays
        if self.n_edges + int(a.counters[1]) + n_new_edges > MAX_LOAD * a.table.shape[0]:
            self._rehash(self.n_edges + n_new_edges)

    def reserve_slots(self, slots: int) -> None:
        """Make ``slots`` more slots available at the tail of the slot arrays."""
        a = self.arrays
        if self.top + slots > a.dst.shape[0]:
            self._grow_edges(max(self.top + slots, a.dst.shape[0] + a.dst.shape[0] // 4))

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
        a.dst = _grown(a.dst, size, -1)
        a.weight = _grown(a.weight, size, 0.0)

    def needs_compaction(self) -> bool:
        """Slack passed :data:`COMPACT_SLACK` of the stored edges (and the floor)."""
        top, _, edges = self.arrays.counters[:3].tolist()
        return top - edges > max(COMPACT_SLACK * edges, COMPACT_FLOOR)

    def compact(self) -> None:
        """Rewrite every block in node order with a quarter of slack; rebuild the hash table (O(edges))."""
        a = self.arrays
        sizes = self.slots_for(a.out_degree[: self.n_nodes].astype(np.int64))
        size = max(int(sizes.sum()) + int(sizes.sum()) // 4, 16)
        dst = np.full(size, _EMPTY, dtype=np.int32)
        weight = np.zeros(size, dtype=np.float64)
        compact_blocks(a.start, a.cap, a.out_degree, self.n_nodes, sizes, a.dst, a.weight, dst, weight,
                       a.free_blocks, a.counters)
        a.dst, a.weight = dst, weight
        self._rehash(self.n_edges)

    def _rehash(self, n_edges: int) -> None:
        """A new table with at most :data:`REHASH_LOAD` of its cells used by ``n_edges`` entries."""
        a = self.arrays
        bits = _table_bits(int(n_edges / REHASH_LOAD) + 1)
        a.table = np.full(1 << bits, _EMPTY, dtype=np.int32)
        a.counters[3] = 64 - bits
        a.counters[1] = 0
        rebuild_hash(a.table, int(a.counters[3]), a.start, a.out_degree, a.dst, self.n_nodes)

    # ------------------------------------------------------------------ views
    def edge_list(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Live edges as ``(src, dst, weight)`` arrays, node by node (sources ascending)."""
        a = self.arrays
        return gather_edges(a.start, a.out_degree, a.dst, a.weight, self.n_nodes)

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
        parts = (a.out_weight, a.out_degree, a.start, a.cap, a.dst, a.weight, a.table, a.free_blocks, a.counters)
        return int(sum(x.nbytes for x in parts))

    def edge_memory_bytes(self) -> int:
        """Bytes of the per-edge arrays (slot arrays at their capacity, and hash cells)."""
        a = self.arrays
        return int(sum(x.nbytes for x in (a.dst, a.weight, a.table)))


def _table_bits(cells: int) -> int:
    return max(4, int(np.ceil(np.log2(max(cells, 16)))))
