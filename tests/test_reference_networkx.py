"""The engine against NetworkX's ``pagerank`` (outside reference).

Source: ``networkx.pagerank`` (NetworkX 3.x, SciPy power iteration). With
``dangling=None`` NetworkX sends the mass of dangling nodes along the
personalization (teleport) distribution, the convention the engine solves
for; self-loops of a ``DiGraph`` are kept as ordinary edges by
``nx.to_scipy_sparse_array``, so they count in the out-weight there as here.

Every graph reaches the engine through events (``EventBatch.edges`` and
``EventBatch.seeds``) that include wrong first weights, re-weights, decoy
edges deleted later, deletes of edges that never existed and removed seeds,
so the final graph differs from what was first inserted. The engine settles
to a certified 1e-10 and must agree with NetworkX (run to ``tol=1e-15``)
within 1e-9 in normalised L1; ``Engine.exact_scores`` (certified 1e-12) must
agree within 1e-11.
"""

from __future__ import annotations

import networkx as nx
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
    undirected_model,
)
from ranktide.solver import GLOBAL

TOLERANCE = 1e-10


def check_against_networkx(model: GraphModel, seed: int, damping: float = 0.85) -> None:
    """Build ``model`` by events, then compare every profile with NetworkX."""
    ranker = build_ranker(event_script(model, np.random.default_rng(seed)), damping=damping, tolerance=TOLERANCE)
    assert engine_edges(ranker) == model.edges
    assert set(ranker.node_names().to_pylist()) == set(model.nodes)
    for profile in [GLOBAL, *model.seeds]:
        reference = nx_pagerank(model, profile, damping)  # NetworkX pagerank, tol=1e-15
        assert ranker.certified_bound(profile) <= TOLERANCE
        assert l1_distance(scores_by_name(ranker, profile), reference) < 1e-9, profile
        assert l1_distance(exact_by_name(ranker, profile), reference) < 1e-11, profile


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
def test_random_weighted_graphs_with_dangling_nodes_and_self_loops(seed: int) -> None:
    """Random weighted digraphs, global and two personalizations (NetworkX pagerank)."""
    rng = np.random.default_rng(seed)
    model = random_model(rng, n=80, m=320, n_dangling=8, n_isolated=3, n_selfloops=5,
                         seed_profiles={"trusted": 4, "team": 1})
    graph = model.to_networkx()
    assert nx.number_of_selfloops(graph) == 5
    assert sum(1 for x in graph if graph.out_degree(x) == 0) >= 8 + 3
    check_against_networkx(model, seed)


@pytest.mark.parametrize("damping", [0.5, 0.95])
def test_other_damping_factors(damping: float) -> None:
    """The same comparison away from the default damping (NetworkX pagerank, alpha=damping)."""
    rng = np.random.default_rng(11)
    model = random_model(rng, n=50, m=150, n_dangling=5, n_isolated=2, n_selfloops=3, seed_profiles={"trusted": 3})
    check_against_networkx(model, 11, damping)


def test_karate_club_both_directions() -> None:
    """Zachary's karate club as bundled with NetworkX, each weighted edge both ways.

    Personalized on nodes 0 and 33, the two club leaders of Zachary's study.
    """
    model = undirected_model(nx.karate_club_graph(), weight="weight")
    model.seeds["leaders"] = {"0": 1.0, "33": 1.0}
    assert len(model.nodes) == 34 and len(model.edges) == 2 * 78
    check_against_networkx(model, 34)


def test_les_miserables_weighted() -> None:
    """The Les Miserables co-appearance graph bundled with NetworkX (weighted), both ways."""
    model = undirected_model(nx.les_miserables_graph(), weight="weight")
    model.seeds["valjean"] = {"Valjean": 2.0, "Cosette": 1.0}
    assert len(model.nodes) == 77 and len(model.edges) == 2 * 254
    check_against_networkx(model, 77)


def test_node_that_only_loops_on_itself() -> None:
    """A node whose one out-edge is a self-loop is not dangling: its walk stays put.

    NetworkX keeps the self-loop as an edge, so the node keeps its mass with
    probability ``d`` instead of jumping; the engine must agree.
    """
    model = GraphModel()
    for u, v, w in [("a", "b", 1.0), ("b", "c", 2.0), ("c", "a", 1.0), ("c", "s", 0.5), ("s", "s", 3.0), ("d", "a", 1.0)]:
        model.insert(u, v, w)
    model.seeds["from_d"] = {"d": 1.0}
    check_against_networkx(model, 5)
