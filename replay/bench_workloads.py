"""Workloads of ``ranktide bench``: the generated graph, its bulk load and the update batches.

The edge set mirrors the engine's present edges outside the timed regions, so
that batches of mixed events (80 % inserts of new edges drawn like the graph's,
20 % deletes of present ones) can be drawn without asking the engine.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ranktide.replay.graphs import PowerLawSampler, pair_keys, power_law_digraph
from ranktide.replay.bench_common import (
    DAMPING, INSERT_SHARE, LOAD_TOL, SIZES, TOLERANCE, _peak_rss_bytes, _timed,
)
from ranktide.solver import OP_DELETE, OP_INSERT, OP_SEED, Engine


# ====================================================================== the edge set


class EdgeSet:
    """Sorted keys of the engine's present edges, kept in step outside the timed regions.

    Parameters
    ----------
    src, dst : int arrays
        Present edges.
    n : int
        Number of nodes (keys are ``src * n + dst``).
    """

    def __init__(self, src: np.ndarray, dst: np.ndarray, n: int) -> None:
        self.n = int(n)
        self.keys = np.sort(pair_keys(src, dst, n))

    def contains(self, keys: np.ndarray) -> np.ndarray:
        """Membership of each key (vectorised binary search)."""
        pos = np.searchsorted(self.keys, keys)
        pos = np.minimum(pos, max(self.keys.size - 1, 0))
        return (self.keys.size > 0) & (self.keys[pos] == keys)

    def update(self, inserted: np.ndarray, deleted: np.ndarray) -> None:
        """Add ``inserted`` (absent) keys and drop ``deleted`` (present) ones."""
        if deleted.size:
            self.keys = np.delete(self.keys, np.searchsorted(self.keys, deleted))
        if inserted.size:
            ins = np.sort(inserted)
            self.keys = np.insert(self.keys, np.searchsorted(self.keys, ins), ins)


# ====================================================================== event batches


@dataclass
class Batch:
    """One batch of edge events as engine columns, plus its keys for the edge set."""

    op: np.ndarray
    src: np.ndarray
    dst: np.ndarray
    weight: np.ndarray
    inserted: np.ndarray
    deleted: np.ndarray

    def __len__(self) -> int:
        return int(self.op.size)


def new_edges(count: int, edges: EdgeSet, sampler: PowerLawSampler, rng: np.random.Generator) -> np.ndarray:
    """Keys of ``count`` distinct edges that are not present, drawn like the graph's edges."""
    found = np.zeros(0, dtype=np.int64)
    while found.size < count:
        src, dst = sampler.pairs(2 * (count - found.size) + 16, rng)
        keys = pair_keys(src, dst, edges.n)
        keys = keys[~edges.contains(keys)]
        keys = np.concatenate([found, keys])
        _, first = np.unique(keys, return_index=True)
        found = keys[np.sort(first)]
    return found[:count]


