"""The per-node contract in ``ranktide bench``: every score within relative ``rtol``.

Every contender must promise the same thing: each published score within
relative ``rtol`` (default 1e-3) of the exact PageRank.

* ranktide: ``Engine.apply`` + ``Engine.settle`` under ``rtol``;
* the warm start, *certified*: SciPy power iteration from the exact solution
  before the batch, stopped when its own residual certifies the same per-node
  bound (:func:`solver.exact.solve_to_rtol`): what a careful user must do to
  promise it;
* the warm start with an *oracle* stop: the same iteration stopped at the first
  iterate (after at least one step) whose measured error against the exact
  solution, which no user has, meets ``rtol``; only its mat-vecs are timed:
  its best case;
* the certified cold start, igraph PRPACK (cold, to its own accuracy) and
  NetworkX (small graphs).

Each batch's published scores are checked against the exact solve: every
node within its certified bound and within ``rtol``. The certificate itself
(one pass over the nodes) is what publishing costs; it is not part of the
settle and is timed apart.
"""

from __future__ import annotations

import copy
import time

import numpy as np

from ranktide.replay.bench_common import DAMPING, REFERENCE_TOL, SEEDS_PER_PROFILE, _median, _progress, _say, _timed
from ranktide.replay.bench_contenders import igraph_prpack, networkx_pagerank, Context
from ranktide.replay.bench_workloads import EdgeSet, Loaded, mixed_batch
from ranktide.solver import OP_SEED, Engine
from ranktide.solver.exact import solve, solve_to_rtol, transition_transpose

#: The contract measured (the engine's default).
RTOL = 1e-3
#: Single events timed for the latency figures.
LATENCY_EVENTS = 300
#: Batches of the push-cost stream, and their size.
STREAM_BATCHES = 200
STREAM_BATCH = 10
#: Personalizations of the personalized stream, and its batch size.
PERSONAL_PROFILES = 3
PERSONAL_BATCH = 10


def _exact(eng: Engine, previous: dict[str, np.ndarray]) -> tuple[dict[str, np.ndarray], object, float]:
    """Every profile solved to a certified 1e-11 (warm from ``previous``); the matrix and its build time."""
    n = eng.n_nodes
    src, dst, w = eng.graph.edge_list()
    PT, pt_s = _timed(lambda: transition_transpose(src, dst, w, n))
    out = {p: solve(PT, eng.teleport_vector(p), DAMPING, REFERENCE_TOL, x0=previous.get(p)).x for p in eng.profiles}
    return out, (src, dst, w, PT), pt_s


def _relative_error(scores: np.ndarray, x: np.ndarray, threshold: float | None = None) -> float:
    """Largest ``|score - exact| / exact`` (over the nodes at or above ``threshold`` when given)."""
    exact = x / x.sum()
    keep = exact > 0 if threshold is None else scores >= threshold
    return float((np.abs(scores[keep] - exact[keep]) / exact[keep]).max(initial=0.0))


def _oracle(PT, s: np.ndarray, x0: np.ndarray, x_exact: np.ndarray, threshold: float | None) -> tuple[float, int]:
    """Seconds and iterations of the warm start stopped when its *measured* error meets ``RTOL``."""
    a = 1.0 - DAMPING
    base = a * s
    x = x0.copy()
    seconds = 0.0
    for it in range(1, 10_000):
        # a recompute computes at least one iterate: the start alone (the last exact solution,
        # often within rtol of the new one after a few events) is not an answer
        if it > 1 and _relative_error(x / x.sum(), x_exact, threshold) <= RTOL:
            return seconds, it - 1
        started = time.perf_counter()
        x = base + DAMPING * (PT @ x)
        seconds += time.perf_counter() - started
    return seconds, 10_000


