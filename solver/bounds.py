"""Per-node certified error bounds, the relative contract and certified ranks.

Every profile's exact solution is ``x_k = R s_k`` with ``R = a (I - d P^T)^{-1}``,
non-negative entrywise, whose column ``u`` sums to at most 1. With the
invariant ``x_k = p_k + R r_k`` and any weights ``w(u) > 0``:

    |x_k(v) - p_k(v)| = |sum_u R(v, u) r_k(u)| <= c * (R w)(v),
    c = max_u |r_k(u)| / w(u).

Two choices of ``w`` give computable right-hand sides (design notes 4b):

* ``w = 1``: ``(R 1)(v) = x_g(v)``, the global profile's solution, so
  ``|x_k(v) - p_k(v)| <= rho_k x_g(v)`` with ``rho_k = max |r_k|``. For the
  global profile itself this is a *relative* bound on every node.
* ``w = alpha s_k + beta``: ``(R w)(v) = alpha x_k(v) + beta x_g(v)``, a bound
  relative to the profile's own scores plus a small absolute part; the settle
  thresholds of a personalization are these weights.

``x_g`` and ``x_k`` are unknown, but bounded above from the estimates:
``x_g(v) <= p_g(v) / (1 - rho_g)`` and
``x_k(v) <= (p_k(v) + c beta xbar_g(v)) / (1 - c alpha)``.

Normalised scores ``pi = x / X`` and ``p_hat = p / S`` (``X = sum x``,
``S = sum p``) then satisfy, with ``E(v)`` a bound on ``|x(v) - p(v)|`` and
``D >= |X - S|``,

    |pi(v) - p_hat(v)| <= (E(v) + |p_hat(v)| D) / (S - D),

where ``D = min(||r||_1, sum_v E(v))`` (the columns of ``R`` sum to at most
1, and the per-node bounds add up). Each per-node bound is also capped by the
profile's normalised L1 bound (:func:`solver.metrics.certified_bound`).

References
----------
.. [1] R. Andersen, F. Chung, K. Lang, "Local graph partitioning using
   PageRank vectors", FOCS 2006 (forward push and its residual).
.. [2] R. S. Wills, I. C. F. Ipsen, "Ordinal ranking for Google's PageRank",
   SIAM J. Matrix Anal. Appl. 30(4), 2009 (ranks from approximate scores).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Default number of best nodes of a personalization certified to a relative error.
CERTIFIED_TOP = 100

#: Floor of every bound, relative to its score plus the largest score: the
#: running residual and the normalisation carry rounding of about 1e-16 per
#: operation (relative to the values that met, which can be the largest ones:
#: an estimate pushed back to zero keeps a few 1e-17), so a bound of exactly
#: zero would overstate what floating point knows.
ROUNDING_FLOOR = 1e-12


@dataclass(frozen=True)
class Weights:
    """Weights ``w = alpha s + beta`` of the per-node lemma (the settle thresholds).

    ``alpha = 0, beta = 1`` is the plain lemma (``w = 1``).
    """

    alpha: float = 0.0
    beta: float = 1.0
    kth: float = 0.0  #: the K-th best estimate the thresholds were sized for (personalizations)

    def of(self, s: np.ndarray) -> np.ndarray:
        return self.alpha * s + self.beta


@dataclass
class Certificate:
    """Certified bounds of one profile's published (normalised) scores.

    Attributes
    ----------
    scores : ndarray
        Published scores ``p / sum p``.
    bounds : ndarray
        Certified bound on ``|published - exact|`` per node.
    l1_bound : float
        Certified bound on the normalised L1 error of the whole vector.
    certified_top : int
        ``K``: nodes scoring at least the K-th largest score are certified to a
        relative error; the others to an absolute one (``rtol`` times that
        score). Equal to the node count for the global profile.
    threshold : float
        The K-th largest published score (0 when the profile is empty).
    rtol_reached : float
        Largest certified relative error ``bound / (score - bound)`` over the
        nodes at or above ``threshold`` (``inf`` when a bound exceeds its score).
    absolute_reached : float
        Largest bound below ``threshold``, relative to ``threshold - bound``
        at the K-th node (0 when every node is certified relatively).
    """

    scores: np.ndarray
    bounds: np.ndarray
    l1_bound: float
    certified_top: int
    threshold: float
    rtol_reached: float
    absolute_reached: float

    def meets(self, rtol: float) -> bool:
        """The relative contract holds: both reached figures are at most ``rtol``."""
        return self.rtol_reached <= rtol and self.absolute_reached <= rtol


def global_upper(p_g: np.ndarray, r_g: np.ndarray) -> np.ndarray:
    """Upper bound ``p_g / (1 - rho_g)`` on the global solution ``x_g`` (``inf`` if ``rho_g >= 1``)."""
    rho = float(np.abs(r_g).max(initial=0.0))
    if rho >= 1.0:
        return np.full(p_g.shape, math.inf)
    return np.maximum(p_g, 0.0) / (1.0 - rho)


def unnormalised_bounds(p: np.ndarray, r: np.ndarray, s: np.ndarray, xbar_g: np.ndarray,
                        weights: Weights | None) -> np.ndarray:
    """``E(v) >= |x(v) - p(v)|`` for one profile: the better of the plain and weighted lemma."""
    rho = float(np.abs(r).max(initial=0.0))
    with np.errstate(invalid="ignore"):
        plain = rho * xbar_g if rho > 0.0 else np.zeros_like(p)
    if weights is None or weights.alpha <= 0.0 or weights.beta < 0.0:
        return plain
    w = weights.of(s)
    if np.any(w <= 0.0):
        return plain
    c = float(np.max(np.abs(r) / w, initial=0.0))
    if c == 0.0:
        return np.zeros_like(p)
    if c * weights.alpha >= 1.0:
        return plain
    with np.errstate(invalid="ignore"):
        xbar_k = np.maximum(p + c * weights.beta * xbar_g, 0.0) / (1.0 - c * weights.alpha)
        weighted = c * (weights.alpha * xbar_k + weights.beta * xbar_g)
    return np.fmin(plain, weighted)


def normalised_bounds(p: np.ndarray, r: np.ndarray, err: np.ndarray, l1_bound: float) -> np.ndarray:
    """Per-node bounds on ``|p/S - x/X|`` from ``E = err`` (module docstring), capped by ``l1_bound``."""
    s_p = float(p.sum())
    if s_p <= 0.0:
        return np.full(p.shape, min(math.inf, l1_bound))
    drift = min(float(np.abs(r).sum()), float(err.sum()))
    if drift >= s_p:
        return np.full(p.shape, l1_bound)
    with np.errstate(invalid="ignore"):
        b = (err + np.abs(p) / s_p * drift) / (s_p - drift)
    b = np.where(np.isnan(b), math.inf, b)
    scale = np.abs(p) / s_p
    return np.maximum(np.minimum(b, l1_bound), ROUNDING_FLOOR * (scale + scale.max(initial=0.0)))


def kth_largest(values: np.ndarray, k: int) -> float:
    """The ``k``-th largest value (the smallest one when there are fewer; 0 when empty)."""
    if values.size == 0:
        return 0.0
    k = min(k, values.size)
    return float(np.partition(values, values.size - k)[values.size - k])


def certify(scores: np.ndarray, bounds: np.ndarray, l1_bound: float, certified_top: int | None) -> Certificate:
    """Sum up the contract a profile's bounds meet.

    Parameters
    ----------
    scores, bounds : ndarray
        Published scores and their certified bounds.
    l1_bound : float
        The profile's normalised L1 bound.
    certified_top : int or None
        ``K``; ``None`` certifies every node relatively (the global profile).
    """
    n = scores.size
    k = n if certified_top is None else min(int(certified_top), n)
    # scores within the rounding floor of zero are zero: they never set the K-th score
    significant = scores[scores > ROUNDING_FLOOR * scores.max(initial=0.0)]
    threshold = kth_largest(significant, k) if significant.size else 0.0
    top = scores >= threshold if threshold > 0.0 else scores > 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        lower = scores - bounds
        rel = np.where(lower > 0.0, bounds / lower, math.inf)
    rtol_reached = float(rel[top].max(initial=0.0))
    rest = bounds[~top]
    absolute_reached = 0.0
    if rest.size:
        at_k = top & (scores == threshold)
        floor = float((threshold - bounds[at_k]).min(initial=threshold)) if threshold > 0.0 else 0.0
        worst = float(rest.max())
        absolute_reached = worst / floor if floor > 0.0 else (0.0 if worst == 0.0 else math.inf)
    return Certificate(scores, bounds, float(l1_bound), k, threshold, rtol_reached, absolute_reached)


def sorted_ends(scores: np.ndarray, bounds: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every node's interval ends ``score - bound`` and ``score + bound``, each sorted ascending."""
    return np.sort(scores - bounds), np.sort(scores + bounds)


