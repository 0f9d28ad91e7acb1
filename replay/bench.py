"""``ranktide bench``: the engine against recomputing, measured side by side in one run.

What is measured (every figure comes from the run that prints it):

* a generated power-law digraph (Chung–Lu, Pareto out- and in-weights,
  duplicates removed; see :mod:`replay.graphs`) is bulk-loaded and solved
  to a certified 1e-9;
* update batches of ``B`` mixed events (80 % inserts of new edges, 20 %
  deletes of present ones, shuffled) are handled by every contender to the
  same certified normalised L1 accuracy 1e-6:

  - ranktide: ``Engine.apply`` + ``Engine.settle``;
  - SciPy power iteration warm-started from the exact solution before the
    batch (``solver.exact.solve(..., x0=previous)``), timed without building
    the transposed transition matrix (that build is timed and shown apart);
  - the same power iteration started cold;
  - NetworkX ``pagerank`` (tiny and small graphs only);
  - python-igraph's PRPACK (``Graph.pagerank(implementation="prpack")``),
    with the igraph graph built outside the timed region;

  each result is compared with an exact solve (certified 1e-11, warm from the
  previous exact solution) and ranktide's certified bound is shown;
* personalization profiles seeded by seed events, engine throughput at the
  service's micro-batch, snapshot write and load, the replay floor (reading
  and parsing a log against replaying it), and the service end to end on a
  local Kafka broker when :mod:`stream.broker` is present.
"""

from __future__ import annotations

import argparse
import copy
import json
import math
import os
import platform
import resource
import shutil
import statistics
import sys
import tempfile
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import numpy as np

from ranktide.replay.graphs import PowerLawSampler, bundled_real_graph, pair_keys, power_law_digraph
from ranktide.solver import OP_DELETE, OP_INSERT, OP_SEED, Engine, SettleStats
from ranktide.solver.exact import solve, transition_transpose
from ranktide.solver.metrics import l1_error

#: Graph sizes (nodes, edges). ``tiny`` is for smoke tests.
SIZES = {
    "tiny": (2_000, 20_000),
    "small": (20_000, 200_000),
    "medium": (200_000, 2_000_000),
    "large": (1_000_000, 10_000_000),
}
#: Messages produced for the end-to-end run, per size.
E2E_EVENTS = {"tiny": 20_000, "small": 100_000, "medium": 300_000, "large": 1_000_000}
#: Micro-batches in the engine throughput stream, per size.
THROUGHPUT_BATCHES = {"tiny": 1, "small": 2, "medium": 6, "large": 10}
#: micro-batches of the backlog run (it grows the graph by 60 % of its events)
BACKLOG_BATCHES = {"tiny": 2, "small": 4, "medium": 20, "large": 20}
DAMPING = 0.85
TOLERANCE = 1e-6
REFERENCE_TOL = 1e-11
LOAD_TOL = 1e-9
INSERT_SHARE = 0.8
SEEDS_PER_PROFILE = 10
ARROW_ROWS = 10_000
HEADLINE_BATCH = 1_000
REAL_GRAPH_BATCHES = (1, 10, 100, 1000)


# ====================================================================== options


def _batch_list(text: str) -> list[int]:
    try:
        sizes = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated batch sizes, got {text!r}") from None
    if not sizes or min(sizes) < 1:
        raise argparse.ArgumentTypeError(f"batch sizes must be integers >= 1, got {text!r}")
    return sorted(set(sizes))


def _positive_int(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be an integer >= 1, got {text}")
    return value


def add_bench_options(p: argparse.ArgumentParser) -> None:
    """Options of ``ranktide bench``."""
    p.add_argument("--size", choices=list(SIZES), default="medium",
                   help="generated graph: small ~20k nodes/200k edges, medium ~200k/2M (default), "
                        "large ~1M/10M; tiny ~2k/20k is for smoke tests")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of tables")
    p.add_argument("--plot", type=Path, metavar="FILE.png",
                   help="write a log-log plot of time per event against batch size")
    p.add_argument("--batches", type=_batch_list, default=[1, 10, 100, 1_000, 10_000],
                   help="update batch sizes, comma-separated (default 1,10,100,1000,10000)")
    p.add_argument("--repeats", type=_positive_int, default=3, help="batches measured per batch size (default 3)")
    p.add_argument("--seed", type=int, default=0, help="seed of the generated graph and events (default 0)")
    p.add_argument("--skip-e2e", action="store_true", help="skip the end-to-end run through a local Kafka broker")
    p.add_argument("--profiles", type=int, default=2,
                   help="personalization profiles in the personalized stream (default 2; 0 skips it)")


# ====================================================================== small helpers


def _say(text: str) -> None:
    print(f"[bench] {text}", file=sys.stderr, flush=True)


def _progress(total: int, desc: str):
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, file=sys.stderr, leave=False, mininterval=0.5)


def _timed(fn: Callable[[], object]) -> tuple[object, float]:
    started = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - started


def _peak_rss_bytes() -> int:
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


def _normalised(x: np.ndarray) -> np.ndarray:
    total = float(x.sum())
    return x / total if total > 0 else np.zeros_like(x)


def _median(values: list[float]) -> float:
    return float(statistics.median(values)) if values else math.nan


