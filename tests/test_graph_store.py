"""The out-edge block store under heavy churn.

A million random inserts, deletes and re-weights on a small node set move
blocks to larger ones, free them, reuse them and compact the store again and
again. The ground truth is a plain dictionary of edges kept by this test;
afterwards the store must hold exactly that edge set with exact out-weights,
every node's block must be packed, and memory must stay bounded.
"""

from __future__ import annotations

import numpy as np
import pytest

import ranktide.solver.graph as graph_module
from ranktide.solver import OP_DELETE, OP_INSERT, Engine


def _model_apply(model: dict[tuple[int, int], float], op: np.ndarray, src: np.ndarray, dst: np.ndarray,
                 weight: np.ndarray) -> None:
    for o, u, v, w in zip(op.tolist(), src.tolist(), dst.tolist(), weight.tolist()):
        if o == OP_INSERT:
            model[(u, v)] = w
        else:
            model.pop((u, v), None)


def _check_store(engine: Engine, model: dict[tuple[int, int], float]) -> None:
    graph = engine.graph
    a = graph.arrays
    src, dst, w = graph.edge_list()
    assert dict(zip(zip(src.tolist(), dst.tolist()), w.tolist())) == model
    assert graph.n_edges == len(model)
    n = engine.n_nodes
    expected = np.zeros(n)
    for (u, _), x in model.items():
        expected[u] += x
    np.testing.assert_allclose(a.out_weight[:n], expected, rtol=1e-9, atol=1e-9)
    # packed blocks: a node's edges are exactly the first out_degree slots of its block
    for u in range(n):
        block = slice(int(a.start[u]), int(a.start[u]) + int(a.out_degree[u]))
        assert np.all(a.src[block] == u)
        assert int(a.out_degree[u]) <= int(a.cap[u])
    assert int(np.count_nonzero(a.src[: graph.top] >= 0)) == len(model)


@pytest.mark.parametrize("nodes,floor", [(40, 64), (400, 1 << 16)])
def test_a_million_random_events_leave_the_exact_edge_set(nodes: int, floor: int, monkeypatch) -> None:
    monkeypatch.setattr(graph_module, "COMPACT_FLOOR", floor)  # small: compactions happen often
    compactions = []
    original = graph_module.DynamicGraph.compact
    monkeypatch.setattr(graph_module.DynamicGraph, "compact",
                        lambda self: (compactions.append(self.top), original(self))[1])
    rng = np.random.default_rng(nodes)
    engine = Engine(node_capacity=4, edge_capacity=4)
    model: dict[tuple[int, int], float] = {}
    for _ in range(100):
        size = 10_000
        op = np.where(rng.random(size) < 0.55, OP_INSERT, OP_DELETE).astype(np.int8)
        # a few hubs get most events, so their blocks grow and move many times
        src = np.minimum(rng.pareto(1.0, size).astype(np.int64), nodes - 1).astype(np.int32)
        dst = rng.integers(0, nodes, size).astype(np.int32)
        weight = rng.choice([1.0, 0.5, 2.0, 3.25], size)
        engine.apply(op, src, dst, weight)
        _model_apply(model, op, src, dst, weight)
    _check_store(engine, model)
    if floor < 1000:
        assert len(compactions) >= 10
    # memory stays bounded by the live edges (compaction), not by the million events
    assert engine.graph.top <= max((1 + graph_module.COMPACT_SLACK) * len(model), floor) + 2 * nodes + 64
    assert engine.graph.arrays.src.shape[0] <= 4 * max(engine.graph.top, floor) + 1024


def test_scores_after_churn_match_a_fresh_build() -> None:
    """The engine on the churned store settles to the same scores as one built from the final edge set."""
    rng = np.random.default_rng(3)
    churned = Engine(rtol=None, tolerance=1e-10)
    model: dict[tuple[int, int], float] = {}
    for _ in range(30):
        size = 2_000
        op = np.where(rng.random(size) < 0.6, OP_INSERT, OP_DELETE).astype(np.int8)
        src = rng.integers(0, 300, size).astype(np.int32)
        dst = rng.integers(0, 300, size).astype(np.int32)
        weight = rng.choice([1.0, 2.0], size)
        churned.apply(op, src, dst, weight)
        churned.settle()
        _model_apply(model, op, src, dst, weight)
    _check_store(churned, model)
    fresh = Engine(rtol=None, tolerance=1e-10)
    pairs = np.array(sorted(model), dtype=np.int32).reshape(-1, 2)
    fresh.ensure_nodes(churned.n_nodes)
    fresh.apply(np.full(len(pairs), OP_INSERT, np.int8), pairs[:, 0], pairs[:, 1],
                np.array([model[tuple(p)] for p in pairs.tolist()]))
    fresh.settle()
    assert np.abs(churned.scores() - fresh.scores()).sum() <= 3e-10