def ranks_between(lo_sorted: np.ndarray, hi_sorted: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                  unlisted: int = 0, unlisted_bound: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Best and worst possible rank (1 = first) of nodes with intervals ``[lo, hi]``.

    Node ``v`` is certainly above ``w`` when ``lo(v) > hi(w)``; so ``v``'s rank
    runs from ``1 + #{w : lo(w) > hi(v)}`` to ``1 + #{w != v : hi(w) >= lo(v)}``
    (design notes 4b, after Wills & Ipsen [2]); binary searches in the sorted
    ends (:func:`sorted_ends`) count them. ``unlisted`` more nodes, published
    as 0 with the bound ``unlisted_bound`` (a personalization's omitted
    nodes), take part too.
    """
    best = 1 + (lo_sorted.size - np.searchsorted(lo_sorted, hi, side="right"))
    # every w with hi(w) >= lo(v), v itself included (hi(v) >= lo(v)), hence no 1 +
    worst = hi_sorted.size - np.searchsorted(hi_sorted, lo, side="left")
    if unlisted:
        best = best + np.where(-unlisted_bound > hi, unlisted, 0)
        worst = worst + np.where(unlisted_bound >= lo, unlisted, 0)
    return best.astype(np.int64), worst.astype(np.int64)


def rank_ranges(scores: np.ndarray, bounds: np.ndarray, nodes: np.ndarray,
                unlisted: int = 0, unlisted_bound: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """:func:`ranks_between` for ``nodes`` of one score vector (sorts once: ``O(n log n)``)."""
    lo_sorted, hi_sorted = sorted_ends(scores, bounds)
    return ranks_between(lo_sorted, hi_sorted, scores[nodes] - bounds[nodes], scores[nodes] + bounds[nodes],
                         unlisted, unlisted_bound)


def top_set_certified(scores: np.ndarray, bounds: np.ndarray, top: np.ndarray) -> bool:
    """The set ``top`` is certainly the top ``len(top)``: its smallest ``lo`` exceeds every ``hi`` outside."""
    if top.size == 0 or top.size >= scores.size:
        return True
    inside = np.zeros(scores.size, dtype=bool)
    inside[top] = True
    return float((scores[top] - bounds[top]).min()) > float((scores[~inside] + bounds[~inside]).max())