def _finite_or_none(value):
    """JSON-safe copy: inf and nan become None, numpy scalars become Python numbers."""
    if isinstance(value, dict):
        return {str(k): _finite_or_none(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_or_none(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value


# ====================================================================== machine


def machine_info() -> dict:
    """CPU count, model, RAM, load, date and library versions of this run."""
    import numba
    import pyarrow
    import scipy

    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    ram = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    return {
        "nproc": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count(),
        "cpu": model or platform.processor(),
        "ram_bytes": int(ram),
        "load_average": list(os.getloadavg()),
        "date": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "python": platform.python_version(),
        "numpy": np.__version__, "scipy": scipy.__version__, "numba": numba.__version__,
        "pyarrow": pyarrow.__version__,
    }


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
    eng = Engine(DAMPING, TOLERANCE)
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
    copy_of = Engine(DAMPING, TOLERANCE)  # the bulk load of a restore
    copy_of.restore(eng.n_nodes, eng.graph.edge_list(), {p: eng.P[eng.profile_index(p), : eng.n_nodes]
                                                          for p in eng.profiles},
                    {p: eng.teleport_vector(p) for p in eng.profiles})
    return time.perf_counter() - started


def load_graph(n: int, src: np.ndarray, dst: np.ndarray, weight: np.ndarray, sampler: PowerLawSampler) -> Loaded:
    """Bulk load (``ensure_nodes`` + one ``apply`` of inserts on ``p = 0``), then solve to 1e-9 cold."""
    eng = Engine(DAMPING, TOLERANCE)

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


# ====================================================================== contenders


@dataclass
class Context:
    """Everything a contender needs after one batch; ``pt_seconds`` is the untimed matrix build."""

    n: int
    src: np.ndarray
    dst: np.ndarray
    weight: np.ndarray
    PT: object
    pt_seconds: float
    s: np.ndarray
    x_prev: np.ndarray


@dataclass
class Measure:
    """One contender on one batch."""

    seconds: float
    scores: np.ndarray
    bound: float | None = None
    iterations: int | None = None
    prep_seconds: float | None = None
    x: np.ndarray | None = None  # unnormalised solution (the next start of the chained warm start)


def warm_start(ctx: Context) -> Measure:
    """SciPy power iteration from ``ctx.x_prev`` (matrix build not timed).

    As ``warm_start`` the start is the exact solution before the batch (the
    best case); as ``warm_start_own`` it is this contender's own answer to the
    previous batch, certified to 1e-6 like ranktide's state, which is what a
    loop that recomputes after every batch has in hand.
    """
    sol, t = _timed(lambda: solve(ctx.PT, ctx.s, DAMPING, TOLERANCE, x0=ctx.x_prev))
    return Measure(t, sol.scores, sol.bound, sol.iterations, ctx.pt_seconds, sol.x)


def cold_start(ctx: Context) -> Measure:
    """SciPy power iteration from ``a s`` (matrix build not timed)."""
    sol, t = _timed(lambda: solve(ctx.PT, ctx.s, DAMPING, TOLERANCE))
    return Measure(t, sol.scores, sol.bound, sol.iterations, ctx.pt_seconds)


def networkx_tol(n: int) -> float:
    """NetworkX stops when ``||x_k - x_(k-1)||_1 < N tol``; this makes that step ``a * 1e-6``."""
    return (1.0 - DAMPING) * TOLERANCE / n


def networkx_pagerank(ctx: Context) -> Measure:
    """``networkx.pagerank`` on a DiGraph built outside the timed region."""
    import networkx as nx

    started = time.perf_counter()
    g = nx.DiGraph()
    g.add_nodes_from(range(ctx.n))
    g.add_weighted_edges_from(zip(ctx.src.tolist(), ctx.dst.tolist(), ctx.weight.tolist()))
    prep = time.perf_counter() - started
    result, t = _timed(lambda: nx.pagerank(g, alpha=DAMPING, tol=networkx_tol(ctx.n), max_iter=100_000))
    scores = np.fromiter((result[i] for i in range(ctx.n)), dtype=np.float64, count=ctx.n)
    return Measure(t, scores, None, None, prep)


def igraph_prpack(ctx: Context) -> Measure:
    """python-igraph PRPACK, cold, on a Graph built outside the timed region."""
    import igraph

    started = time.perf_counter()
    g = igraph.Graph(n=ctx.n, edges=np.column_stack((ctx.src, ctx.dst)), directed=True)
    g.es["weight"] = ctx.weight
    prep = time.perf_counter() - started
    result, t = _timed(lambda: g.pagerank(weights="weight", damping=DAMPING, implementation="prpack"))
    return Measure(t, np.asarray(result, dtype=np.float64), None, None, prep)


#: Contenders that need a bench extra: name -> the module they import.
OPTIONAL = {"networkx": "networkx", "igraph_prpack": "igraph"}
#: How to install the bench extras (from a clone of the repository).
INSTALL_EXTRAS = "python3 -m pip install -e '.[bench]'"


def missing_contenders() -> dict[str, str]:
    """Contenders whose library cannot be imported: name -> the module that is missing."""
    import importlib

    missing = {}
    for name, module in OPTIONAL.items():
        try:
            importlib.import_module(module)
        except ImportError:
            missing[name] = module
    return missing


CONTENDERS: dict[str, Callable[[Context], Measure]] = {
    "warm_start": warm_start,
    "warm_start_own": warm_start,
    "cold_start": cold_start,
    "networkx": networkx_pagerank,
    "igraph_prpack": igraph_prpack,
}
LABELS = {
    "ranktide": "ranktide incremental",
    "warm_start": "SciPy power iteration, warm",
    "warm_start_own": "SciPy power iteration, warm from its last answer",
    "cold_start": "SciPy power iteration, cold",
    "networkx": "NetworkX pagerank",
    "igraph_prpack": "igraph PRPACK, cold",
}


# ====================================================================== update batches


@dataclass
class Tracker:
    """The state carried from batch to batch: engine, edge set and exact solutions."""

    loaded: Loaded
    x_exact: dict[str, np.ndarray]
    rng: np.random.Generator
    x_own: dict[str, np.ndarray] = field(default_factory=dict)  # the chained warm start's last answers

    @property
    def engine(self) -> Engine:
        return self.loaded.engine


def exact_now(eng: Engine, x_prev: dict[str, np.ndarray]) -> tuple[dict[str, np.ndarray], object, float]:
    """Exact solutions of every profile (certified 1e-11, warm from ``x_prev`` when given)."""
    n = eng.n_nodes
    src, dst, w = eng.graph.edge_list()
    PT, pt_s = _timed(lambda: transition_transpose(src, dst, w, n))
    out = {}
    for name in eng.profiles:
        x0 = x_prev.get(name)
        out[name] = solve(PT, eng.teleport_vector(name), DAMPING, REFERENCE_TOL, x0=x0).x
    return out, (src, dst, w, PT), pt_s


def engine_step(eng: Engine, batch: Batch) -> tuple[float, float, SettleStats]:
    """Time ``apply`` and ``settle`` of one batch; return (apply s, settle s, work of the settle)."""
    _, t_apply = _timed(lambda: eng.apply(batch.op, batch.src, batch.dst, batch.weight))
    stats, t_settle = _timed(eng.settle)
    return t_apply, t_settle, stats


def measure_batch(tr: Tracker, size: int, contenders: list[str], profiles: list[str]) -> dict:
    """One batch through ranktide and every contender, with errors against the exact solve."""
    eng = tr.engine
    batch = mixed_batch(size, tr.loaded.edges, tr.loaded.sampler, tr.rng)
    t_apply, t_settle, stats = engine_step(eng, batch)
    tr.loaded.edges.update(batch.inserted, batch.deleted)
    x_new, (src, dst, w, PT), pt_s = exact_now(eng, tr.x_exact)
    row: dict = {"ranktide": {"seconds": t_apply + t_settle, "apply_seconds": t_apply,
                              "edge_touches": stats.edge_touches, "sweeps": stats.sweeps, "pushes": stats.pushes,
                              "error": max(l1_error(eng.scores(p), _normalised(x_new[p])) for p in profiles),
                              "bound": max(eng.certified_bound(p) for p in profiles)}}
    for name in contenders:
        ms = []
        for p in profiles:
            start = tr.x_own.get(p, tr.x_exact[p]) if name == "warm_start_own" else tr.x_exact[p]
            ctx = Context(eng.n_nodes, src, dst, w, PT, pt_s, eng.teleport_vector(p), start)
            measure = CONTENDERS[name](ctx)
            if name == "warm_start_own":
                tr.x_own[p] = measure.x
            ms.append((measure, l1_error_to(x_new[p])))
        row[name] = _combine(ms)
    tr.x_exact = x_new
    return row


def l1_error_to(x_exact: np.ndarray) -> Callable[[np.ndarray], float]:
    """Normalised L1 distance to ``x_exact``, as a function of the scores."""
    ref = _normalised(x_exact)
    return lambda scores: l1_error(scores, ref)


def _combine(measures: list[tuple[Measure, Callable[[np.ndarray], float]]]) -> dict:
    """One contender over every profile: times and iterations summed, worst error and bound."""
    ms = [m for m, _ in measures]
    bounds = [m.bound for m in ms]
    iters = [m.iterations for m in ms]
    return {"seconds": sum(m.seconds for m in ms),
            "error": max(err(m.scores) for m, err in measures),
            "bound": max(bounds) if None not in bounds else None,
            "iterations": sum(iters) if None not in iters else None,
            "prep_seconds": sum(m.prep_seconds or 0.0 for m in ms)}


def summarise(size: int, rows: list[dict], n_edges: int) -> dict:
    """Medians over the repeats of one batch size, worst errors and bounds, speedups."""
    out: dict = {"batch": size, "repeats": len(rows)}
    for name in rows[0]:
        vals = [r[name] for r in rows]
        sec = _median([v["seconds"] for v in vals])
        item = {"seconds_per_batch": sec, "seconds_per_event": sec / size,
                "max_error": max(v["error"] for v in vals)}
        bounds = [v.get("bound") for v in vals]
        item["max_certified_bound"] = max(bounds) if None not in bounds else None
        if name == "ranktide":
            item["apply_seconds_per_batch"] = _median([v["apply_seconds"] for v in vals])
            item["edge_touches_per_event"] = _median([v["edge_touches"] for v in vals]) / size
            item["sweeps_per_batch"] = _median([v["sweeps"] for v in vals])
            item["pushes_per_batch"] = _median([v["pushes"] for v in vals])
        if vals[0].get("iterations") is not None:
            item["iterations"] = _median([v["iterations"] for v in vals])
            item["edge_touches_per_event"] = item["iterations"] * n_edges / size
        if vals[0].get("prep_seconds"):
            item["untimed_build_seconds"] = _median([v["prep_seconds"] for v in vals])
        out[name] = item
    base = out["ranktide"]["seconds_per_batch"]
    out["speedup"] = {name: out[name]["seconds_per_batch"] / base for name in rows[0] if name != "ranktide"}
    return out


def run_batches(tr: Tracker, sizes: list[int], repeats: int, contenders: list[str],
                profiles: list[str], desc: str) -> list[dict]:
    """Every batch size, ``repeats`` batches each; one summary per size."""
    results = []
    bar = _progress(len(sizes) * repeats, desc)
    try:
        for size in sizes:
            rows = []
            for _ in range(repeats):
                rows.append(measure_batch(tr, size, contenders, profiles))
                bar.update(1)
            results.append(summarise(size, rows, tr.engine.n_edges))
    finally:
        bar.close()
    return results


def start_tracker(loaded: Loaded, seed: int) -> Tracker:
    """Exact solutions of the loaded graph (certified 1e-11) as the first references."""
    eng = loaded.engine
    warm = {p: eng.P[eng.profile_index(p), : eng.n_nodes].copy() for p in eng.profiles}
    x, _, _ = exact_now(eng, warm)
    return Tracker(loaded, x, np.random.default_rng(seed + 1))


def _copy_tracker(tr: Tracker, seed: int) -> Tracker:
    """An independent copy of the engine and its edge set (for a run that must not change ``tr``)."""
    edges = EdgeSet(np.zeros(0, np.int32), np.zeros(0, np.int32), tr.loaded.edges.n)
    edges.keys = tr.loaded.edges.keys.copy()
    loaded = Loaded(copy.deepcopy(tr.engine), edges, tr.loaded.sampler, {})
    return Tracker(loaded, {}, np.random.default_rng(seed))


def reserve_for(loaded: Loaded, sizes: list[int], repeats: int) -> int:
    """Room for the inserts of the batch workloads, so no timed batch reallocates (untimed)."""
    room = int(sum(math.ceil(INSERT_SHARE * b) for b in sizes) * repeats) + 1024
    loaded.engine.ensure_nodes(loaded.engine.n_nodes, room)
    return room


# ====================================================================== throughput


def measure_throughput(tr: Tracker, micro_batch: int, count: int) -> dict:
    """Engine events per second over ``count`` micro-batches: apply alone, and apply + settle."""
    eng = tr.engine
    t_apply = t_settle = 0.0
    work = SettleStats()
    bar = _progress(count, "engine throughput")
    try:
        for _ in range(count):
            b = mixed_batch(micro_batch, tr.loaded.edges, tr.loaded.sampler, tr.rng)
            a, s, stats = engine_step(eng, b)
            t_apply, t_settle = t_apply + a, t_settle + s
            work.add(stats)
            tr.loaded.edges.update(b.inserted, b.deleted)
            bar.update(1)
    finally:
        bar.close()
    events = micro_batch * count
    return {
        "micro_batch": micro_batch, "micro_batches": count, "events": events,
        "apply_only_events_per_second": events / t_apply,
        "apply_and_settle_events_per_second": events / (t_apply + t_settle),
        "apply_seconds": t_apply, "settle_seconds": t_settle,
        "edge_touches_per_event": work.edge_touches / events, "sweeps": work.sweeps,
        "certified_bound_after": eng.certified_bound(),
    }


def measure_backlog(tr: Tracker, micro_batch: int, count: int, settle_interval: float) -> dict:
    """Engine events per second when settles come as the service schedules them in a backlog.

    The service applies micro-batches and settles at most every
    ``settle_interval`` seconds of work while it reads a backlog, and once
    more when it has caught up (see ``Service._apply``); this runs that
    schedule on the engine alone over ``count`` micro-batches, ending with a
    settle. Only engine time counts (drawing the events does not). It grows
    the graph, so the bench runs it on a copy (:func:`_copy_tracker`).
    """
    eng = tr.engine
    settles = 0
    engine_s = since_settle = 0.0
    bar = _progress(count, "engine backlog")
    try:
        for i in range(count):
            b = mixed_batch(micro_batch, tr.loaded.edges, tr.loaded.sampler, tr.rng)
            _, t_apply = _timed(lambda: eng.apply(b.op, b.src, b.dst, b.weight))
            engine_s, since_settle = engine_s + t_apply, since_settle + t_apply
            tr.loaded.edges.update(b.inserted, b.deleted)
            if since_settle >= settle_interval or i == count - 1:
                _, t_settle = _timed(eng.settle)
                engine_s += t_settle
                settles, since_settle = settles + 1, 0.0
            bar.update(1)
    finally:
        bar.close()
    events = micro_batch * count
    return {"micro_batch": micro_batch, "micro_batches": count, "events": events, "settle_interval": settle_interval,
            "settles": settles, "engine_seconds": engine_s, "events_per_second": events / engine_s,
            "certified_bound_after": eng.certified_bound(), "edges_after": eng.n_edges}


# ====================================================================== personalization


def seed_profiles(eng: Engine, count: int, rng: np.random.Generator) -> tuple[list[str], float]:
    """Create ``count`` profiles with ~10 seed nodes each (seed events); time their first settle."""
    names, ops, nodes, rows = [], [], [], []
    for i in range(count):
        name = f"profile-{i + 1}"
        row = eng.add_profile(name)
        seeds = rng.choice(eng.n_nodes, size=min(SEEDS_PER_PROFILE, eng.n_nodes), replace=False)
        names.append(name)
        nodes.append(seeds)
        rows.append(np.full(seeds.size, row))
        ops.append(np.full(seeds.size, OP_SEED, np.int8))
    op, src, dst = np.concatenate(ops), np.concatenate(nodes), np.concatenate(rows)

    def seed_and_settle() -> None:
        eng.apply(op, src, dst, np.ones(op.size))
        eng.settle()

    _, seconds = _timed(seed_and_settle)
    return names, seconds


def measure_profiles(tr: Tracker, count: int, size: int, repeats: int) -> dict:
    """The mixed stream with ``count`` personalizations besides the global profile."""
    eng = tr.engine
    names, seed_s = seed_profiles(eng, count, tr.rng)
    tr.x_exact, _, _ = exact_now(eng, tr.x_exact)
    profiles = list(eng.profiles)
    result = run_batches(tr, [size], repeats, ["warm_start", "cold_start"], profiles, "personalized stream")[0]
    result.update({"profiles": names, "seeds_per_profile": SEEDS_PER_PROFILE,
                   "first_settle_seconds": seed_s,
                   "certified_bound_per_profile": {p: eng.certified_bound(p) for p in profiles}})
    return result


# ====================================================================== snapshots


def ranker_over(eng: Engine):
    """A Ranker over ``eng`` whose node names are ``str(i)``."""
    from ranktide.solver import Ranker
    from ranktide.solver.ids import NodeIds

    ranker = Ranker(DAMPING, TOLERANCE)
    ranker.engine = eng
    ranker.ids = NodeIds([str(i) for i in range(eng.n_nodes)])
    return ranker


def folder_bytes(path: Path) -> int:
    return sum(f.stat().st_size for f in Path(path).rglob("*") if f.is_file())


def measure_snapshot(eng: Engine, root: Path) -> tuple[dict, Path]:
    """Write a snapshot of ``eng`` under ``root`` and load it back; return figures and its folder."""
    from ranktide.stream.snapshots import Counters, load_snapshot, write_snapshot

    ranker = ranker_over(eng)
    path, write_s = _timed(lambda: write_snapshot(root, ranker, Counters(), {}))
    snap, load_s = _timed(lambda: load_snapshot(path))
    same = snap.ranker.engine.n_edges == eng.n_edges and snap.ranker.engine.n_nodes == eng.n_nodes
    return {
        "write_seconds": write_s, "load_seconds": load_s, "bytes_on_disk": folder_bytes(path),
        "nodes": eng.n_nodes, "edges": eng.n_edges, "round_trip_same_size": bool(same),
        "certified_bound_after_load": snap.ranker.engine.certified_bound(),
    }, path


# ====================================================================== replay floor


def insert_lines(src: np.ndarray, dst: np.ndarray) -> list[str]:
    """JSON lines of insert events (built with Arrow's string kernels, no per-edge formatting)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    s = pc.cast(pa.array(src), pa.string())
    d = pc.cast(pa.array(dst), pa.string())
    lines = pc.binary_join_element_wise('{"op":"insert","src":"', s, '","dst":"', d, '"}', "")
    return lines.to_pylist()


def write_logs(src: np.ndarray, dst: np.ndarray, folder: Path) -> tuple[Path, Path]:
    """The edges as insert events: a JSON Lines log and a Parquet log."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    jsonl = folder / "edges.jsonl"
    with open(jsonl, "w", encoding="utf-8") as fh:
        fh.write("\n".join(insert_lines(src, dst)))
        fh.write("\n")
    parquet = folder / "edges.parquet"
    table = pa.table({
        "op": pa.array(["insert"] * src.size, pa.string()),
        "src": pa.array(src).cast(pa.string()), "dst": pa.array(dst).cast(pa.string()),
        "weight": pa.array(np.ones(src.size)), "ts": pa.array(np.full(src.size, -1, np.int64)).cast(pa.int64()),
    })
    pq.write_table(table, parquet, compression="zstd")
    return jsonl, parquet


def read_only(path: Path) -> int:
    """Read and parse a log, discarding the events; return how many were valid."""
    from ranktide.replay.logs import read_log

    return sum(len(chunk.parsed.batch) for chunk in read_log(path))


def measure_replay(src: np.ndarray, dst: np.ndarray, folder: Path) -> dict:
    """Replay floor: reading + parsing alone against ``replay_log`` for JSONL and Parquet."""
    from ranktide.replay.replay import ReplayOptions, replay_log

    jsonl, parquet = write_logs(src, dst, folder)
    out: dict = {"events": int(src.size)}
    for fmt, path, target in (("jsonl", jsonl, 3.0), ("parquet", parquet, 1.5)):
        _say(f"replay floor: {fmt} ({src.size:,} events)")
        count, read_s = _timed(lambda: read_only(path))
        summary, replay_s = _timed(lambda: replay_log(path, folder / f"replay-{fmt}", ReplayOptions()))
        out[fmt] = {
            "file_bytes": path.stat().st_size, "read_parse_seconds": read_s, "replay_seconds": replay_s,
            "ratio": replay_s / read_s, "target_ratio": target, "meets_target": replay_s / read_s <= target,
            "valid_events": int(count), "events_applied": summary.counters.events_applied,
            "certified_bound": summary.bounds.get("global"),
        }
    return out


# ====================================================================== end to end


def e2e_events(edges: EdgeSet, sampler: PowerLawSampler, count: int, rng: np.random.Generator) -> Batch:
    """``count`` mixed events against the snapshot's edge set (a copy; the set is not changed)."""
    copy = EdgeSet(np.zeros(0, np.int32), np.zeros(0, np.int32), edges.n)
    copy.keys = edges.keys.copy()
    return mixed_batch(count, copy, sampler, rng)


def event_table(b: Batch):
    """The wire columns op, src, dst, weight, ts of a batch."""
    import pyarrow as pa

    names = np.array(["insert", "delete", "seed"], dtype=object)[b.op]
    ts = 1_733_050_000_000 + np.arange(len(b), dtype=np.int64)
    return pa.table({"op": pa.array(names, pa.string()), "src": pa.array(b.src).cast(pa.string()),
                     "dst": pa.array(b.dst).cast(pa.string()), "weight": pa.array(b.weight), "ts": pa.array(ts)})


def json_messages(b: Batch) -> list[bytes]:
    """One JSON event per message (built with Arrow's string kernels)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    t = event_table(b)
    w = pc.if_else(pc.equal(t["op"], "insert"),
                   pc.binary_join_element_wise(',"weight":', pc.cast(t["weight"], pa.string()), ""), "")
    parts = ['{"op":"', t["op"], '","src":"', t["src"], '","dst":"', t["dst"], '"', w,
             ',"ts":', pc.cast(t["ts"], pa.string()), "}"]
    return [s.encode() for s in pc.binary_join_element_wise(*parts, "").to_pylist()]


def arrow_messages(b: Batch, rows: int = ARROW_ROWS) -> list[bytes]:
    """Arrow IPC streams of ``rows`` events each."""
    import pyarrow as pa

    table = event_table(b)
    out = []
    for start in range(0, table.num_rows, rows):
        sink = pa.BufferOutputStream()
        part = table.slice(start, rows)
        with pa.ipc.new_stream(sink, part.schema) as writer:
            writer.write_table(part)
        out.append(sink.getvalue().to_pybytes())
    return out


def produce(bootstrap: str, topic: str, values: list[bytes], headers: list | None) -> None:
    """Send every value to ``topic`` and wait until the broker has them (not timed)."""
    from confluent_kafka import Producer

    producer = Producer({"bootstrap.servers": bootstrap, "linger.ms": 20, "batch.num.messages": 10_000,
                         "queue.buffering.max.messages": 2_000_000, "message.max.bytes": 8 << 20})
    for i, value in enumerate(values):
        while True:
            try:
                producer.produce(topic, value=value, headers=headers)
                break
            except BufferError:
                producer.poll(0.05)
        if i % 10_000 == 0:
            producer.poll(0)
    if producer.flush(120) != 0:
        raise RuntimeError(f"could not deliver every message to {topic}")


def timed_service(source: str, out: Path) -> dict:
    """Run the service to the end of its source and time it, with restore and snapshots apart."""
    from ranktide.stream.config import ServiceConfig
    from ranktide.stream.service import Service
    from ranktide.stream.snapshots import load_latest

    spent = {"restore": 0.0, "snapshot": 0.0, "owner_wait": 0.0}

    class TimedService(Service):
        def _take_over(self, rejects):  # noqa: D401 - same contract as Service._take_over
            spent["owner_wait"] = time.perf_counter() - began  # joining the owner group
            return super()._take_over(rejects)

        def _restore(self, rejects):  # noqa: D401 - same contract as Service._restore
            started = time.perf_counter()
            try:
                return super()._restore(rejects)
            finally:
                spent["restore"] += time.perf_counter() - started

        def _snapshot(self, rejects, reason="interval"):
            started = time.perf_counter()
            try:
                return super()._snapshot(rejects, reason)
            finally:
                spent["snapshot"] += time.perf_counter() - started

    cfg = ServiceConfig(source=source, out=str(out), stop_at_end=True, snapshot_interval=60, metrics="")
    began = time.perf_counter()
    code, total = _timed(lambda: TimedService(cfg.validate()).run())
    final = load_latest(out)
    return {"exit_code": code, "seconds": total, "restore_seconds": spent["restore"],
            "snapshot_seconds": spent["snapshot"], "owner_wait_seconds": spent["owner_wait"],
            "events_applied": final.counters.events_applied if final else None,
            "events_rejected": final.counters.events_rejected if final else None}


def e2e_run(kafka, kind: str, values: list[bytes], events: int, snapshot: Path, folder: Path) -> dict:
    """Produce (untimed), then time the service from the snapshot to the end of the topic."""
    from ranktide.stream.sources import ARROW_CONTENT_TYPE

    topic = f"bench-{kind}"
    kafka.create_topic(topic, partitions=3)
    headers = [("content-type", ARROW_CONTENT_TYPE.encode())] if kind == "arrow" else None
    _say(f"end to end: producing {len(values):,} {kind} messages ({events:,} events)")
    produce(kafka.bootstrap, topic, values, headers)
    out = folder / f"e2e-{kind}"
    shutil.copytree(snapshot, out / snapshot.name)
    _say(f"end to end: service consuming {topic}")
    r = timed_service(f"kafka://{kafka.bootstrap}/{topic}", out)
    busy = r["seconds"] - r["restore_seconds"] - r["snapshot_seconds"] - r["owner_wait_seconds"]
    r.update({"messages": len(values), "events": events, "events_per_second": events / r["seconds"],
              "events_per_second_excluding_restore_and_snapshots": events / busy if busy > 0 else None})
    return r


def warm_group_coordinator(bootstrap: str) -> None:
    """Commit one offset in a throwaway group, so the broker's first group setup is not timed."""
    from confluent_kafka import Consumer, TopicPartition

    consumer = Consumer({"bootstrap.servers": bootstrap, "group.id": "bench-warm-up"})
    consumer.commit(offsets=[TopicPartition("bench-warm-up", 0, 0)], asynchronous=False)
    consumer.close()


def measure_e2e(edges: EdgeSet, sampler: PowerLawSampler, count: int, snapshot: Path,
                folder: Path, rng: np.random.Generator) -> dict:
    """The service end to end on a local broker, JSON messages then Arrow IPC batches."""
    try:
        from ranktide.stream.broker import LocalKafka
    except ImportError:
        return {"skipped": "no broker"}
    batch = e2e_events(edges, sampler, count, rng)
    kafka = LocalKafka()
    try:
        _say("end to end: starting a local Kafka broker")
        kafka.start()
        kafka.create_topic("bench-warm-up", partitions=1)
        warm_group_coordinator(kafka.bootstrap)
    except Exception as exc:  # noqa: BLE001 - any failure to start means no broker here
        kafka.stop()
        return {"skipped": f"no broker: {exc}".splitlines()[0][:300]}
    try:
        return {"json": e2e_run(kafka, "json", json_messages(batch), count, snapshot, folder),
                "arrow": e2e_run(kafka, "arrow", arrow_messages(batch), count, snapshot, folder),
                "arrow_rows_per_message": ARROW_ROWS}
    finally:
        kafka.stop()


# ====================================================================== real graph


def measure_real_graph(repeats: int, seed: int, missing: dict[str, str]) -> dict:
    """The bundled real graph through the same installed contenders (small batches)."""
    try:
        g = bundled_real_graph()
    except ImportError as exc:
        return {"skipped": f"no real graph: neither onadata nor NetworkX is installed ({exc}); {INSTALL_EXTRAS}"}
    uniform = PowerLawSampler(g.n, np.arange(1, g.n + 1, dtype=np.float64), np.arange(1, g.n + 1, dtype=np.float64))
    loaded = load_graph(g.n, g.src, g.dst, g.weight, uniform)
    tr = start_tracker(loaded, seed)
    sizes = [b for b in REAL_GRAPH_BATCHES if 5 * b <= g.src.size]
    rows = run_batches(tr, sizes, repeats, [n for n in CONTENDERS if n not in missing], ["global"], "real graph")
    return {"name": g.name, "description": g.description, "load": loaded.info, "batches": rows,
            "note": "the largest real graph found inside a registry package: onadata 0.1 (PyPI) ships the "
                    "Wikipedia vote network; without that package the bench falls back to NetworkX's "
                    "Les Misérables; no data set is downloaded at run time"}


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


def contenders_for(size: str, missing: dict[str, str] | None = None) -> list[str]:
    """NetworkX only on tiny and small graphs; none whose library is ``missing``."""
    names = ["warm_start", "warm_start_own", "cold_start", "igraph_prpack"]
    names = names + ["networkx"] if size in ("tiny", "small") else names
    return [n for n in names if n not in (missing or {})]


def scaling_run(size: str, sizes: list[int], repeats: int, seed: int) -> list[dict]:
    """A reduced run on another size (ranktide and the warm start only), for the graph-size table."""
    _say(f"graph-size scaling: {size}")
    src, dst, sampler, _ = generated(size, seed)
    loaded = load_graph(SIZES[size][0], src, dst, np.ones(src.size), sampler)
    reserve_for(loaded, sizes, repeats)
    tr = start_tracker(loaded, seed)
    return run_batches(tr, sizes, repeats, ["warm_start"], ["global"], f"batches ({size})")


# ====================================================================== the whole bench


def headline(rows: list[dict]) -> dict:
    """The row of the 1,000-event batches, or the measured size closest to it."""
    return min(rows, key=lambda r: (abs(math.log(r["batch"] / HEADLINE_BATCH)), r["batch"]))


def run_all(args: argparse.Namespace, folder: Path) -> dict:
    """Every measurement of one run, as one report."""
    from ranktide.stream.config import ServiceConfig

    report: dict = {"machine": machine_info(), "settings": {
        "size": args.size, "batches": args.batches, "repeats": args.repeats, "seed": args.seed,
        "profiles": args.profiles, "damping": DAMPING, "tolerance": TOLERANCE, "reference_tolerance": REFERENCE_TOL,
        "networkx_tol": "(1 - damping) * 1e-6 / N", "insert_share": INSERT_SHARE}}
    missing = missing_contenders()
    report["missing_contenders"] = {name: f"{module} is not installed: {INSTALL_EXTRAS}"
                                    for name, module in missing.items()}
    for name, module in missing.items():
        _say(f"skipping {LABELS[name]}: {module} is not installed (install the bench extras: {INSTALL_EXTRAS})")
    _say("compiling kernels on a small graph")
    report["settings"]["kernel_warm_up_seconds"] = warm_up_kernels()
    _say(f"generating the {args.size} graph")
    src0, dst0, sampler, ginfo = generated(args.size, args.seed)
    report["graph"] = ginfo
    _say("bulk load and first solve")
    loaded = load_graph(SIZES[args.size][0], src0, dst0, np.ones(src0.size), sampler)
    report["load"] = loaded.info
    report["load"]["reserved_edge_room"] = reserve_for(loaded, args.batches, args.repeats)
    tr = start_tracker(loaded, args.seed)
    report["batches"] = run_batches(tr, args.batches, args.repeats, contenders_for(args.size, missing), ["global"],
                                    f"update batches ({args.size})")
    report["scaling"] = {args.size: _scaling_rows(report["batches"])}
    if args.size == "large":
        for other in ("small", "medium"):
            report["scaling"][other] = _scaling_rows(scaling_run(other, args.batches, args.repeats, args.seed))
    micro = ServiceConfig().micro_batch
    _say(f"engine throughput at micro-batches of {micro:,}")
    report["throughput"] = measure_throughput(tr, micro, THROUGHPUT_BATCHES[args.size])
    _say("snapshot write and load")
    report["snapshot"], snap_path = measure_snapshot(tr.engine, folder / "snapshots")
    snap_edges = EdgeSet(np.zeros(0, np.int32), np.zeros(0, np.int32), tr.loaded.edges.n)
    snap_edges.keys = tr.loaded.edges.keys.copy()
    _say("engine throughput on the service's backlog schedule")
    report["backlog"] = measure_backlog(_copy_tracker(tr, args.seed + 11), micro, BACKLOG_BATCHES[args.size],
                                        ServiceConfig().settle_interval)
    if args.profiles > 0:
        size = headline(report["batches"])["batch"]
        report["personalized"] = measure_profiles(tr, args.profiles, size, args.repeats)
    report["peak_rss_bytes"] = _peak_rss_bytes()
    del tr, loaded
    report["replay"] = measure_replay(src0, dst0, folder)
    _say("bundled real graph")
    report["real_graph"] = measure_real_graph(args.repeats, args.seed, missing)
    if args.skip_e2e:
        report["end_to_end"] = {"skipped": "--skip-e2e"}
    else:
        report["end_to_end"] = measure_e2e(snap_edges, sampler, E2E_EVENTS[args.size], snap_path, folder,
                                           np.random.default_rng(args.seed + 7))
    _add_headlines(report)
    return report


def _scaling_rows(rows: list[dict]) -> list[dict]:
    return [{"batch": r["batch"], "ranktide_seconds_per_event": r["ranktide"]["seconds_per_event"],
             "warm_start_seconds_per_event": r["warm_start"]["seconds_per_event"]} for r in rows]


def _add_headlines(report: dict) -> None:
    head = headline(report["batches"])
    report["speedup_vs_warm_start"] = head["speedup"]["warm_start"]
    report["speedup_vs_warm_start_batch"] = head["batch"]
    report["speedup_vs_warm_start_graph"] = report["graph"]["size"]
    report["speedup_vs_warm_start_own"] = head["speedup"].get("warm_start_own")
    report["events_per_second"] = report["throughput"]["apply_and_settle_events_per_second"]
    report["events_per_second_apply_only"] = report["throughput"]["apply_only_events_per_second"]
    report["events_per_second_backlog_schedule"] = report["backlog"]["events_per_second"]
    e2e = report["end_to_end"]
    report["end_to_end_events_per_second"] = e2e["json"]["events_per_second"] if "json" in e2e else None
    report["end_to_end_arrow_events_per_second"] = e2e["arrow"]["events_per_second"] if "arrow" in e2e else None


def run_bench(args: argparse.Namespace) -> int:
    """Entry point of ``ranktide bench``; prints tables or one JSON object."""
    with tempfile.TemporaryDirectory(prefix="ranktide-bench-") as tmp:
        report = run_all(args, Path(tmp))
    if args.plot:
        write_plot(report, args.plot)
        report["plot"] = str(args.plot.resolve())
    if args.json:
        print(json.dumps(_finite_or_none(report), indent=1, allow_nan=False))
    else:
        print(render(report))
    if args.plot:
        print(f"plot written to {args.plot.resolve()}", file=sys.stderr if args.json else sys.stdout)
    return 0


# ====================================================================== plot


def write_plot(report: dict, path: Path) -> None:
    """Log-log plot of seconds per event against batch size (ranktide and the warm start)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 5.5), dpi=120)
    colours = {"tiny": "tab:gray", "small": "tab:green", "medium": "tab:blue", "large": "tab:purple"}
    for size, rows in report["scaling"].items():
        g = SIZES[size]
        b = [r["batch"] for r in rows]
        tag = f"{size}: {g[0]:,} nodes / {g[1]:,} edges"
        ax.loglog(b, [r["ranktide_seconds_per_event"] for r in rows], "o-", color=colours[size],
                  label=f"ranktide incremental ({tag})")
        ax.loglog(b, [r["warm_start_seconds_per_event"] for r in rows], "s--", color=colours[size],
                  alpha=0.7, label=f"SciPy power iteration, warm ({tag})")
    ax.set_xlabel("events per batch")
    ax.set_ylabel("seconds per event (certified normalised L1 1e-6)")
    m = report["machine"]
    ax.set_title(f"Cost per event of keeping PageRank fresh\n{m['nproc']} CPUs, {m['date'][:10]}")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


# ====================================================================== tables


def _fmt_time(seconds: float | None) -> str:
    """Seconds with a readable unit."""
    if seconds is None or not math.isfinite(seconds):
        return "-"
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("us", 1e-6)):
        if seconds >= scale or unit == "us":
            return f"{seconds / scale:.3g} {unit}"
    return f"{seconds:.3g} s"


def _fmt_bytes(count: int) -> str:
    for unit, scale in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if count >= scale:
            return f"{count / scale:.1f} {unit}"
    return f"{count} B"


def _fmt_num(value: float | None, spec: str = ".3g") -> str:
    return "-" if value is None or not math.isfinite(value) else format(value, spec)


def _table(headers: list[str], rows: list[list[str]]) -> str:
    """Plain text table, first column left-aligned, the others right-aligned."""
    widths = [max(len(str(x)) for x in col) for col in zip(headers, *rows)]

    def line(cells: list[str]) -> str:
        return "  ".join(str(c).ljust(w) if i == 0 else str(c).rjust(w) for i, (c, w) in enumerate(zip(cells, widths)))

    return "\n".join([line(headers), line(["-" * w for w in widths])] + [line(r) for r in rows])


def _present(rows: list[dict]) -> list[str]:
    return [name for name in ("warm_start", "warm_start_own", "cold_start", "igraph_prpack", "networkx")
            if name in rows[0]]


def _batch_tables(rows: list[dict]) -> list[str]:
    """Time per batch, per event, speedups, accuracy and work of every batch size."""
    names = _present(rows)
    heads = ["events/batch", LABELS["ranktide"]] + [LABELS[n] for n in names]
    per_batch = [[f"{r['batch']:,}"] + [_fmt_time(r[n]["seconds_per_batch"]) for n in ["ranktide"] + names] for r in rows]
    per_event = [[f"{r['batch']:,}"] + [_fmt_time(r[n]["seconds_per_event"]) for n in ["ranktide"] + names] for r in rows]
    speed = [[f"{r['batch']:,}"] + [f"{r['speedup'][n]:,.1f}x" for n in names] for r in rows]
    acc_heads = ["events/batch", "ranktide measured", "ranktide certified"] + [f"{LABELS[n]} measured" for n in names]
    acc = [[f"{r['batch']:,}", _fmt_num(r["ranktide"]["max_error"]), _fmt_num(r["ranktide"]["max_certified_bound"])]
           + [_fmt_num(r[n]["max_error"]) for n in names] for r in rows]
    work_heads = ["events/batch", "ranktide edge touches/event", "ranktide pushes", "ranktide sweeps",
                  "warm iterations", "warm edge touches/event",
                  "cold iterations", "P^T build (untimed)"] + [f"{LABELS[n]} graph build (untimed)"
                                                                for n in names if n in ("igraph_prpack", "networkx")]
    work = [[f"{r['batch']:,}", _fmt_num(r["ranktide"]["edge_touches_per_event"], ",.1f"),
             _fmt_num(r["ranktide"]["pushes_per_batch"], ",.0f"), _fmt_num(r["ranktide"]["sweeps_per_batch"], ".0f"),
             _fmt_num(r["warm_start"].get("iterations"), ".0f"),
             _fmt_num(r["warm_start"].get("edge_touches_per_event"), ",.0f"),
             _fmt_num(r["cold_start"].get("iterations"), ".0f"),
             _fmt_time(r["warm_start"].get("untimed_build_seconds"))]
            + [_fmt_time(r[n].get("untimed_build_seconds")) for n in names if n in ("igraph_prpack", "networkx")]
            for r in rows]
    return [
        "Time per batch (median of the repeats)", _table(heads, per_batch), "",
        "Time per event (time per batch / events per batch)", _table(heads, per_event), "",
        "Speedup of ranktide (contender time / ranktide time; SciPy rows count solve time only)",
        _table(["events/batch"] + [LABELS[n] for n in names], speed), "",
        "Accuracy: worst normalised L1 error against the exact solve (certified 1e-11) over the repeats",
        _table(acc_heads, acc), "",
        "Work", _table(work_heads, work),
    ]


def _graph_lines(report: dict) -> list[str]:
    g, ld = report["graph"], report["load"]
    mem = ld["memory_bytes"]
    return [
        f"Graph     {g['model']} ('{g['size']}'): {g['nodes']:,} nodes, {g['edges']:,} edges, "
        f"tail exponents out {g['out_exponent']} / in {g['in_exponent']}, {100 * g['dangling_share']:.1f} % dangling, "
        f"generated in {_fmt_time(g['generate_seconds'])} (seed {g['seed']})",
        f"Load      Engine.ensure_nodes + one Engine.apply of {ld['edges']:,} inserts: {_fmt_time(ld['load_seconds'])} "
        f"({ld['load_edges_per_second'] / 1e6:.2f} M edges/s)",
        f"Solve     Engine.resolve({ld['resolve_tolerance']:g}, warm=False): {ld['resolve_iterations']} iterations, "
        f"{_fmt_time(ld['resolve_seconds'])}; certified bound {ld['certified_bound_after_load']:.2g}",
        f"Memory    {ld['bytes_per_edge']:.1f} bytes per edge (Engine.memory_bytes()['edges'] / edges); graph "
        f"{mem['graph'] / 2**20:.0f} MiB, profiles {mem['profiles'] / 2**20:.0f} MiB; peak RSS after load "
        f"{ld['peak_rss_bytes_after_load'] / 2**20:.0f} MiB, at the end of the engine parts "
        f"{report['peak_rss_bytes'] / 2**20:.0f} MiB",
    ]


def _scaling_lines(report: dict) -> list[str]:
    sizes = list(report["scaling"])
    batches = [r["batch"] for r in report["scaling"][sizes[0]]]
    rows = []
    for size in sizes:
        by_b = {r["batch"]: r for r in report["scaling"][size]}
        n, m = SIZES[size]
        for key, label in (("ranktide_seconds_per_event", "ranktide"), ("warm_start_seconds_per_event", "warm start")):
            rows.append([f"{size} ({m:,} edges) {label}"] + [_fmt_time(by_b[b][key]) if b in by_b else "-" for b in batches])
    return ["Cost per event by graph size and batch size", _table(["graph / contender"] + [f"B={b:,}" for b in batches], rows)]


def _profile_lines(p: dict) -> list[str]:
    names = ["warm_start", "cold_start"]
    row = [f"{p['batch']:,}", _fmt_time(p["ranktide"]["seconds_per_batch"])] + \
          [_fmt_time(p[n]["seconds_per_batch"]) for n in names] + [f"{p['speedup'][n]:,.1f}x" for n in names] + \
          [_fmt_num(p["ranktide"]["max_error"]), _fmt_num(p["ranktide"]["max_certified_bound"])]
    heads = ["events/batch", "ranktide", "warm start", "cold start", "speedup vs warm", "speedup vs cold",
             "measured error", "certified bound"]
    return [f"Personalized stream: global + {len(p['profiles'])} profiles ({p['seeds_per_profile']} seed nodes each, "
            f"set by seed events; first settle of the seeds {_fmt_time(p['first_settle_seconds'])}); contenders "
            f"solve every profile (times summed), errors are the worst profile", _table(heads, [row])]


def _throughput_lines(t: dict) -> list[str]:
    return [
        f"Engine throughput over {t['events']:,} mixed events in micro-batches of {t['micro_batch']:,} "
        f"(the service's default; growth of the edge arrays included)",
        f"  apply alone          {t['apply_only_events_per_second']:,.0f} events/s",
        f"  apply + settle       {t['apply_and_settle_events_per_second']:,.0f} events/s "
        f"(settle {100 * t['settle_seconds'] / (t['apply_seconds'] + t['settle_seconds']):.0f} % of the time, "
        f"{t['edge_touches_per_event']:,.1f} edge touches per event, {t['sweeps']} sweeps, bound after {t['certified_bound_after']:.2g})",
    ]


def _backlog_lines(b: dict) -> list[str]:
    return [f"  backlog schedule     {b['events_per_second']:,.0f} events/s over {b['events']:,} events "
            f"(settle after every {b['settle_interval']:g} s of engine work and at the end, as the service "
            f"does in a backlog: {b['settles']} settles, bound after {b['certified_bound_after']:.2g})"]


def _snapshot_lines(s: dict) -> list[str]:
    return [f"Snapshot of {s['nodes']:,} nodes / {s['edges']:,} edges ({_fmt_bytes(s['bytes_on_disk'])} on disk): "
            f"write {_fmt_time(s['write_seconds'])} (exact residual, settle, zstd Parquet, sha256, fsync), "
            f"load {_fmt_time(s['load_seconds'])} (checksums, Parquet, id interning, exact residual)"]


def _replay_lines(r: dict) -> list[str]:
    rows = [[fmt, _fmt_bytes(r[fmt]["file_bytes"]), _fmt_time(r[fmt]["read_parse_seconds"]),
             _fmt_time(r[fmt]["replay_seconds"]), f"{r[fmt]['ratio']:.2f}x",
             f"<= {r[fmt]['target_ratio']:g}x " + ("met" if r[fmt]["meets_target"] else "MISSED")]
            for fmt in ("jsonl", "parquet")]
    return [f"Replay floor: the generated graph's {r['events']:,} edges as insert events, replayed from an empty graph",
            _table(["log", "size", "read + parse only", "replay_log", "ratio", "target"], rows)]


def _e2e_lines(e: dict) -> list[str]:
    if "skipped" in e:
        return [f"End to end: skipped: {e['skipped']}"]
    rows = [[kind, f"{e[kind]['messages']:,}", f"{e[kind]['events']:,}", _fmt_time(e[kind]["seconds"]),
             f"{e[kind]['events_per_second']:,.0f}",
             _fmt_num(e[kind]["events_per_second_excluding_restore_and_snapshots"], ",.0f"),
             _fmt_time(e[kind]["owner_wait_seconds"]), _fmt_time(e[kind]["restore_seconds"]),
             _fmt_time(e[kind]["snapshot_seconds"]), f"{e[kind]['events_applied']:,}"] for kind in ("json", "arrow")]
    return [f"End to end: ranktide run on a local Kafka broker, 3 partitions, resuming from a snapshot of the graph, "
            f"to the end of the topic (producing not timed; Arrow messages hold {e['arrow_rows_per_message']:,} rows)",
            _table(["messages", "count", "events", "run time", "events/s",
                    "events/s without start-up (owner wait, restore) and final snapshot",
                    "owner wait", "restore", "final snapshot", "applied"], rows)]


def _real_lines(r: dict) -> list[str]:
    if "skipped" in r:
        return [f"Real graph: skipped, {r['skipped']}."]
    names = _present(r["batches"])
    heads = ["events/batch"] + [LABELS[n] for n in ["ranktide"] + names] + ["ranktide error", "ranktide bound"]
    rows = [[f"{b['batch']:,}"] + [_fmt_time(b[n]["seconds_per_batch"]) for n in ["ranktide"] + names]
            + [_fmt_num(b["ranktide"]["max_error"]), _fmt_num(b["ranktide"]["max_certified_bound"])] for b in r["batches"]]
    worst = max(max(b[n]["max_error"] for n in names) for b in r["batches"])
    return [f"Real graph: {r['description']}; {r['note']}.",
            _table(heads, rows), f"  worst contender error {worst:.2g}"]


def render(report: dict) -> str:
    """The human-readable report."""
    m = report["machine"]
    s = report["settings"]
    out = [
        f"ranktide bench: size {s['size']}, batches {','.join(map(str, s['batches']))}, {s['repeats']} repeats, "
        f"seed {s['seed']}",
        f"Machine   {m['nproc']} CPUs ({m['cpu']}), {m['ram_bytes'] / 2**30:.1f} GiB RAM, load average "
        f"{m['load_average'][0]:.2f} at start, {m['date']}; Python {m['python']}, numpy {m['numpy']}, "
        f"SciPy {m['scipy']}, numba {m['numba']}, pyarrow {m['pyarrow']}",
        "Accuracy  every contender to a certified normalised L1 error of 1e-6, damping 0.85; "
        f"NetworkX with tol = (1-d)*1e-6/N; kernels compiled beforehand ({_fmt_time(s['kernel_warm_up_seconds'])})",
        "",
    ]
    out += [f"Not measured: {LABELS[name]} ({why})" for name, why in report.get("missing_contenders", {}).items()]
    out += _graph_lines(report) + [""]
    out += [f"Update batches of mixed events (80 % inserts of new edges drawn like the graph's, 20 % deletes of "
            f"present edges, shuffled) on the {s['size']} graph", ""]
    out += _batch_tables(report["batches"]) + [""]
    out += _scaling_lines(report) + [""]
    if "personalized" in report:
        out += _profile_lines(report["personalized"]) + [""]
    out += _throughput_lines(report["throughput"])
    out += (_backlog_lines(report["backlog"]) if "backlog" in report else []) + [""]
    out += _snapshot_lines(report["snapshot"]) + [""]
    out += _replay_lines(report["replay"]) + [""]
    out += _e2e_lines(report["end_to_end"]) + [""]
    out += _real_lines(report["real_graph"]) + [""]
    out += [
        f"Headline: speedup over the warm start at {report['speedup_vs_warm_start_batch']:,}-event batches "
        f"{report['speedup_vs_warm_start']:,.1f}x; engine {report['events_per_second']:,.0f} events/s "
        f"(apply + settle, 50k micro-batches); end to end "
        + (f"{report['end_to_end_events_per_second']:,.0f} events/s (JSON messages)"
           if report["end_to_end_events_per_second"] else "skipped"),
        "Notes: times are medians of the repeats measured in this run on a shared machine; quote ratios, not "
        "absolute figures. The SciPy contenders are timed without building P^T (shown apart under Work); "
        "NetworkX and igraph are timed without building their graph objects. NetworkX runs on tiny and small "
        "graphs only. The warm start begins each batch from the exact solution of the graph before it (certified "
        "1e-11), while ranktide carries its own estimate from batch to batch (certified <= 1e-6).",
    ]
    return "\n".join(out)
