"""Certified error bound and drift metrics between score vectors.

The certified bound follows from the invariant ``x = p + R r`` with
``R = a (I - d P^T)^{-1}``: the columns of ``R`` are non-negative and sum to at
most 1, hence ``||x - p||_1 <= ||r||_1`` whatever the signs in ``r``.

For the normalised scores ``pi = x / sum(x)`` and ``pi_hat = p / sum(p)``,
write ``rho = ||r||_1`` and ``S = sum(p)``. Then ``sum(x) >= S - rho`` and

    ||pi_hat - pi||_1 <= ||p - x||_1 / sum(x) + ||p||_1 |sum(x) - S| / (S sum(x))
                      <= rho (1 + ||p||_1 / S) / (S - rho),

valid when ``S > rho``. With ``p >= 0`` (the usual case) ``||p||_1 = S`` and
this is the ``2 rho / (S - rho)`` of the design notes; the general form stays
valid when deletions leave some ``p(u)`` slightly negative.
"""

from __future__ import annotations

import math

import numpy as np


def certified_bound(p: np.ndarray, r: np.ndarray, empty: bool = False) -> float:
    """Upper bound on ``||p/sum(p) - x/sum(x)||_1`` from the residual.

    Parameters
    ----------
    p, r : ndarray
        Estimate and residual of one profile (same length).
    empty : bool
        The profile's teleport vector is zero (no seeds): its scores are all
        zero by definition and the bound is 0.

    Returns
    -------
    float
        The bound; ``inf`` when ``sum(p) <= ||r||_1`` (nothing can be certified
        yet, including ``p = 0`` for a profile with seeds) and 0 for an exact
        solve or an empty profile.
    """
    if empty:
        return 0.0
    rho = float(np.abs(r).sum())
    s_p = float(p.sum())
    if s_p <= 0.0:
        return math.inf
    if rho == 0.0:
        return 0.0
    if s_p <= rho:
        return math.inf
    return rho * (1.0 + float(np.abs(p).sum()) / s_p) / (s_p - rho)


def l1_error(a: np.ndarray, b: np.ndarray) -> float:
    """``||a - b||_1``."""
    return float(np.abs(a - b).sum())


def linf_error(a: np.ndarray, b: np.ndarray) -> float:
    """``||a - b||_inf``."""
    return float(np.abs(a - b).max()) if a.size else 0.0


def top_k_indices(scores: np.ndarray, k: int) -> np.ndarray:
    """Indices of the ``k`` largest scores, best first (ties by smaller index)."""
    k = min(int(k), scores.size)
    if k <= 0:
        return np.zeros(0, dtype=np.int64)
    part = np.argpartition(-scores, k - 1)[:k]
    # stable order: score descending, then index ascending
    return part[np.lexsort((part, -scores[part]))]


def top_k_overlap(reference: np.ndarray, estimate: np.ndarray, k: int) -> float:
    """Share of the reference top ``k`` that the estimate's top ``k`` also holds."""
    ref = top_k_indices(reference, k)
    if ref.size == 0:
        return 1.0
    est = top_k_indices(estimate, k)
    return float(np.intersect1d(ref, est).size) / ref.size


def kendall_tau_top_k(reference: np.ndarray, estimate: np.ndarray, k: int) -> float:
    """Kendall's tau-b between the two score vectors on the reference top ``k`` nodes.

    Uses :func:`scipy.stats.kendalltau` (tau-b, which accounts for ties).
    Returns 1.0 when fewer than two nodes exist or all values tie.
    """
    from scipy.stats import kendalltau

    ref = top_k_indices(reference, k)
    if ref.size < 2:
        return 1.0
    tau = kendalltau(reference[ref], estimate[ref]).statistic
    return 1.0 if math.isnan(tau) else float(tau)


def largest_relative_errors(
    reference: np.ndarray, estimate: np.ndarray, k: int, count: int = 5
) -> list[tuple[int, float]]:
    """The ``count`` largest relative errors ``|est - ref| / ref`` among the reference top ``k``."""
    ref = top_k_indices(reference, k)
    if ref.size == 0:
        return []
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.abs(estimate[ref] - reference[ref]) / reference[ref]
    rel = np.nan_to_num(rel, nan=0.0, posinf=math.inf)
    order = np.argsort(-rel, kind="stable")[:count]
    return [(int(ref[i]), float(rel[i])) for i in order]