class PerNodeRun:
    """An engine under the per-node contract over a copy of the bench's graph."""

    def __init__(self, loaded: Loaded, seed: int) -> None:
        self.engine = copy.deepcopy(loaded.engine)
        self.engine.set_targets(rtol=RTOL, tolerance=None)
        self.engine.settle()
        self.edges = loaded.edges.copy()
        self.sampler = loaded.sampler
        self.rng = np.random.default_rng(seed)
        self.x_exact, _, _ = _exact(self.engine, {})
        self.push_log: list[tuple[float, int, int, float]] = []  # (settle seconds, push edges, sweeps, push seconds)

    def step(self, size: int) -> tuple[float, float, object]:
        """Apply and settle one batch of ``size`` mixed events; return the seconds, the settle's and its work."""
        eng = self.engine
        batch = mixed_batch(size, self.edges, self.sampler, self.rng)
        started = time.perf_counter()
        eng.apply(batch.op, batch.src, batch.dst, batch.weight)
        settle_started = time.perf_counter()
        stats = eng.settle()
        ended = time.perf_counter()
        self.edges.update(batch.inserted, batch.deleted)
        self.push_log.append((ended - settle_started, stats.push_edges, stats.sweeps, stats.push_seconds))
        return ended - started, ended - settle_started, stats

    def measure(self, size: int, contenders: list[str], profiles: list[str]) -> dict:
        """One batch through ranktide and every contender; errors checked against the exact solve."""
        eng = self.engine
        seconds, settle_s, stats = self.step(size)
        x_new, (src, dst, w, PT), pt_s = _exact(eng, self.x_exact)
        row: dict = {"ranktide": {"seconds": seconds, "settle_seconds": settle_s, "push_edges": stats.push_edges,
                                  "sweeps": stats.sweeps, "edge_touches": stats.edge_touches}}
        cert_s = 0.0
        worst_rel, within = 0.0, True
        for p in profiles:
            cert, t = _timed(lambda: eng.certificate(p))
            cert_s += t
            exact = x_new[p] / x_new[p].sum()
            within &= bool(np.all(np.abs(cert.scores - exact) <= cert.bounds + 1e-15))
            worst_rel = max(worst_rel, _relative_error(cert.scores, x_new[p], None if p == "global" else cert.threshold))
        row["ranktide"].update(certificate_seconds=cert_s, max_relative_error=worst_rel, within_bounds=within)
        xbar_g = x_new["global"] * (1 + 1e-9)
        for name in contenders:
            total, iters, worst = 0.0, 0, 0.0
            for p in profiles:
                s = eng.teleport_vector(p)
                personal = p != "global"
                top = eng.certified_top if personal else None
                if name == "oracle_warm_start":
                    threshold = eng.certificate(p).threshold if personal else None
                    t, it = _oracle(PT, s, self.x_exact[p], x_new[p], threshold)
                    total, iters = total + t, iters + it
                    continue
                if name in ("warm_start", "cold_start"):
                    x0 = self.x_exact[p] if name == "warm_start" else None
                    sol, t = _timed(lambda: solve_to_rtol(PT, s, DAMPING, RTOL, x0=x0,
                                                          xbar_g=xbar_g if personal else None, certified_top=top))
                    total, iters = total + t, iters + sol.iterations
                    worst = max(worst, _relative_error(sol.scores, x_new[p], None))
                elif not personal:
                    ctx = Context(eng.n_nodes, src, dst, w, PT, pt_s, s, self.x_exact[p])
                    m = (igraph_prpack if name == "igraph_prpack" else networkx_pagerank)(ctx)
                    total += m.seconds
                    worst = max(worst, _relative_error(m.scores, x_new[p]))
            row[name] = {"seconds": total, "iterations": iters, "max_relative_error": worst}
        self.x_exact = x_new
        return row


def _summary(size: int, rows: list[dict]) -> dict:
    out: dict = {"batch": size, "repeats": len(rows)}
    for name in rows[0]:
        vals = [r[name] for r in rows]
        item = {"seconds_per_batch": _median([v["seconds"] for v in vals])}
        for key in ("iterations", "certificate_seconds", "edge_touches", "sweeps"):
            if key in vals[0]:
                item[key] = _median([v[key] for v in vals])
        if "edge_touches" in item:
            item["edge_touches_per_event"] = item.pop("edge_touches") / size
        if "max_relative_error" in vals[0]:
            item["max_relative_error"] = max(v["max_relative_error"] for v in vals)
        if "within_bounds" in vals[0]:
            item["within_bounds"] = all(v["within_bounds"] for v in vals)
        out[name] = item
    base = out["ranktide"]["seconds_per_batch"]
    out["speedup"] = {name: out[name]["seconds_per_batch"] / base for name in rows[0] if name != "ranktide"}
    return out


