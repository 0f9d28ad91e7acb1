"""The contenders ``ranktide bench`` measures ranktide against.

SciPy power iteration warm (from the exact solution before the batch, or from
its own last answer) and cold, NetworkX ``pagerank`` and python-igraph's
PRPACK, each to the same certified normalised L1 accuracy, with the graph
objects they need built outside the timed region.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ranktide.replay.bench_common import DAMPING, TOLERANCE, _timed
from ranktide.solver.exact import solve


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
