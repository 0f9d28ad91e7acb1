"""Exact recompute of PageRank with SciPy sparse matrices.

Solves ``x = a s + d P^T x`` by the power (Jacobi) iteration, cold from
``a s`` or warm from a previous solution, and stops on a *certified* bound:
the residual of an iterate ``x_k`` is ``r_k = (x_{k+1} - x_k) / a`` and
:func:`solver.metrics.certified_bound` turns it into a bound on the
normalised L1 error. This is also the "natural" warm-started recompute that
the benchmarks compare the incremental engine with.

Normalising ``x`` gives the PageRank in which dangling nodes jump according to
the teleport distribution (Langville & Meyer, "Deeper inside PageRank",
Internet Mathematics 1(3), 2004; Ipsen & Selee, SIAM J. Matrix Anal. Appl.
29(4), 2007), the convention of NetworkX's ``pagerank``.

References
----------
.. [1] L. Page, S. Brin, R. Motwani, T. Winograd, "The PageRank citation
   ranking: bringing order to the web", Stanford InfoLab report, 1999.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .metrics import certified_bound

if TYPE_CHECKING:
    # SciPy is imported where a matrix is built: a replay or a service never needs it
    import scipy.sparse as sp


@dataclass
class ExactSolution:
    """Result of :func:`solve`.

    Attributes
    ----------
    x : ndarray
        Unnormalised solution of ``x = a s + d P^T x``.
    iterations : int
        Matrix-vector products used.
    bound : float
        Certified bound on the normalised L1 error of ``x / sum(x)``.
    """

    x: np.ndarray
    iterations: int
    bound: float

    @property
    def scores(self) -> np.ndarray:
        """Normalised scores (sum 1), all zero for an empty teleport."""
        total = self.x.sum()
        return self.x / total if total > 0 else np.zeros_like(self.x)


def transition_transpose(
    src: np.ndarray, dst: np.ndarray, weight: np.ndarray, n: int
) -> sp.csr_matrix:
    """``P^T`` in CSR form from an edge list (duplicate pairs are summed)."""
    import scipy.sparse as sp

    out_w = np.bincount(src, weights=weight, minlength=n)
    return sp.csr_matrix((weight / out_w[src], (dst, src)), shape=(n, n))


def solve(
    PT: sp.csr_matrix,
    s: np.ndarray,
    damping: float = 0.85,
    tol: float = 1e-12,
    x0: np.ndarray | None = None,
    max_iter: int = 100_000,
) -> ExactSolution:
    """Solve ``x = a s + d P^T x`` to a certified normalised L1 error ``tol``.

    Parameters
    ----------
    PT : scipy.sparse matrix
        Transposed transition matrix (columns of dangling nodes are zero).
    s : ndarray
        Non-negative teleport vector (unnormalised).
    damping : float
        ``d``; the teleport probability is ``a = 1 - d``.
    tol : float
        Target bound on ``||x_k / sum(x_k) - pi||_1``.
    x0 : ndarray, optional
        Warm start in the same (unnormalised) scale as ``x``; cold start
        ``a s`` when omitted.
    max_iter : int
        Safety cap on the number of iterations.

    Returns
    -------
    ExactSolution
    """
    a = 1.0 - damping
    base = a * np.asarray(s, dtype=np.float64)
    x = base.copy() if x0 is None else np.asarray(x0, dtype=np.float64).copy()
    bound = np.inf
    for it in range(1, max_iter + 1):
        nxt = base + damping * (PT @ x)
        bound = certified_bound(x, (nxt - x) / a)
        x = nxt
        if bound <= tol:
            return ExactSolution(x, it, bound)
    return ExactSolution(x, max_iter, bound)


def global_threshold(rtol: float) -> float:
    """Largest ``max |r|`` of a global-profile iterate that certifies relative ``rtol`` on every node.

    The per-node lemma (``solver.bounds``) gives the published score a
    certified relative error ``2 rho / (1 - 2 rho)``; at most
    ``rtol / (1 + rtol)`` it certifies ``|published - exact| <= rtol * exact``.
    """
    return rtol / (2.0 + 4.0 * rtol)


def solve_to_rtol(
    PT: sp.csr_matrix,
    s: np.ndarray,
    damping: float = 0.85,
    rtol: float = 1e-3,
    x0: np.ndarray | None = None,
    xbar_g: np.ndarray | None = None,
    certified_top: int | None = None,
    max_iter: int = 100_000,
) -> ExactSolution:
    """Power iteration stopped when its own residual certifies the per-node contract.

    The iterate ``x_k`` is returned (not ``x_{k+1}``): the per-node bound of
    ``x_k`` follows from ``r_k = (x_{k+1} - x_k) / a``, but a step of the
    iteration can raise the largest residual at a hub, so the next iterate is
    not certified by it.

    Parameters
    ----------
    PT, s, damping, x0, max_iter
        As for :func:`solve`.
    rtol : float
        Relative error certified on every node (global profile) or on the
        ``certified_top`` best nodes (a personalization, which then needs
        ``xbar_g``, an upper bound on the global solution).
    xbar_g : ndarray, optional
        Upper bound on the global profile's unnormalised solution; ``None``
        for the global profile itself (``s = 1``).
    certified_top : int, optional
        ``K`` of a personalization's contract.

    Returns
    -------
    ExactSolution
        ``bound`` holds the certified relative error reached.
    """
    from .bounds import certify, normalised_bounds, unnormalised_bounds

    a = 1.0 - damping
    base = a * np.asarray(s, dtype=np.float64)
    x = base.copy() if x0 is None else np.asarray(x0, dtype=np.float64).copy()
    limit = global_threshold(rtol)
    reached = np.inf
    for it in range(1, max_iter + 1):
        nxt = base + damping * (PT @ x)
        r = (nxt - x) / a
        if xbar_g is None:
            rho = float(np.abs(r).max(initial=0.0))
            reached = 2.0 * rho / (1.0 - 2.0 * rho) if rho < 0.5 else np.inf
            if rho <= limit:
                return ExactSolution(x, it, reached)
        else:
            err = unnormalised_bounds(x, r, s, xbar_g, None)
            cert = certify(x / max(float(x.sum()), 1e-300), normalised_bounds(x, r, err, certified_bound(x, r)),
                           certified_bound(x, r), certified_top)
            reached = max(cert.rtol_reached, cert.absolute_reached)
            if cert.meets(rtol):
                return ExactSolution(x, it, reached)
        x = nxt
    return ExactSolution(x, max_iter, reached)
