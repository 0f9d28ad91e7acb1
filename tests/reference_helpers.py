"""Helpers shared by the reference tests.

Everything here is independent of the engine's own arithmetic: the expected
graph is kept in plain dictionaries (:class:`GraphModel`), reference scores
come from NetworkX or from a direct SciPy solve of ``x = a s + d P^T x``, and
the engine is only driven through its public event API (``Ranker`` with
``EventBatch``) and read back by node name.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import networkx as nx
import numpy as np
import pyarrow as pa
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ranktide.solver import GLOBAL, OP_DELETE, OP_INSERT, OP_SEED, EventBatch, Ranker

Edge = tuple[str, str]

#: NetworkX's stopping rule is ``sum|x_k - x_{k-1}| < N * tol``; with
#: ``tol = 1e-15`` the remaining L1 error is below ``N * 1e-15 * d / (1 - d)``,
#: about 1e-12 for the graphs used here, far below every comparison made.
NX_TOL = 1e-15
NX_MAX_ITER = 100_000


@dataclass
class GraphModel:
    """The state a sequence of events should leave behind, in plain dicts.

    ``insert`` sets a weight, ``delete`` removes an edge, ``seed`` sets a
    teleport weight (0 removes it); each returns False for a valid event that
    changes nothing. A node exists from the first event that names it.
    """

    nodes: dict[str, None] = field(default_factory=dict)
    edges: dict[Edge, float] = field(default_factory=dict)
    seeds: dict[str, dict[str, float]] = field(default_factory=dict)

    def touch(self, *names: str) -> None:
        for name in names:
            self.nodes.setdefault(name, None)

    def insert(self, u: str, v: str, w: float = 1.0) -> bool:
        self.touch(u, v)
        changed = self.edges.get((u, v)) != w
        self.edges[(u, v)] = w
        return changed

    def delete(self, u: str, v: str) -> bool:
        self.touch(u, v)
        return self.edges.pop((u, v), None) is not None

    def seed(self, profile: str, node: str, w: float) -> bool:
        self.touch(node)
        weights = self.seeds.setdefault(profile, {})
        changed = weights.get(node, 0.0) != w
        if w == 0.0:
            weights.pop(node, None)
        else:
            weights[node] = w
        return changed

    def teleport(self, profile: str = GLOBAL) -> dict[str, float]:
        """Unnormalised teleport weights: 1 on every node for the global profile."""
        if profile == GLOBAL:
            return {name: 1.0 for name in self.nodes}
        return dict(self.seeds.get(profile, {}))

    def to_networkx(self) -> nx.DiGraph:
        """The model as a weighted DiGraph (self-loops kept as ordinary edges)."""
        g = nx.DiGraph()
        g.add_nodes_from(self.nodes)
        g.add_weighted_edges_from((u, v, w) for (u, v), w in self.edges.items())
        return g


# ---------------------------------------------------------------- random graphs


def random_model(
    rng: np.random.Generator,
    n: int,
    m: int,
    n_dangling: int,
    n_isolated: int,
    n_selfloops: int,
    seed_profiles: dict[str, int] | None = None,
) -> GraphModel:
    """A random weighted digraph with dangling nodes, isolated nodes and self-loops.

    Nodes ``v0 .. v{n-1}``; the first ``n_dangling`` have no out-edge, the
    last ``n_isolated`` no edge at all. ``seed_profiles`` maps a profile name
    to how many seeds it gets (random nodes, random weights).
    """
    names = [f"v{i}" for i in range(n)]
    model = GraphModel()
    model.touch(*names)
    senders = names[n_dangling : n - n_isolated]
    receivers = names[: n - n_isolated]
    while len(model.edges) < m:
        u, v = rng.choice(senders), rng.choice(receivers)
        if u != v:
            model.edges[(str(u), str(v))] = float(np.round(rng.uniform(0.1, 5.0), 3))
    for u in rng.choice(senders, size=n_selfloops, replace=False):
        model.edges[(str(u), str(u))] = float(np.round(rng.uniform(0.1, 5.0), 3))
    for profile, count in (seed_profiles or {}).items():
        chosen = rng.choice(names, size=count, replace=False)
        model.seeds[profile] = {str(x): float(np.round(rng.uniform(0.5, 3.0), 2)) for x in chosen}
    return model


def undirected_model(graph: nx.Graph, weight: str | None = "weight") -> GraphModel:
    """Each undirected edge of ``graph`` as two directed edges of equal weight."""
    model = GraphModel()
    model.touch(*(str(x) for x in graph.nodes))
    for u, v, data in graph.edges(data=True):
        w = float(data.get(weight, 1.0)) if weight else 1.0
        model.edges[(str(u), str(v))] = w
        model.edges[(str(v), str(u))] = w
    return model


# ---------------------------------------------------------------- driving the engine


def event_script(model: GraphModel, rng: np.random.Generator, ghosts: int = 3) -> list[EventBatch]:
    """Batches of events whose final state is ``model`` but whose path is not direct.

    Batch 1 inserts every final edge (a third with a wrong weight), decoy
    edges that are deleted later (some from dangling and isolated nodes, so
    those nodes exist only through edges that disappear), and seeds including
    decoy seeds. Batch 2 re-weights, deletes the decoys, deletes edges that
    never existed, re-delivers some inserts unchanged, removes decoy seeds and
    re-weights seeds. Within each batch the order is random.

    ``ghosts`` of the missing-edge deletes start at new names ``ghost0, ...``;
    such a delete still creates its nodes (a node exists from its first valid
    event), so they are added to ``model`` as isolated nodes.
    """
    nodes = list(model.nodes)
    final = list(model.edges.items())
    wrong = rng.random(len(final)) < 1 / 3
    first = [(u, v, w + 1.5 if bad else w) for ((u, v), w), bad in zip(final, wrong)]
    decoys: list[Edge] = []
    touched: set[str] = set()
    while len(decoys) < max(len(final) // 4, 1) or touched != set(nodes):
        if touched != set(nodes):  # every node gets a decoy edge, so it exists via events
            u = next(x for x in nodes if x not in touched)
            v = str(rng.choice(nodes))
        else:
            u, v = str(rng.choice(nodes)), str(rng.choice(nodes))
        if (u, v) not in model.edges and (u, v) not in decoys:
            decoys.append((u, v))
            touched.update((u, v))
    first += [(u, v, float(rng.uniform(0.1, 4.0))) for u, v in decoys]
    order = rng.permutation(len(first))
    batches = [EventBatch.edges(*_columns([first[i] for i in order]))]

    second_ins = [(u, v, w) for ((u, v), w), bad in zip(final, wrong) if bad]
    second_ins += [(u, v, w) for ((u, v), w), bad in zip(final, wrong) if not bad and rng.random() < 0.2]
    missing = [(str(rng.choice(nodes)), str(rng.choice(nodes))) for _ in range(3)]
    missing = [e for e in missing if e not in model.edges and e not in decoys]
    ghost_edges = [(f"ghost{i}", str(rng.choice(nodes))) for i in range(ghosts)]
    model.touch(*(u for u, _ in ghost_edges))
    second_del = decoys + missing + ghost_edges
    ins_order, del_order = rng.permutation(len(second_ins)), rng.permutation(len(second_del))
    batches.append(
        EventBatch.concat(
            [
                EventBatch.edges(*_columns([second_ins[i] for i in ins_order])),
                EventBatch.edges(*_columns([(*second_del[i], 1.0) for i in del_order]), delete=True),
            ]
        )
    )
    for profile, weights in model.seeds.items():
        decoy = [x for x in nodes if x not in weights][:2]
        names = list(weights) + decoy
        start = [weights.get(x, 1.0) * (2.0 if i % 2 else 1.0) for i, x in enumerate(names)]
        batches.insert(1, EventBatch.seeds(profile, names, start))
        batches.append(EventBatch.seeds(profile, names, [weights.get(x, 0.0) for x in names]))
    return batches


def _columns(rows: list[tuple[str, str, float]]) -> tuple[list[str], list[str], list[float]]:
    return [r[0] for r in rows], [r[1] for r in rows], [r[2] for r in rows]


def mixed_batch(events: list[tuple[str, str, str, float]]) -> EventBatch:
    """One batch of mixed events ``(op, a, b, weight)``; for a seed ``a`` is the profile."""
    codes = {"insert": OP_INSERT, "delete": OP_DELETE, "seed": OP_SEED}
    op = np.array([codes[e[0]] for e in events], dtype=np.int8)
    src = [e[2] if e[0] == "seed" else e[1] for e in events]
    dst = [e[1] if e[0] == "seed" else e[2] for e in events]
    return EventBatch(op, pa.array(src, pa.string()), pa.array(dst, pa.string()), np.array([e[3] for e in events]))


def build_ranker(
    batches: list[EventBatch], damping: float = 0.85, tolerance: float = 1e-10, **capacity: int
) -> Ranker:
    """Apply ``batches`` in order, settling after each."""
    ranker = Ranker(damping=damping, tolerance=tolerance, **capacity)
    for batch in batches:
        ranker.apply(batch)
        ranker.settle()
    return ranker


# ---------------------------------------------------------------- reading by name


def scores_by_name(ranker: Ranker, profile: str = GLOBAL) -> dict[str, float]:
    return dict(zip(ranker.node_names().to_pylist(), ranker.scores(profile).tolist()))


def exact_by_name(ranker: Ranker, profile: str = GLOBAL) -> dict[str, float]:
    """``Engine.exact_scores`` keyed by node name."""
    return dict(zip(ranker.node_names().to_pylist(), ranker.engine.exact_scores(profile).tolist()))


def engine_edges(ranker: Ranker) -> dict[Edge, float]:
    """The edge set the engine holds, by name."""
    names = ranker.node_names().to_pylist()
    src, dst, w = ranker.engine.graph.edge_list()
    return {(names[u], names[v]): float(x) for u, v, x in zip(src, dst, w)}


def l1_distance(a: dict[str, float], b: dict[str, float]) -> float:
    """``sum |a - b|`` over the union of keys, a missing key counting as 0."""
    return float(sum(abs(a.get(k, 0.0) - b.get(k, 0.0)) for k in a.keys() | b.keys()))


# ---------------------------------------------------------------- reference values


def nx_pagerank(model: GraphModel, profile: str = GLOBAL, damping: float = 0.85) -> dict[str, float]:
    """NetworkX ``pagerank`` of the model, dangling nodes jumping by the teleport.

    ``dangling=None`` (the default) makes NetworkX send dangling mass along
    the personalization vector, which is the engine's convention.
    """
    personalization = None if profile == GLOBAL else model.teleport(profile)
    return nx.pagerank(
        model.to_networkx(),
        alpha=damping,
        personalization=personalization,
        tol=NX_TOL,
        max_iter=NX_MAX_ITER,
        weight="weight",
    )


def transition_transpose(names: list[str], edges: dict[Edge, float]) -> sp.csr_matrix:
    """``P^T`` with ``P[u, v] = w(u, v) / W(u)`` over ``names``; dangling columns zero."""
    index = {name: i for i, name in enumerate(names)}
    n = len(names)
    if not edges:
        return sp.csr_matrix((n, n))
    src = np.array([index[u] for u, _ in edges])
    dst = np.array([index[v] for _, v in edges])
    w = np.array(list(edges.values()))
    out_w = np.bincount(src, weights=w, minlength=n)
    return sp.csr_matrix((w / out_w[src], (dst, src)), shape=(n, n))


def direct_solve(PT: sp.csr_matrix, s: np.ndarray, damping: float) -> np.ndarray:
    """Unnormalised ``x`` solving ``(I - d P^T) x = a s`` by sparse LU (no iteration)."""
    n = PT.shape[0]
    A = (sp.identity(n, format="csc") - damping * PT).tocsc()
    return np.atleast_1d(spla.spsolve(A, (1.0 - damping) * s))


def exact_residual(PT: sp.csr_matrix, s: np.ndarray, p: np.ndarray, damping: float) -> np.ndarray:
    """``r = s - (I - d P^T) p / a``, the residual the engine must maintain."""
    return s - (p - damping * (PT @ p)) / (1.0 - damping)
