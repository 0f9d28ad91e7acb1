"""A weighted digraph with dangling and isolated nodes and a personalization, and its references.

References named beside each check: NetworkX ``pagerank`` (dangling nodes jump
by the teleport distribution, the engine's convention) and SciPy through the
engine's own exact solve (``solver.exact.solve`` to 1e-14).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ranktide.solver.exact import solve, transition_transpose

SEEDS = {"n3": 2.0, "n12": 1.0, "n44": 0.5}  # n44 has no edges: an isolated seed


@dataclass
class Graph:
    nodes: list[str]
    edges: dict[tuple[str, str], float]


def make_graph(seed: int = 5, n: int = 45, m: int = 150) -> Graph:
    """Nodes n0..n{n-1}: n0..n5 never have out-edges (dangling), n40.. have no edges at all (isolated)."""
    rng = np.random.default_rng(seed)
    edges: dict[tuple[str, str], float] = {}
    while len(edges) < m:
        u, v = int(rng.integers(6, 40)), int(rng.integers(0, 40))
        edges[(f"n{u}", f"n{v}")] = float(rng.choice([0.5, 1.0, 2.5, 4.0]))
    edges[("n7", "n7")] = 1.5  # a self-loop
    return Graph([f"n{i}" for i in range(n)], edges)


def write_tables(graph: Graph, folder: Path, parts: int = 3) -> tuple[Path, Path, Path]:
    """The edge table as ``parts`` part files (plus a _SUCCESS marker), the node table, a seeds file."""
    folder.mkdir(parents=True, exist_ok=True)
    items = sorted(graph.edges.items())
    table = pa.table({"src": [s for (s, _), _ in items], "dst": [d for (_, d), _ in items],
                      "weight": [w for _, w in items]})
    edges = folder / "edges"
    edges.mkdir()
    step = -(-table.num_rows // parts)
    for i in range(parts):
        pq.write_table(table.slice(i * step, step), edges / f"part-{i:05d}.parquet")
    (edges / "_SUCCESS").write_bytes(b"")
    nodes = folder / "nodes.parquet"
    pq.write_table(pa.table({"node": graph.nodes}), nodes)
    seeds = folder / "trusted.txt"
    seeds.write_text("".join(f"{k},{v}\n" for k, v in SEEDS.items()))
    return edges, nodes, seeds


def networkx_scores(graph: Graph, personalization: dict[str, float] | None = None) -> dict[str, float]:
    """NetworkX ``pagerank`` (damping 0.85) to 1e-15."""
    g = nx.DiGraph()
    g.add_nodes_from(graph.nodes)
    g.add_weighted_edges_from((s, d, w) for (s, d), w in graph.edges.items())
    return nx.pagerank(g, alpha=0.85, personalization=personalization, tol=1e-15, max_iter=100_000)


def exact_scores(graph: Graph, teleport: dict[str, float] | None = None) -> dict[str, float]:
    """The engine's own exact solve (SciPy power iteration to a certified 1e-14)."""
    index = {v: i for i, v in enumerate(graph.nodes)}
    src = np.array([index[s] for s, _ in graph.edges])
    dst = np.array([index[d] for _, d in graph.edges])
    w = np.array(list(graph.edges.values()))
    s = np.ones(len(index)) if teleport is None else np.array([teleport.get(v, 0.0) for v in graph.nodes])
    x = solve(transition_transpose(src, dst, w, len(index)), s, 0.85, tol=1e-14).scores
    return dict(zip(graph.nodes, x))


def snapshot_scores(snap: Path, profile: str) -> dict[str, tuple[float, float]]:
    """node -> (score, error_bound) of one profile of a snapshot."""
    rows = pq.read_table(snap / "scores.parquet").to_pylist()
    return {r["node"]: (r["score"], r["error_bound"]) for r in rows if r["profile"] == profile}


def check_against_references(graph: Graph, snap: Path, within: float) -> None:
    """Every node of both profiles: NetworkX and the exact solve within ``within`` and within its error_bound."""
    for profile, teleport in (("global", None), ("trusted", SEEDS)):
        ours = snapshot_scores(snap, profile)
        ref_nx = networkx_scores(graph, teleport)
        ref_exact = exact_scores(graph, teleport)
        assert set(ours) <= set(graph.nodes)
        if profile == "global":
            assert set(ours) == set(graph.nodes)
        for node in graph.nodes:
            score, bound = ours.get(node, (0.0, 0.0))
            for name, ref in (("NetworkX pagerank", ref_nx), ("exact solve", ref_exact)):
                error = abs(score - ref[node])
                assert error <= within, f"{profile}/{node}: {error:.3e} from {name}"
                if node in ours:
                    assert error <= bound + 1e-14, f"{profile}/{node}: {error:.3e} from {name} above its bound {bound:.3e}"
