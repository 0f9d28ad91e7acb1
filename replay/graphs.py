"""Generated and bundled graphs for the benchmarks.

:func:`power_law_digraph` draws a Chung–Lu style directed graph: every node
gets an out-weight and an in-weight from Pareto distributions, an edge
``u -> v`` is drawn with probability proportional to ``out(u) * in(v)``,
duplicate pairs are removed and more pairs are drawn until the requested
edge count is reached. Everything is vectorised with numpy and seeded.

:func:`bundled_real_graph` gives the largest real graph that an installed
package ships: the Wikipedia vote network in ``onadata`` (7,115 nodes,
103,688 edges), else NetworkX's Les Misérables co-occurrence network; nothing
is downloaded at run time.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

#: Tail exponents of the degree distributions (density ~ k^-gamma).
OUT_EXPONENT = 2.4
IN_EXPONENT = 2.1


@dataclass
class PowerLawSampler:
    """Draws node pairs with probability proportional to ``out(u) * in(v)``.

    Attributes
    ----------
    n : int
        Number of nodes.
    out_cum, in_cum : float64 arrays
        Cumulative out- and in-weights (for inverse-transform sampling).
    """

    n: int
    out_cum: np.ndarray
    in_cum: np.ndarray

    @classmethod
    def create(cls, n: int, rng: np.random.Generator,
               out_exponent: float = OUT_EXPONENT, in_exponent: float = IN_EXPONENT) -> "PowerLawSampler":
        """Pareto weights for ``n`` nodes, capped at ``10 sqrt(n)`` times the smallest (tames the hubs)."""
        cap = max(np.sqrt(n), 2.0) * 10
        w_out = np.minimum(rng.pareto(out_exponent - 1.0, n) + 1.0, cap)
        w_in = np.minimum(rng.pareto(in_exponent - 1.0, n) + 1.0, cap)
        return cls(n, np.cumsum(w_out), np.cumsum(w_in))

    def pairs(self, count: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """``count`` independent draws of ``(src, dst)`` (duplicates possible)."""
        src = np.searchsorted(self.out_cum, rng.random(count) * self.out_cum[-1], side="right")
        dst = np.searchsorted(self.in_cum, rng.random(count) * self.in_cum[-1], side="right")
        np.minimum(src, self.n - 1, out=src)
        np.minimum(dst, self.n - 1, out=dst)
        return src.astype(np.int32), dst.astype(np.int32)


def pair_keys(src: np.ndarray, dst: np.ndarray, n: int) -> np.ndarray:
    """One int64 key per pair: ``src * n + dst``."""
    return src.astype(np.int64) * np.int64(n) + dst.astype(np.int64)


def power_law_digraph(n: int, m: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray, PowerLawSampler]:
    """A Chung–Lu power-law digraph with exactly ``m`` distinct edges.

    Parameters
    ----------
    n, m : int
        Nodes and distinct directed edges (self-loops allowed, as in the
        engine).
    seed : int
        Seed of the random generator.

    Returns
    -------
    src, dst : int32 arrays
        The edges, sorted by ``(src, dst)``.
    sampler : PowerLawSampler
        The pair distribution, for drawing further edges of the same kind.
    """
    if m > n * n:
        raise ValueError(f"{m} distinct edges do not fit on {n} nodes")
    rng = np.random.default_rng(seed)
    sampler = PowerLawSampler.create(n, rng)
    keys = np.zeros(0, dtype=np.int64)
    draw = int(m * 1.15) + 16
    for _ in range(64):
        src, dst = sampler.pairs(draw, rng)
        keys = np.union1d(keys, pair_keys(src, dst, n))
        if keys.size >= m:
            break
        draw = int((m - keys.size) * 1.5) + 16
    if keys.size < m:
        raise RuntimeError(f"could only draw {keys.size} distinct edges of {m}")
    keep = np.sort(rng.choice(keys.size, size=m, replace=False))
    keys = keys[keep]
    return (keys // n).astype(np.int32), (keys % n).astype(np.int32), sampler


@dataclass
class RealGraph:
    """A real graph shipped inside an installed package.

    Attributes
    ----------
    name, description : str
        What it is and where it comes from.
    n : int
        Nodes (ids ``0 .. n-1``).
    src, dst : int32 arrays
        Directed edges.
    weight : float64 array
        Edge weights.
    """

    name: str
    description: str
    n: int
    src: np.ndarray
    dst: np.ndarray
    weight: np.ndarray


def wiki_vote_graph() -> RealGraph | None:
    """The Wikipedia administrator-election vote network, from the ``onadata`` package.

    ``onadata`` 0.1 (PyPI, MIT licence) ships the network as
    ``onadata/data/wikivote.csv`` (columns ``from``, ``to``): an edge u -> v
    says that user u voted in the election of user v. The file is read
    directly, without importing the package (which needs pandas). Ids are
    renumbered ``0 .. n-1``; repeated pairs are kept once.

    Returns None when the package is not installed.

    References
    ----------
    .. [1] J. Leskovec, D. Huttenlocher, J. Kleinberg, "Signed networks in
       social media", CHI 2010 (the data set, also in the SNAP collection
       as wiki-Vote; reference quoted from memory).
    """
    import importlib.util

    import pyarrow.csv as pacsv

    spec = importlib.util.find_spec("onadata")
    if spec is None or not spec.submodule_search_locations:
        return None
    path = Path(next(iter(spec.submodule_search_locations))) / "data" / "wikivote.csv"
    if not path.is_file():
        return None
    table = pacsv.read_csv(path)
    pairs = np.column_stack((table["from"].to_numpy(), table["to"].to_numpy())).astype(np.int64)
    ids, inverse = np.unique(pairs, return_inverse=True)
    pairs = np.unique(inverse.reshape(pairs.shape), axis=0).astype(np.int32)
    return RealGraph(
        name="Wikipedia votes",
        description=(f"Wikipedia administrator-election votes (Leskovec et al., CHI 2010), shipped in the onadata "
                     f"0.1 package from PyPI ({ids.size:,} nodes, {pairs.shape[0]:,} directed edges)"),
        n=int(ids.size),
        src=pairs[:, 0].copy(),
        dst=pairs[:, 1].copy(),
        weight=np.ones(pairs.shape[0]),
    )


def bundled_real_graph() -> RealGraph:
    """The largest real graph an installed package ships.

    The Wikipedia vote network of :func:`wiki_vote_graph` when ``onadata`` is
    installed (a test and bench extra), else NetworkX's Les Misérables network.
    """
    return wiki_vote_graph() or les_miserables_graph()


def les_miserables_graph() -> RealGraph:
    """NetworkX's Les Misérables co-occurrence network, as a weighted digraph.

    Each undirected weighted edge (co-occurrences of two characters) becomes
    two directed edges of the same weight.
    """
    import networkx as nx

    g = nx.les_miserables_graph()
    index = {name: i for i, name in enumerate(sorted(g.nodes()))}
    a = np.array([index[u] for u, _ in g.edges()], dtype=np.int32)
    b = np.array([index[v] for _, v in g.edges()], dtype=np.int32)
    w = np.array([float(d.get("weight", 1.0)) for _, _, d in g.edges(data=True)])
    return RealGraph(
        name="Les Misérables",
        description=(f"character co-occurrence network of Les Misérables, bundled with NetworkX "
                     f"({g.number_of_nodes()} nodes, {g.number_of_edges()} weighted undirected edges "
                     f"taken as {2 * a.size} directed edges)"),
        n=len(index),
        src=np.concatenate([a, b]),
        dst=np.concatenate([b, a]),
        weight=np.concatenate([w, w]),
    )
