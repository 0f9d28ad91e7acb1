"""PageRank of an undirected graph as the minimiser of a quadratic programme.

Outside reference: ``scipy.optimize.minimize`` (L-BFGS-B with bounds) on the
quadratic below, which is derived here from the linear system of the design
notes (section 1); the variational form is the one the design notes (section
7) point to, whose wording ("x = D^(-1/2) r minimises ... over x") is loose
about which vector is the minimiser, so it is derived again.

Derivation. Let the graph be undirected: each edge in both directions with
the same weight, so the weighted adjacency A is symmetric (a self-loop
u -> u is one entry A_uu); D = diag(A 1) is the weighted degree, with no
isolated node. Then P = D^-1 A, P^T = A D^-1, and the engine's unnormalised
PageRank x solves

    x = a s + d A D^-1 x.

Put y = D^-1/2 x, i.e. x = D^1/2 y, and multiply by D^-1/2:

    y = a D^-1/2 s + d (D^-1/2 A D^-1/2) y,   i.e.   Q y = b,
    Q = I - d D^-1/2 A D^-1/2,   b = a D^-1/2 s.

D^-1/2 A D^-1/2 is symmetric and similar to P, so its eigenvalues lie in
[-1, 1]; Q is symmetric with eigenvalues in [1 - d, 1 + d], positive
definite. So f(y) = 1/2 y^T Q y - b^T y is strictly convex and its unique
stationary point Q y = b is its global minimiser. That point is
y = a Q^-1 D^-1/2 s = D^-1/2 x >= 0 (x = a sum_k (d P^T)^k s >= 0), so the
bound y >= 0 is inactive and it is also the minimiser over y >= 0. The
minimiser is y = D^-1/2 x, not x itself (x satisfies Q x = b only when all
degrees are equal); the test checks both statements.

Precision: L-BFGS-B stops once f no longer decreases in floating point,
which leaves y accurate to about 1e-9 relative (f is flat to second order),
so the comparison with SciPy is at 1e-7 relative. The optimality conditions
at the engine's own point are checked much tighter: the gradient Q y - b
equals -a D^-1/2 r for the engine's residual r, and must vanish to 1e-10.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.optimize

from reference_helpers import GraphModel, build_ranker, event_script, undirected_model
from ranktide.solver import GLOBAL

DAMPING = 0.85


def random_undirected(seed: int) -> nx.Graph:
    """A connected random graph with weights and one self-loop."""
    rng = np.random.default_rng(seed)
    graph = nx.gnm_random_graph(40, 110, seed=seed)
    graph = graph.subgraph(max(nx.connected_components(graph), key=len)).copy()
    for u, v in graph.edges:
        graph.edges[u, v]["weight"] = float(np.round(rng.uniform(0.2, 4.0), 2))
    loop = int(rng.choice(list(graph.nodes)))
    graph.add_edge(loop, loop, weight=2.5)
    return graph


def quadratic(model: GraphModel, names: list[str], profile: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``Q``, ``b`` and ``D^-1/2`` of the derivation, in the order of ``names``."""
    index = {x: i for i, x in enumerate(names)}
    n = len(names)
    adjacency = np.zeros((n, n))
    for (u, v), w in model.edges.items():
        adjacency[index[u], index[v]] = w
    assert np.array_equal(adjacency, adjacency.T)
    inv_sqrt_deg = 1.0 / np.sqrt(adjacency.sum(axis=1))
    s = np.zeros(n)
    for node, w in model.teleport(profile).items():
        s[index[node]] = w
    Q = np.eye(n) - DAMPING * inv_sqrt_deg[:, None] * adjacency * inv_sqrt_deg[None, :]
    b = (1.0 - DAMPING) * inv_sqrt_deg * s
    return Q, b, inv_sqrt_deg


def minimise(Q: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Minimise ``1/2 y^T Q y - b^T y`` over ``y >= 0`` with L-BFGS-B."""

    def objective(y: np.ndarray) -> tuple[float, np.ndarray]:
        gradient = Q @ y - b
        return float(0.5 * y @ (gradient - b)), gradient

    result = scipy.optimize.minimize(
        objective,
        np.zeros(b.size),
        jac=True,
        method="L-BFGS-B",
        bounds=[(0.0, None)] * b.size,
        options={"ftol": 1e-16, "gtol": 1e-14, "maxiter": 10_000, "maxcor": 30},
    )
    return result.x


CASES = {
    "karate": (nx.karate_club_graph(), {"0": 1.0, "33": 1.0}),
    "les_miserables": (nx.les_miserables_graph(), {"Valjean": 1.0}),
    "random_with_self_loop": (random_undirected(5), {"3": 2.0, "7": 1.0}),
}


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("profile", [GLOBAL, "seeded"])
def test_engine_estimate_minimises_the_quadratic(case: str, profile: str) -> None:
    graph, seeds = CASES[case]
    model = undirected_model(graph, weight="weight")
    model.seeds["seeded"] = {node: w for node, w in seeds.items() if node in model.nodes}
    assert model.seeds["seeded"]
    ranker = build_ranker(event_script(model, np.random.default_rng(1), ghosts=0), damping=DAMPING, tolerance=1e-12)
    names = ranker.node_names().to_pylist()
    engine = ranker.engine
    x = engine.P[engine.profile_index(profile), : engine.n_nodes]  # unnormalised estimate
    Q, b, inv_sqrt_deg = quadratic(model, names, profile)

    y_engine = inv_sqrt_deg * x
    y_scipy = minimise(Q, b)
    assert np.abs(y_engine - y_scipy).max() <= 1e-7 * np.abs(y_scipy).max()
    # optimality (KKT with the bound inactive) at the engine's point
    assert y_engine.min() >= -1e-15
    assert np.abs(Q @ y_engine - b).max() <= 1e-10 * np.abs(b).max()
    # the minimiser is D^-1/2 x; x itself is not (degrees differ in these graphs)
    assert np.abs(Q @ x - b).max() > 1e-3 * np.abs(b).max()