def _latency(run: PerNodeRun, count: int) -> dict:
    """Apply + settle of single events, one at a time: percentiles in milliseconds."""
    times = np.array([run.step(1)[0] for _ in range(count)]) * 1e3
    return {"events": count, "p50": float(np.percentile(times, 50)), "p99": float(np.percentile(times, 99)),
            "max": float(times.max())}


def _stream(run: PerNodeRun) -> dict:
    """Batches of :data:`STREAM_BATCH` events back to back, as a service sees them; and the push cost.

    No contender runs between these batches to evict the engine's arrays from
    the caches (the batch table measures each batch right after the
    contenders). ``push_ns_per_edge`` is the push kernels' time over pushed
    edges, over the single events of the latency figures and these batches,
    leaving out settles that needed a sweep: the cost of a pushed edge, the
    kernels' call and queue work included. ``settle_ns_per_edge`` is the whole
    settle's time over the same edges: it adds the settle's fixed cost in
    Python (about 15 microseconds), which single events feel most.
    """
    times = np.array([run.step(STREAM_BATCH)[0] for _ in range(STREAM_BATCHES)]) * 1e3
    push_only = [v for v in run.push_log if v[2] == 0 and v[1] > 0]
    edges = sum(v[1] for v in push_only)
    push_ns = 1e9 * sum(v[3] for v in push_only) / edges if push_only else None
    settle_ns = 1e9 * sum(v[0] for v in push_only) / edges if push_only else None
    return {"batch": STREAM_BATCH, "batches": STREAM_BATCHES, "p50_ms": float(np.percentile(times, 50)),
            "p99_ms": float(np.percentile(times, 99)), "push_ns_per_edge": push_ns,
            "settle_ns_per_edge": settle_ns}


def _backlog(run: PerNodeRun, micro_batch: int, count: int, settle_interval: float) -> dict:
    """Events per second with settling on the service's backlog schedule (engine time only)."""
    eng = run.engine
    engine_s = since = 0.0
    settles = 0
    for i in range(count):
        b = mixed_batch(micro_batch, run.edges, run.sampler, run.rng)
        _, t = _timed(lambda: eng.apply(b.op, b.src, b.dst, b.weight))
        engine_s, since = engine_s + t, since + t
        run.edges.update(b.inserted, b.deleted)
        if since >= settle_interval or i == count - 1:
            _, t = _timed(eng.settle)
            engine_s, since, settles = engine_s + t, 0.0, settles + 1
    cert = eng.certificate("global")
    return {"micro_batch": micro_batch, "micro_batches": count, "events": micro_batch * count,
            "settles": settles, "events_per_second": micro_batch * count / engine_s,
            "rtol_reached": cert.rtol_reached}


def _seed(run: PerNodeRun, count: int) -> list[str]:
    eng = run.engine
    names = []
    for i in range(count):
        name = f"profile-{i + 1}"
        row = eng.add_profile(name)
        seeds = run.rng.choice(eng.n_nodes, size=min(SEEDS_PER_PROFILE, eng.n_nodes), replace=False)
        eng.apply(np.full(seeds.size, OP_SEED, np.int8), seeds, np.full(seeds.size, row), np.ones(seeds.size))
        names.append(name)
    eng.settle()
    run.x_exact, _, _ = _exact(eng, run.x_exact)
    return names


