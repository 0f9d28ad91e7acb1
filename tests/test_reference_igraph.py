"""The engine against python-igraph's PRPACK solver (outside reference).

Source: ``igraph.Graph.pagerank`` and ``Graph.personalized_pagerank`` with
``implementation="prpack"`` (python-igraph 1.0). PRPACK solves the PageRank
linear system directly; for a vertex without out-edges it restarts from the
reset distribution, which is the engine's dangling convention.

Self-loops: igraph keeps a weighted self-loop as an out-edge in PRPACK (the
walk stays on the vertex with its share of the out-weight), the same as the
engine and NetworkX. This was checked before including them here, and
``test_igraph_and_networkx_agree`` below keeps checking it on graphs with
self-loops and dangling vertices: the design notes state that the two
references agree to about 1e-13 (measured here: a few 1e-14).
"""

from __future__ import annotations

import igraph as ig
import numpy as np
import pytest

from reference_helpers import (
    GraphModel,
    build_ranker,
    engine_edges,
    event_script,
    exact_by_name,
    l1_distance,
    nx_pagerank,
    random_model,
    scores_by_name,
)
from ranktide.solver import GLOBAL

TOLERANCE = 1e-10


def igraph_pagerank(model: GraphModel, profile: str = GLOBAL, damping: float = 0.85) -> dict[str, float]:
    """PRPACK scores of the model by node name (global or personalized)."""
    names = list(model.nodes)
    index = {name: i for i, name in enumerate(names)}
    graph = ig.Graph(n=len(names), edges=[(index[u], index[v]) for u, v in model.edges], directed=True)
    weights = list(model.edges.values())
    if profile == GLOBAL:
        scores = graph.pagerank(directed=True, damping=damping, weights=weights, implementation="prpack")
    else:
        reset = [0.0] * len(names)
        for node, w in model.teleport(profile).items():
            reset[index[node]] = w
        scores = graph.personalized_pagerank(
            vertices=None, directed=True, damping=damping, reset=reset, weights=weights, implementation="prpack"
        )
    return dict(zip(names, scores))


def seeded_model(seed: int) -> GraphModel:
    rng = np.random.default_rng(100 + seed)
    return random_model(rng, n=70, m=260, n_dangling=7, n_isolated=2, n_selfloops=4,
                        seed_profiles={"trusted": 5, "one": 1})


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_engine_matches_prpack(seed: int) -> None:
    """Global and personalized scores of random weighted graphs with dangling nodes and self-loops."""
    model = seeded_model(seed)
    ranker = build_ranker(event_script(model, np.random.default_rng(seed)), tolerance=TOLERANCE)
    assert engine_edges(ranker) == model.edges
    for profile in [GLOBAL, *model.seeds]:
        reference = igraph_pagerank(model, profile)  # igraph PRPACK
        assert ranker.certified_bound(profile) <= TOLERANCE
        assert l1_distance(scores_by_name(ranker, profile), reference) < 1e-9, profile
        assert l1_distance(exact_by_name(ranker, profile), reference) < 1e-11, profile


@pytest.mark.parametrize("seed", [0, 1])
def test_igraph_and_networkx_agree(seed: int) -> None:
    """The two outside references share the convention (design notes: ~1e-13 apart)."""
    model = seeded_model(seed)
    for profile in [GLOBAL, *model.seeds]:
        assert l1_distance(igraph_pagerank(model, profile), nx_pagerank(model, profile)) < 1e-12, profile


def test_dangling_seed_and_self_loop_only_node() -> None:
    """Seed on a dangling node; a node whose only out-edge is a self-loop (igraph PRPACK)."""
    model = GraphModel()
    for u, v, w in [("a", "b", 1.0), ("b", "c", 2.0), ("c", "a", 1.0), ("c", "s", 0.5), ("s", "s", 3.0), ("c", "e", 1.0)]:
        model.insert(u, v, w)
    model.seeds["sink"] = {"e": 1.0}
    model.seeds["loop"] = {"s": 2.0, "a": 1.0}
    ranker = build_ranker(event_script(model, np.random.default_rng(9)), tolerance=TOLERANCE)
    for profile in [GLOBAL, "sink", "loop"]:
        assert l1_distance(scores_by_name(ranker, profile), igraph_pagerank(model, profile)) < 1e-9, profile
