"""Engine measurements of ``ranktide bench``: update batches, throughput, profiles, snapshots.

Each batch goes through ranktide and every contender and is compared with an
exact solve (certified 1e-11); the engine's throughput is measured at the
service's micro-batch and on its backlog settle schedule; personalization
profiles, snapshot write and load, and the bundled real graph follow.
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from ranktide.replay.graphs import PowerLawSampler, bundled_real_graph
from ranktide.replay.bench_common import (
    DAMPING, INSERT_SHARE, REAL_GRAPH_BATCHES, REFERENCE_TOL, SEEDS_PER_PROFILE, SIZES, TOLERANCE,
    _median, _normalised, _progress, _say, _timed,
)
from ranktide.replay.bench_contenders import CONTENDERS, Context, Measure
from ranktide.replay.bench_workloads import Batch, EdgeSet, generated, load_graph, Loaded, mixed_batch
from ranktide.solver import OP_SEED, Engine, SettleStats
from ranktide.solver.exact import solve, transition_transpose
from ranktide.solver.metrics import l1_error


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
    edges = tr.loaded.edges.copy()
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

    ranker = Ranker(DAMPING, rtol=None, tolerance=TOLERANCE)
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


# ====================================================================== real graph


def measure_real_graph(repeats: int, seed: int, missing: dict[str, str] | None = None) -> dict:
    """The bundled real graph through the same installed contenders (small batches)."""
    from ranktide.replay.bench_contenders import INSTALL_EXTRAS

    try:
        g = bundled_real_graph()
    except ImportError as exc:
        return {"skipped": f"no real graph: neither onadata nor NetworkX is installed ({exc}); {INSTALL_EXTRAS}"}
    uniform = PowerLawSampler(g.n, np.arange(1, g.n + 1, dtype=np.float64), np.arange(1, g.n + 1, dtype=np.float64))
    loaded = load_graph(g.n, g.src, g.dst, g.weight, uniform)
    tr = start_tracker(loaded, seed)
    sizes = [b for b in REAL_GRAPH_BATCHES if 5 * b <= g.src.size]
    rows = run_batches(tr, sizes, repeats, [n for n in CONTENDERS if n not in (missing or {})], ["global"],
                       "real graph")
    return {"name": g.name, "description": g.description, "load": loaded.info, "batches": rows,
            "note": "the largest real graph found inside a registry package: onadata 0.1 (PyPI) ships the "
                    "Wikipedia vote network; without that package the bench falls back to NetworkX's "
                    "Les Misérables; no data set is downloaded at run time"}



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