def measure_per_node(loaded: Loaded, sizes: list[int], repeats: int, seed: int, contenders: list[str],
                     micro_batch: int, backlog_batches: int, settle_interval: float) -> dict:
    """The ``per_node`` section of the report (batches, latency, backlog, personalized stream)."""
    _say(f"per-node contract (rtol {RTOL:g})")
    run = PerNodeRun(loaded, seed + 101)
    names = ["warm_start", "oracle_warm_start", "cold_start"] + contenders
    rows = []
    bar = _progress(len(sizes) * repeats, "per-node batches")
    try:
        for size in sizes:
            rows.append(_summary(size, [run.measure(size, names, ["global"]) for _ in range(repeats)]))
            bar.update(repeats)
    finally:
        bar.close()
    run.push_log.clear()
    latency = _latency(run, LATENCY_EVENTS)
    stream = _stream(run)
    backlog = _backlog(PerNodeRun(loaded, seed + 103), micro_batch, backlog_batches, settle_interval)
    profiles = _seed(run, PERSONAL_PROFILES)
    personal = _summary(PERSONAL_BATCH, [run.measure(PERSONAL_BATCH, ["warm_start", "oracle_warm_start"],
                                                     ["global", *profiles]) for _ in range(repeats)])
    by_size = {str(r["batch"]): r for r in rows}
    return {
        "rtol": RTOL,
        "batches": rows,
        "speedup_vs_warm_start": {k: r["speedup"]["warm_start"] for k, r in by_size.items()},
        "speedup_vs_oracle_warm_start": {k: r["speedup"]["oracle_warm_start"] for k, r in by_size.items()},
        "speedup_vs_cold_start": {k: r["speedup"]["cold_start"] for k, r in by_size.items()},
        "latency_ms": latency,
        "events_per_second": backlog["events_per_second"],
        "backlog": backlog,
        "personalized": {"profiles": PERSONAL_PROFILES, "batch": PERSONAL_BATCH, **personal},
        "stream": stream,
        "push_ns_per_edge": stream["push_ns_per_edge"],
        "settle_ns_per_edge": stream["settle_ns_per_edge"],
        "max_relative_error": max(r["ranktide"]["max_relative_error"] for r in rows),
        "within_bounds": all(r["ranktide"]["within_bounds"] for r in rows),
    }


def main(argv: list[str] | None = None) -> int:
    """``python -m ranktide.replay.bench_per_node``: the per-node section of ``ranktide bench`` alone."""
    import argparse
    import json

    from ranktide.replay.bench_common import BACKLOG_BATCHES, machine_info
    from ranktide.replay.bench_contenders import missing_contenders
    from ranktide.replay.bench_engine import reserve_for
    from ranktide.replay.bench_options import SIZES, _batch_list
    from ranktide.replay.bench_report import _per_node_lines
    from ranktide.replay.bench_workloads import generated, load_graph, warm_up_kernels
    from ranktide.stream.config import ServiceConfig

    p = argparse.ArgumentParser(prog="python -m ranktide.replay.bench_per_node",
                                description="The per-node contract of ranktide bench alone: ranktide against the "
                                            "certified and oracle warm starts, latency, push cost, backlog and a "
                                            "personalized stream, on one generated graph.")
    p.add_argument("--size", choices=list(SIZES), default="medium", help="generated graph (default medium)")
    p.add_argument("--batches", type=_batch_list, default=[1, 10, 100, 1000],
                   help="batch sizes, comma-separated (default 1,10,100,1000)")
    p.add_argument("--repeats", type=int, default=3, help="batches measured per size (default 3)")
    p.add_argument("--seed", type=int, default=0, help="seed of the graph and events (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    args = p.parse_args(argv)
    warm_up_kernels()
    src, dst, sampler, info = generated(args.size, args.seed)
    loaded = load_graph(SIZES[args.size][0], src, dst, np.ones(src.size), sampler)
    reserve_for(loaded, args.batches + [STREAM_BATCH] * STREAM_BATCHES, args.repeats)
    outside = [c for c in ("igraph_prpack",) if c not in missing_contenders()]
    config = ServiceConfig()
    report = {"machine": machine_info(), "graph": info, "load": loaded.info,
              "per_node": measure_per_node(loaded, args.batches, args.repeats, args.seed, outside, config.micro_batch,
                                           BACKLOG_BATCHES[args.size], config.settle_interval)}
    print(json.dumps(report, indent=1, default=float) if args.json else "\n".join(_per_node_lines(report["per_node"])))
    return 0


if __name__ == "__main__":
    import sys

    sys.exit(main())
