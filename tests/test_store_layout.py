"""Layout of the out-edge store: bulk inserts pack blocks, tombstones stay counted, memory is what is allocated.

The ground truth is a plain dictionary of edges kept by each test (as in
``test_graph_store.py``); the memory checks compare ``memory_bytes`` with the
arrays' own ``nbytes``.
"""

from __future__ import annotations

import numpy as np
import pytest

from ranktide.solver import OP_DELETE, OP_INSERT, Engine
from ranktide.solver.graph import MAX_LOAD, TOMBSTONE


def _random_edges(n: int, m: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    keys = np.unique(rng.integers(0, n, 3 * m) * n + rng.integers(0, n, 3 * m))[:m]
    rng.shuffle(keys)
    return (keys // n).astype(np.int32), (keys % n).astype(np.int32)


def test_a_bulk_insert_through_apply_packs_blocks_like_a_restore() -> None:
    src, dst = _random_edges(2_000, 30_000, 1)
    weight = np.random.default_rng(2).choice([1.0, 2.5], src.size)
    applied = Engine()
    applied.ensure_nodes(2_000, src.size)
    applied.apply(np.zeros(src.size, np.int8), src, dst, weight)
    restored = Engine()
    restored.restore(2_000, (src, dst, weight), {"global": np.zeros(2_000)}, {})
    degree = np.bincount(src, minlength=2_000)
    packed = int((degree + degree // 4 + (degree > 0)).sum())
    assert applied.graph.top == restored.graph.top == packed
    # reserved: a quarter of slack per new edge and one slot per new node, nothing more
    assert packed <= applied.graph.slot_capacity <= src.size + src.size // 4 + 2_000
    got = applied.graph.edge_list()
    assert dict(zip(zip(got[0].tolist(), got[1].tolist()), got[2].tolist())) == \
        dict(zip(zip(src.tolist(), dst.tolist()), weight.tolist()))
    np.testing.assert_array_equal(applied.graph.arrays.out_degree[:2_000], degree)


def test_memory_bytes_counts_the_allocated_arrays() -> None:
    eng = Engine()
    src, dst = _random_edges(500, 5_000, 3)
    eng.apply(np.zeros(src.size, np.int8), src, dst, np.ones(src.size))
    a = eng.graph.arrays
    assert eng.memory_bytes()["edges"] == a.dst.nbytes + a.weight.nbytes + a.table.nbytes
    assert a.dst.shape[0] == a.weight.shape[0] >= eng.graph.top
    # 12 bytes a slot, 4 a hash cell; a bulk insert keeps it well under 40 bytes an edge
    assert eng.memory_bytes()["edges"] / eng.n_edges < 32


def test_tombstones_are_counted_and_the_table_stays_bounded() -> None:
    rng = np.random.default_rng(4)
    eng = Engine(node_capacity=16, edge_capacity=16)
    model: dict[tuple[int, int], float] = {}
    for _ in range(60):
        size = 3_000
        op = np.where(rng.random(size) < 0.5, OP_INSERT, OP_DELETE).astype(np.int8)
        src = rng.integers(0, 60, size).astype(np.int32)
        dst = rng.integers(0, 60, size).astype(np.int32)
        eng.apply(op, src, dst, np.ones(size))
        for o, u, v in zip(op.tolist(), src.tolist(), dst.tolist()):
            if o == OP_INSERT:
                model[(u, v)] = 1.0
            else:
                model.pop((u, v), None)
        table = eng.graph.arrays.table
        assert int(np.count_nonzero(table == TOMBSTONE)) == int(eng.graph.arrays.counters[1])
        assert int(np.count_nonzero(table >= 0)) == eng.n_edges == len(model)
        assert int(np.count_nonzero(table != -1)) <= MAX_LOAD * table.size
    got = eng.graph.edge_list()
    assert set(zip(got[0].tolist(), got[1].tolist())) == set(model)


@pytest.mark.parametrize("src,dst", [(-1, 2), (2, -3)])
def test_a_negative_node_id_is_refused_and_nothing_is_applied(src: int, dst: int) -> None:
    eng = Engine()
    eng.apply(np.array([OP_INSERT], np.int8), np.array([0], np.int32), np.array([1], np.int32), np.ones(1))
    op = np.array([OP_INSERT, OP_INSERT], np.int8)
    with pytest.raises(ValueError, match="event 1: negative node id"):
        eng.apply(op, np.array([3, src], np.int32), np.array([4, dst], np.int32), np.ones(2))
    assert eng.n_edges == 1
