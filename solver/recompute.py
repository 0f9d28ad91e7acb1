"""Full recompute of every profile to a certified per-node bound (no I/O).

A full recompute solves ``x = a s + d P^T x`` for every profile by the power
(Jacobi) iteration, all profiles side by side (the columns of one matrix), and
stops on a bound *certified by the iterate itself*: the residual of ``x_t`` is
``r_t = (x_{t+1} - x_t) / a`` and the per-node lemma of ``solver.bounds``
turns ``(x_t, r_t)`` into a bound on every node's published score. The
iterate ``x_t`` is the answer, not ``x_{t+1}``: a step can raise the largest
residual at a hub, so the next iterate is not certified by ``r_t``.

The Spark recompute (``replay.spark_recompute``) computes the same figures
with DataFrame aggregates; :func:`bound_terms` and :func:`profile_met` are
the scalar parts both share, so that the two engines stop on the same rule.

References
----------
.. [1] A. N. Langville, C. D. Meyer, "Deeper inside PageRank", Internet
   Mathematics 1(3), 2004 (the linear-system form and the dangling convention).
.. [2] R. Andersen, F. Chung, K. Lang, "Local graph partitioning using
   PageRank vectors", FOCS 2006 (estimate and residual).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import scipy.sparse as sp

from .bounds import CERTIFIED_TOP, Certificate, certify, global_upper, normalised_bounds, unnormalised_bounds
from .metrics import certified_bound

GLOBAL = "global"


@dataclass(frozen=True)
class Targets:
    """What a recompute must certify before it stops.

    Attributes
    ----------
    rtol : float or None
        The per-node contract (``solver.bounds``); ``None``: off.
    tolerance : float or None
        The normalised L1 bound of every profile; ``None``: off.
    certified_top : int
        ``K`` of a personalization's contract.
    """

    rtol: float | None = 1e-3
    tolerance: float | None = None
    certified_top: int = CERTIFIED_TOP

    def __post_init__(self) -> None:
        if self.rtol is None and self.tolerance is None:
            raise ValueError("set rtol, tolerance or both: a recompute needs a target")


def profile_met(targets: Targets, rtol_reached: float, absolute_reached: float, l1_bound: float) -> bool:
    """A profile's iterate meets every target that is set."""
    ok = targets.rtol is None or (rtol_reached <= targets.rtol and absolute_reached <= targets.rtol)
    return ok and (targets.tolerance is None or l1_bound <= targets.tolerance)


@dataclass(frozen=True)
class BoundTerms:
    """Scalars of one profile from which every node's bound follows (``solver.bounds``).

    ``bound(v) = max(min((rho * xbar_g(v) + |x(v)| / total * drift) / (total - drift), l1),
    ROUNDING_FLOOR * |x(v)| / total)``, or ``l1`` everywhere when ``usable`` is false.
    """

    rho: float
    total: float
    drift: float
    l1: float
    usable: bool


def bound_terms(rho: float, r1: float, total: float, abs_total: float, sum_err: float) -> BoundTerms:
    """The scalars of :func:`solver.bounds.normalised_bounds` from aggregates of one profile.

    Parameters
    ----------
    rho, r1 : float
        ``max |r|`` and ``||r||_1`` of the profile's residual.
    total, abs_total : float
        ``sum x`` and ``||x||_1`` of its iterate.
    sum_err : float
        ``sum_v E(v)`` with ``E(v) = rho * xbar_g(v)``.
    """
    if total <= 0.0:
        l1 = math.inf
    elif r1 == 0.0:
        l1 = 0.0
    elif total <= r1:
        l1 = math.inf
    else:
        l1 = r1 * (1.0 + abs_total / total) / (total - r1)
    drift = min(r1, sum_err)
    return BoundTerms(rho, total, drift, l1, total > 0.0 and drift < total)


@dataclass
class Iterate:
    """The certified state of one profile at one iteration."""

    x: np.ndarray
    r: np.ndarray
    certificate: Certificate
    met: bool


@dataclass
class Recompute:
    """Result of :func:`recompute`.

    Attributes
    ----------
    profiles : dict
        Profile name -> its certified :class:`Iterate` (the published one).
    iterations : int
        Matrix products done (every profile iterates together).
    history : list
        Per iteration, profile -> ``(max |r|, certified relative error, L1 bound)``.
    """

    profiles: dict[str, Iterate]
    iterations: int
    history: list[dict[str, tuple[float, float, float]]] = field(default_factory=list)

    @property
    def met(self) -> bool:
        return all(it.met for it in self.profiles.values())


def certify_iterate(x: np.ndarray, r: np.ndarray, s: np.ndarray, xbar_g: np.ndarray,
                    certified_top: int | None, empty: bool) -> Certificate:
    """Certificate of one profile's iterate ``x`` with residual ``r`` (plain lemma, ``w = 1``)."""
    if empty:
        zeros = np.zeros(x.size)
        return certify(zeros, zeros, 0.0, certified_top)
    l1 = certified_bound(x, r)
    err = unnormalised_bounds(x, r, s, xbar_g, None)
    bounds = normalised_bounds(x, r, err, l1)
    total = float(x.sum())
    scores = x / total if total > 0.0 else np.zeros(x.size)
    return certify(scores, bounds, l1, certified_top)


def recompute(
    PT: sp.csr_matrix,
    teleports: dict[str, np.ndarray],
    damping: float,
    targets: Targets,
    max_iter: int = 10_000,
    progress: Callable[[int, dict[str, tuple[float, float, float]]], None] | None = None,
) -> Recompute:
    """Power iteration of every profile at once, stopped when each meets ``targets``.

    Parameters
    ----------
    PT : scipy.sparse matrix
        ``P^T`` (``solver.exact.transition_transpose``; dangling columns zero).
    teleports : dict
        Profile name -> teleport ``s``; ``"global"`` (``s = 1``) must be there.
    damping : float
        ``d``; the teleport probability is ``a = 1 - d``.
    targets : Targets
    max_iter : int
        Safety cap.
    progress : callable, optional
        Called after every iteration with its number and, per profile,
        ``(max |r|, certified relative error, L1 bound)``.

    Returns
    -------
    Recompute
        Each profile's last certified iterate; ``met`` is false when
        ``max_iter`` ran out first.
    """
    names = [GLOBAL] + sorted(n for n in teleports if n != GLOBAL)
    a = 1.0 - damping
    S = np.column_stack([np.asarray(teleports[n], dtype=np.float64) for n in names])
    base = a * S
    X = base.copy()
    result: dict[str, Iterate] = {}
    history: list[dict[str, tuple[float, float, float]]] = []
    for it in range(1, max_iter + 1):
        nxt = base + damping * np.asarray(PT @ X)
        R = (nxt - X) / a
        xbar_g = global_upper(X[:, 0], R[:, 0])
        for j, name in enumerate(names):
            top = None if j == 0 else targets.certified_top
            cert = certify_iterate(X[:, j], R[:, j], S[:, j], xbar_g, top, j > 0 and not S[:, j].any())
            met = profile_met(targets, cert.rtol_reached, cert.absolute_reached, cert.l1_bound)
            result[name] = Iterate(X[:, j].copy(), R[:, j].copy(), cert, met)
        history.append({n: (float(np.abs(R[:, j]).max(initial=0.0)), max(result[n].certificate.rtol_reached,
                                                                            result[n].certificate.absolute_reached),
                            result[n].certificate.l1_bound) for j, n in enumerate(names)})
        if progress is not None:
            progress(it, history[-1])
        if all(v.met for v in result.values()):
            return Recompute(result, it, history)
        X = nxt
    return Recompute(result, max_iter, history)
