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


def _member(sorted_keys: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """Membership of each of ``keys`` in the sorted array ``sorted_keys`` (vectorised binary search)."""
    if sorted_keys.size == 0:
        return np.zeros(keys.shape, dtype=bool)
    pos = np.minimum(np.searchsorted(sorted_keys, keys), sorted_keys.size - 1)
    return sorted_keys[pos] == keys


class EdgeSet:
    """Keys of the engine's present edges, kept in step outside the timed regions.

    A sorted base array plus two small sorted arrays of keys added and removed
    since the last merge: an update costs a few binary searches, not a copy
    of the base (16 MB at medium size), which would evict the engine's arrays
    from the caches between timed steps.

    Parameters
    ----------
    src, dst : int arrays
        Present edges.
    n : int
        Number of nodes (keys are ``src * n + dst``).
    """

    #: Pending changes merged into the base beyond this many.
    MERGE_AT = 1 << 16

    def __init__(self, src: np.ndarray, dst: np.ndarray, n: int) -> None:
        self.n = int(n)
        self._base = np.sort(pair_keys(src, dst, n))
        self._added = np.zeros(0, dtype=np.int64)  # sorted, none in the base
        self._removed = np.zeros(0, dtype=np.int64)  # sorted, all in the base

    def __len__(self) -> int:
        return int(self._base.size - self._removed.size + self._added.size)

    @property
    def keys(self) -> np.ndarray:
        """Every present key, sorted (merges the pending changes)."""
        self._merge()
        return self._base

    def copy(self) -> "EdgeSet":
        """An independent copy."""
        out = EdgeSet(np.zeros(0, np.int32), np.zeros(0, np.int32), self.n)
        out._base, out._added, out._removed = self._base.copy(), self._added.copy(), self._removed.copy()
        return out

    def contains(self, keys: np.ndarray) -> np.ndarray:
        """Membership of each key."""
        return (_member(self._base, keys) & ~_member(self._removed, keys)) | _member(self._added, keys)

    def update(self, inserted: np.ndarray, deleted: np.ndarray) -> None:
        """Add ``inserted`` (absent) keys and drop ``deleted`` (present) ones."""
        if deleted.size:
            pending = _member(self._added, deleted)
            self._added = np.setdiff1d(self._added, deleted[pending], assume_unique=True)
            self._removed = np.union1d(self._removed, deleted[~pending])
        if inserted.size:
            back = _member(self._removed, inserted)
            self._removed = np.setdiff1d(self._removed, inserted[back], assume_unique=True)
            self._added = np.union1d(self._added, inserted[~back])
        if self._added.size + self._removed.size > self.MERGE_AT:
            self._merge()

    def sample(self, count: int, rng: np.random.Generator) -> np.ndarray:
        """``count`` distinct present keys drawn uniformly, in random order."""
        count = min(count, len(self))
        if count == 0:
            return np.zeros(0, dtype=np.int64)
        base, added = self._base, self._added
        found = np.zeros(0, dtype=np.int64)
        while found.size < count:
            idx = rng.integers(0, base.size + added.size, size=2 * (count - found.size) + 8)
            from_base = idx < base.size
            picked = np.empty(idx.size, dtype=np.int64)
            picked[from_base] = base[idx[from_base]]
            picked[~from_base] = added[idx[~from_base] - base.size]
            found = np.unique(np.concatenate([found, picked[~_member(self._removed, picked)]]))
        return rng.permutation(found)[:count]

    def _merge(self) -> None:
        if self._added.size == 0 and self._removed.size == 0:
            return
        base = np.delete(self._base, np.searchsorted(self._base, self._removed))
        self._base = np.insert(base, np.searchsorted(base, self._added), self._added)
        self._added = np.zeros(0, dtype=np.int64)
        self._removed = np.zeros(0, dtype=np.int64)


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
    ins = new_edges(n_ins, edges, sampler, rng)
    dele = edges.sample(size - n_ins, rng)
    n_del = dele.size
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
