"""The engine against the random-surfer definition of PageRank (Monte Carlo).

Source: the definition in Page, Brin, Motwani & Winograd, "The PageRank
citation ranking: bringing order to the web" (Stanford, 1999): a surfer
follows an out-edge (chosen in proportion to its weight) with probability d
and otherwise jumps to a page drawn from the teleport distribution; from a
page without out-edges it always jumps (the dangling convention of the
design notes). PageRank is the surfer's stationary distribution.

Estimator: N independent surfers start from the teleport distribution and
walk T steps; the share f_i of surfers on node i at step T estimates pi_i.

Error bound, derived:
* bias: at every step a surfer jumps with probability at least a = 1 - d,
  to a draw independent of its past. Two surfers, one started from pi, can
  be coupled from their first common jump on, so the law of the position at
  step T is within d^T of pi in total variation: |E f_i - pi_i| <= d^T.
* noise: the N end positions are independent, so N f is multinomial with
  variance N pi_i (1 - pi_i) per node. Each node must lie within 5 standard
  errors plus the bias, and the total Pearson statistic
  X^2 = sum (c_i - N pi_i)^2 / (N pi_i) over nodes with pi_i > 0 must stay
  below the chi-square(k - 1) quantile at 1 - 1e-6. A node with pi_i = 0
  (engine score below 1e-12 in size: event repairs may leave a rounding
  residue such as -1e-16 there, well inside the certified bound) must never
  be visited.
With a fixed RNG seed the test is reproducible; under a correct engine the
chance of failing is about 1e-5 in all.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.stats

from reference_helpers import GraphModel, build_ranker, event_script, scores_by_name
from ranktide.solver import GLOBAL

DAMPING = 0.85
SURFERS = 400_000
STEPS = 100
#: engine scores this small are rounding residue of an exact zero
ZERO = 1e-12

# a small graph: two dangling nodes (i, j), a self-loop on c, node h without in-edges
EDGES = [
    ("a", "b", 1.0), ("a", "c", 2.0), ("b", "c", 1.0), ("b", "d", 0.5), ("c", "c", 1.5), ("c", "a", 1.0),
    ("c", "e", 1.0), ("d", "i", 1.0), ("e", "f", 2.0), ("e", "j", 1.0), ("f", "a", 1.0), ("f", "g", 1.0),
    ("g", "e", 3.0), ("g", "b", 1.0), ("h", "a", 1.0), ("h", "g", 1.0),
]
SEEDS = {"a": 1.0, "e": 3.0}


def surfer_model() -> GraphModel:
    model = GraphModel()
    for u, v, w in EDGES:
        model.insert(u, v, w)
    model.seeds["team"] = dict(SEEDS)
    return model


def simulate(model: GraphModel, teleport: dict[str, float], rng: np.random.Generator) -> dict[str, int]:
    """End positions of ``SURFERS`` walks of ``STEPS`` steps, counted per node."""
    names = sorted(model.nodes)
    index = {x: i for i, x in enumerate(names)}
    n = len(names)
    edges = sorted((index[u], index[v], w) for (u, v), w in model.edges.items())
    src = np.array([e[0] for e in edges])
    dst = np.array([e[1] for e in edges])
    cum_w = np.cumsum([e[2] for e in edges])
    row_end = np.searchsorted(src, np.arange(n), side="right")  # one past each node's last out-edge
    row_start = np.searchsorted(src, np.arange(n), side="left")
    start_w = np.where(row_start > 0, cum_w[np.maximum(row_start - 1, 0)], 0.0)
    out_w = np.where(row_end > row_start, cum_w[np.maximum(row_end - 1, 0)] - start_w, 0.0)
    tele = np.zeros(n)
    for node, w in teleport.items():
        tele[index[node]] = w
    tele_cdf = np.cumsum(tele) / tele.sum()

    def jump(count: int) -> np.ndarray:
        return np.minimum(np.searchsorted(tele_cdf, rng.random(count), side="right"), n - 1)

    pos = jump(SURFERS)
    for _ in range(STEPS):
        follow = (rng.random(SURFERS) < DAMPING) & (out_w[pos] > 0)
        here = pos[follow]
        target = start_w[here] + rng.random(here.size) * out_w[here]
        edge = np.minimum(np.searchsorted(cum_w, target, side="right"), row_end[here] - 1)
        nxt = np.empty_like(pos)
        nxt[follow] = dst[edge]
        nxt[~follow] = jump(int(np.count_nonzero(~follow)))
        pos = nxt
    counts = np.bincount(pos, minlength=n)
    return {names[i]: int(counts[i]) for i in range(n)}


def pearson_statistic(counts: dict[str, int], pi: dict[str, float]) -> tuple[float, int]:
    """Pearson X^2 of the counts against ``pi`` over nodes with pi > 0, and its degrees of freedom."""
    support = [x for x in pi if pi[x] > ZERO]
    expected = np.array([SURFERS * pi[x] for x in support])
    observed = np.array([counts.get(x, 0) for x in support])
    return float(((observed - expected) ** 2 / expected).sum()), len(support) - 1


@pytest.fixture(scope="module")
def engine_scores() -> dict[str, dict[str, float]]:
    batches = event_script(surfer_model(), np.random.default_rng(21), ghosts=0)
    ranker = build_ranker(batches, damping=DAMPING, tolerance=1e-10)
    return {profile: scores_by_name(ranker, profile) for profile in (GLOBAL, "team")}


@pytest.fixture(scope="module")
def walk_counts() -> dict[str, dict[str, int]]:
    model = surfer_model()
    rng = np.random.default_rng(2024)
    return {profile: simulate(model, model.teleport(profile), rng) for profile in (GLOBAL, "team")}


@pytest.mark.parametrize("profile", [GLOBAL, "team"])
def test_visit_frequencies_match_engine(
    profile: str, engine_scores: dict[str, dict[str, float]], walk_counts: dict[str, dict[str, int]]
) -> None:
    pi = engine_scores[profile]
    counts = walk_counts[profile]
    bias = DAMPING**STEPS
    for node, p in pi.items():
        if abs(p) <= ZERO:
            assert counts[node] == 0, node
        else:
            stderr = np.sqrt(p * (1 - p) / SURFERS)
            assert abs(counts[node] / SURFERS - p) <= 5 * stderr + bias, node
    statistic, dof = pearson_statistic(counts, pi)
    assert statistic <= scipy.stats.chi2.ppf(1 - 1e-6, dof)


def test_simulation_can_tell_dangling_conventions_apart(walk_counts: dict[str, dict[str, int]]) -> None:
    """Power check: the same walks reject the other common dangling convention.

    For the personalized profile, sending dangling surfers uniformly (NetworkX
    ``pagerank`` with a uniform ``dangling`` vector) gives a different vector;
    the chi-square test above must reject it, so passing means something.
    """
    model = surfer_model()
    uniform_dangling = nx.pagerank(
        model.to_networkx(),
        alpha=DAMPING,
        personalization=model.teleport("team"),
        dangling={x: 1.0 for x in model.nodes},
        tol=1e-15,
        max_iter=100_000,
    )
    statistic, dof = pearson_statistic(walk_counts["team"], uniform_dangling)
    assert statistic > 100 * scipy.stats.chi2.ppf(1 - 1e-6, dof)