def mixed_batch(size: int, edges: EdgeSet, sampler: PowerLawSampler, rng: np.random.Generator) -> Batch:
    """``size`` shuffled events: 80 % inserts of new edges (weight 1), 20 % deletes of present edges.

    Deletes are sampled from the present edges (the edge set mirrors
    ``Engine.graph.edge_list()``).
    """
    n_ins = int(round(INSERT_SHARE * size))
    n_del = min(size - n_ins, edges.keys.size)
    ins = new_edges(n_ins, edges, sampler, rng)
    dele = edges.keys[rng.choice(edges.keys.size, size=n_del, replace=False)] if n_del else np.zeros(0, np.int64)
    keys = np.concatenate([ins, dele])
    op = np.concatenate([np.full(n_ins, OP_INSERT, np.int8), np.full(n_del, OP_DELETE, np.int8)])
    order = rng.permutation(keys.size)
    keys, op = keys[order], op[order]
    return Batch(op, (keys // edges.n).astype(np.int32), (keys % edges.n).astype(np.int32),
                 np.ones(keys.size), ins, dele)


# ====================================================================== loading


@dataclass
class Loaded:
    """A bulk-loaded engine and what the load cost."""

    engine: Engine
    edges: EdgeSet
    sampler: PowerLawSampler
    info: dict


def warm_up_kernels() -> float:
    """Compile (or load from cache) every kernel on a small graph, so no timing includes it."""
    started = time.perf_counter()
    src, dst, sampler = power_law_digraph(500, 4_000, seed=12345)
    eng = Engine(DAMPING, rtol=None, tolerance=TOLERANCE)
    eng.ensure_nodes(500, src.size)
    eng.apply(np.zeros(src.size, np.int8), src, dst, np.ones(src.size))
    eng.resolve(LOAD_TOL, warm=False)
    edges = EdgeSet(src, dst, 500)
    rng = np.random.default_rng(1)
    for size in (10, 2_000):
        b = mixed_batch(size, edges, sampler, rng)
        eng.apply(b.op, b.src, b.dst, b.weight)
        eng.settle()
        edges.update(b.inserted, b.deleted)
    row = eng.add_profile("warm-up")
    eng.apply(np.full(3, OP_SEED, np.int8), np.arange(3), np.full(3, row), np.ones(3))
    eng.settle()
    eng.recompute_residual()
    eng.set_targets(rtol=1e-3, tolerance=None)  # the kernels of the per-node contract
    for size in (10, 2_000):
        b = mixed_batch(size, edges, sampler, rng)
        eng.apply(b.op, b.src, b.dst, b.weight)
        eng.settle()
        edges.update(b.inserted, b.deleted)
    eng.certificate("warm-up")
    copy_of = Engine(DAMPING, rtol=None, tolerance=TOLERANCE)  # the bulk load of a restore
    copy_of.restore(eng.n_nodes, eng.graph.edge_list(), {p: eng.P[eng.profile_index(p), : eng.n_nodes]
                                                          for p in eng.profiles},
                    {p: eng.teleport_vector(p) for p in eng.profiles})
    return time.perf_counter() - started


def load_graph(n: int, src: np.ndarray, dst: np.ndarray, weight: np.ndarray, sampler: PowerLawSampler) -> Loaded:
    """Bulk load (``ensure_nodes`` + one ``apply`` of inserts on ``p = 0``), then solve to 1e-9 cold."""
    eng = Engine(DAMPING, rtol=None, tolerance=TOLERANCE)

    def load() -> None:
        eng.ensure_nodes(n, int(src.size))
        eng.apply(np.zeros(src.size, np.int8), src, dst, weight)

    _, load_s = _timed(load)
    iterations, resolve_s = _timed(lambda: eng.resolve(LOAD_TOL, warm=False))
    info = {
        "nodes": eng.n_nodes, "edges": eng.n_edges,
        "load_seconds": load_s, "load_edges_per_second": eng.n_edges / load_s,
        "resolve_seconds": resolve_s, "resolve_iterations": int(iterations), "resolve_tolerance": LOAD_TOL,
        "bytes_per_edge": eng.memory_bytes()["edges"] / max(eng.n_edges, 1),
        "memory_bytes": eng.memory_bytes(),
        "peak_rss_bytes_after_load": _peak_rss_bytes(),
        "certified_bound_after_load": eng.certified_bound(),
    }
    return Loaded(eng, EdgeSet(src, dst, n), sampler, info)


# ====================================================================== one generated size


def generated(size: str, seed: int) -> tuple[np.ndarray, np.ndarray, PowerLawSampler, dict]:
    """The generated graph of ``size`` and how it was made."""
    n, m = SIZES[size]
    (src, dst, sampler), gen_s = _timed(lambda: power_law_digraph(n, m, seed))
    info = {"size": size, "model": "Chung-Lu power-law digraph, Pareto out- and in-weights, duplicates removed",
            "out_exponent": 2.4, "in_exponent": 2.1, "nodes": n, "edges": int(src.size),
            "dangling_share": float(np.mean(np.bincount(src, minlength=n) == 0)),
            "generate_seconds": gen_s, "seed": seed}
    return src, dst, sampler, info
