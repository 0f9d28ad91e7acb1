"""The incremental PageRank engine on integer node ids.

:class:`Engine` owns one :class:`~solver.graph.DynamicGraph` and, per profile,
an estimate ``p``, a residual ``r`` and a teleport vector ``s``. Profile 0 is
the global one (``s = 1`` on every node, unnormalised so that a new node is a
local change); further profiles are personalizations whose teleport weights
are set by seed events.

Typical use::

    eng = Engine(damping=0.85, tolerance=1e-6)
    eng.apply(ops, src, dst, weight)   # numpy arrays, one batch
    eng.settle()                       # push until the bound is met
    eng.scores("global"), eng.certified_bound("global")

For string node ids and event records see :class:`solver.ranker.Ranker`.

References
----------
.. [1] R. Andersen, F. Chung, K. Lang, "Local graph partitioning using
   PageRank vectors", FOCS 2006.
.. [2] H. Zhang, P. Lofgren, A. Goel, "Approximate personalized PageRank on
   dynamic graphs", KDD 2016.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from . import kernels
from .exact import solve
from .graph import DynamicGraph
from .bounds import CERTIFIED_TOP, ROUNDING_FLOOR, Certificate, Weights, certify, global_upper, kth_largest, \
    normalised_bounds, unnormalised_bounds
from .metrics import certified_bound, top_k_indices

GLOBAL = "global"

#: A sweep costs one pass over the slot arrays (about 1.2 ns an edge on two threads,
#: measured); a push touches edges at random (about 40 ns each), so once a frontier
#: holds more than this share of the edges, a sweep removes residual more cheaply.
SWEEP_SHARE = 0.02

#: A residual above this many times the error budget is settled by sweeps from the
#: start: pushes would not spare a sweep (measured on 20k- and 200k-node graphs, where
#: pushes first paid off up to about 300 times the budget and cost 10-25 % more beyond
#: 1,000 times).
PUSH_LIMIT = 1000.0

#: Accepted range of edge and (non-zero) seed weights. Scores depend only on weight
#: ratios; beyond this range floating point can no longer certify them.
MIN_WEIGHT = 1e-100
MAX_WEIGHT = 1e100

#: Factor by which the push threshold falls between local phases.
THETA_STEP = 0.5

#: Once the rounding of seed updates may exceed this share of a profile's error
#: budget, its residual is recomputed exactly before settling.
SEED_ROUNDING_SHARE = 1e-3

#: Share of the residual budget that tiny residuals may hold while parked off the
#: active lists (so that each settle scans only nodes that matter).
PARK_SHARE = 0.25

#: Default relative tolerance of the per-node contract: every published score within 0.1 %.
RTOL = 1e-3

#: Pushes of a per-node settle hand over to global sweeps once they have touched this
#: share of the edges, and at least :data:`PUSH_EDGE_FLOOR` edges (on small graphs a
#: sweep saves nothing). A pushed edge costs about 7 times a swept one with the sweep's
#: scans counted (35 against 5 ns at medium), so the pushes a hand-over can cut short
#: cost about two sweeps; at 0.1 the pushes of 100 to 1,000 events, often nearly
#: done, were cut short for sweeps that took longer (DEVELOPERS.md).
PUSH_EDGE_SHARE = 0.3
PUSH_EDGE_FLOOR = 50_000

#: Safety factor on the per-node thresholds: the running residual carries rounding
#: (about 1e-12 relative), far below this margin.
THRESHOLD_MARGIN = 0.99
#: How a run of global sweeps under the per-node contract ended (``Engine._sweep_to_thresholds``).
SWEEPS_PUSH_ON, SWEEPS_DONE, SWEEPS_STALLED = 0, 1, 2

#: A personalization's error budget ``rtol / (1 + rtol)`` is split in four: the part
#: relative to its own scores, the absolute part at hubs, the shift of its sum, slack.
BUDGET_PARTS = 4.0

#: Attempts to settle a personalization to its contract (each tightens the thresholds).
CONTRACT_ATTEMPTS = 8

#: A personalization's K-th best estimate is re-sorted only when fewer than K estimates
#: reach this share of the value last sorted (a count certifies the lower bound).
KTH_MARGIN = 0.8

#: A batch with at least this many inserts, and at least this share of the stored edges,
#: first sizes every block it would overflow for its final degree (Engine._presize): a
#: bulk insert then packs like a bulk load. Smaller batches let full blocks double
#: (sorting the batch's sources would cost more than the slack saved).
PRESIZE_MIN_INSERTS = 1024
PRESIZE_SHARE = 1 / 16


@dataclass
class SettleStats:
    """Work done by :meth:`Engine.settle`, summed over profiles."""

    pushes: int = 0
    push_edges: int = 0
    sweeps: int = 0
    sweep_edges: int = 0
    phases: int = 0
    #: Seconds inside the per-node push kernels (the settle's fixed costs and sweeps left out);
    #: a measurement, not work: equal stats may differ in it.
    push_seconds: float = field(default=0.0, compare=False)

    @property
    def edge_touches(self) -> int:
        return self.push_edges + self.sweep_edges

    def add(self, other: "SettleStats") -> None:
        self.pushes += other.pushes
        self.push_edges += other.push_edges
        self.sweeps += other.sweeps
        self.sweep_edges += other.sweep_edges
        self.phases += other.phases
        self.push_seconds += other.push_seconds


def _reject(i: int, src: np.ndarray, dst: np.ndarray, weight: np.ndarray) -> None:
    """Raise the ValueError for event ``i``, found bad by :func:`kernels.check_batch`."""
    if src[i] < 0 or dst[i] < 0:
        raise ValueError(f"event {i}: negative node id or profile row ({int(src[i])} -> {int(dst[i])})")
    raise ValueError(f"event {i}: weight {weight[i]!r} outside [{MIN_WEIGHT:g}, {MAX_WEIGHT:g}] "
                     "(seeds may also be 0)")


class Engine:
    """Estimate, residual and teleport of every profile over one dynamic graph.

    Parameters
    ----------
    damping : float
        Probability ``d`` of following an edge (default 0.85, common practice
        since the original PageRank report).
    rtol : float or None
        The per-node contract (default 1e-3): every published global score
        within relative ``rtol`` of the exact PageRank; for a personalization,
        every node scoring at least its ``certified_top``-th best score within
        relative ``rtol`` and the others within ``rtol`` times that score.
        ``None`` turns it off (then ``tolerance`` must be set).
    tolerance : float or None
        Optional second target (default off): the certified bound on the
        normalised L1 error of every profile's scores. With both set,
        :meth:`settle` meets both.
    certified_top : int
        ``K`` of the personalizations' contract (default 100).
    node_capacity, edge_capacity : int
        Initial array sizes; they grow as needed.
    """

    def __init__(
        self,
        damping: float = 0.85,
        *,
        rtol: float | None = RTOL,
        tolerance: float | None = None,
        certified_top: int = CERTIFIED_TOP,
        node_capacity: int = 1024,
        edge_capacity: int = 4096,
    ) -> None:
        if not 0.0 < damping < 1.0:
            raise ValueError(f"damping must lie strictly between 0 and 1, got {damping}")
        self.damping = float(damping)
        self.teleport = 1.0 - self.damping
        self.graph = DynamicGraph(node_capacity, edge_capacity)
        self.profiles: list[str] = [GLOBAL]
        cap = self.graph.node_capacity
        self.P = np.zeros((1, cap))
        self.R = np.zeros((1, cap))
        self.S = np.zeros((1, cap))
        # the active lists and the push queue keep kernels.SPARE_SLOTS beyond the capacity
        self._active = np.zeros((1, cap + kernels.SPARE_SLOTS), dtype=np.int32)
        # per node and profile: kernels.ACTIVE (on the active list), kernels.QUEUED (in the push queue)
        self._flags = np.zeros((1, cap), dtype=np.uint8)
        self._n_active = np.zeros(1, dtype=np.int64)
        self._parked = np.zeros(1)  # residual mass of nodes parked off the active lists
        self._parked_max = np.zeros(1)  # largest |r| parked since the last full listing
        self._psum = np.zeros(1)  # sum of p per profile, kept by the kernels (re-summed on every full pass)
        self._weights: list[Weights] = [Weights()]
        self._kth: dict[int, float] = {}  # profile -> its K-th best estimate when last sorted
        #: Certificates of the last :meth:`settle_certified` (what was last published).
        self.last_certificates: dict[str, Certificate] = {}
        self.set_targets(rtol, tolerance, certified_top)
        self._seed_error = np.zeros(1)  # rounding bound of seed updates to the residual, per profile
        self._queue = np.zeros(cap + kernels.SPARE_SLOTS, dtype=np.int32)
        self._tmp = np.zeros(cap)
        self._spill = np.zeros((kernels.SWEEP_CHUNKS - 1, cap))  # partial sums of parallel sweeps

    def set_targets(self, rtol: float | None = RTOL, tolerance: float | None = None,
                    certified_top: int | None = None) -> None:
        """Change the settle targets (the next :meth:`settle` meets them)."""
        if rtol is None and tolerance is None:
            raise ValueError("set rtol, tolerance or both: settle needs a target")
        if rtol is not None and not 0.0 < rtol < 1.0:
            raise ValueError(f"rtol must lie strictly between 0 and 1, got {rtol}")
        if tolerance is not None and not tolerance > 0.0:
            raise ValueError(f"tolerance must be > 0, got {tolerance}")
        if certified_top is not None and int(certified_top) < 1:
            raise ValueError(f"certified_top must be at least 1, got {certified_top}")
        self.rtol = None if rtol is None else float(rtol)
        self.tolerance = None if tolerance is None else float(tolerance)
        if certified_top is not None:
            self.certified_top = int(certified_top)
        self._weights[0] = Weights(0.0, self._global_limit(0.0) if self.rtol is not None else 1.0)

    # ------------------------------------------------------------ structure
    @property
    def n_nodes(self) -> int:
        return self.graph.n_nodes

    @property
    def n_edges(self) -> int:
        return self.graph.n_edges

    def profile_index(self, name: str) -> int:
        """Row of profile ``name``; raises KeyError when it does not exist."""
        return self.profiles.index(name)

    def add_profile(self, name: str) -> int:
        """Create an empty personalization (no seeds yet) and return its row."""
        if name in self.profiles:
            return self.profiles.index(name)
        self.profiles.append(name)
        cap = self.graph.node_capacity
        self.P = np.vstack([self.P, np.zeros(cap)])
        self.R = np.vstack([self.R, np.zeros(cap)])
        self.S = np.vstack([self.S, np.zeros(cap)])
        self._active = np.vstack([self._active, np.zeros(cap + kernels.SPARE_SLOTS, dtype=np.int32)])
        self._flags = np.vstack([self._flags, np.zeros(cap, dtype=np.uint8)])
        self._n_active = np.append(self._n_active, 0)
        self._parked = np.append(self._parked, 0.0)
        self._parked_max = np.append(self._parked_max, 0.0)
        self._psum = np.append(self._psum, 0.0)
        self._seed_error = np.append(self._seed_error, 0.0)
        self._weights.append(Weights())
        return len(self.profiles) - 1

    def ensure_nodes(self, n_nodes: int, n_new_edges: int = 0) -> None:
        """Make nodes ``0 .. n_nodes-1`` exist and room for ``n_new_edges`` edges.

        A new node enters the global profile with teleport weight 1, which
        the residual takes up (``r(v) += s(v)``).
        """
        old = self.graph.n_nodes
        if self.graph.reserve(n_nodes, n_new_edges):
            self._grow_node_arrays(self.graph.node_capacity)
        if n_nodes > old:
            self.S[0, old:n_nodes] = 1.0
            self.R[0, old:n_nodes] += 1.0
            new = np.arange(old, n_nodes, dtype=np.int32)
            fresh = new[(self._flags[0, old:n_nodes] & kernels.ACTIVE) == 0]
            start = int(self._n_active[0])
            self._active[0, start : start + fresh.size] = fresh
            self._flags[0, fresh] |= kernels.ACTIVE
            self._n_active[0] += fresh.size

    def _grow_node_arrays(self, cap: int) -> None:
        def grow(arr: np.ndarray, spare: int = 0) -> np.ndarray:
            out = np.zeros((arr.shape[0], cap + spare), dtype=arr.dtype)
            out[:, : arr.shape[1]] = arr
            return out

        self.P, self.R, self.S = grow(self.P), grow(self.R), grow(self.S)
        self._active, self._flags = grow(self._active, spare=kernels.SPARE_SLOTS), grow(self._flags)
        self._queue = np.zeros(cap + kernels.SPARE_SLOTS, dtype=np.int32)
        self._tmp = np.zeros(cap)
        self._spill = np.zeros((kernels.SWEEP_CHUNKS - 1, cap))

    # ------------------------------------------------------------ events
    def apply(
        self,
        op: np.ndarray,
        src: np.ndarray,
        dst: np.ndarray,
        weight: np.ndarray,
    ) -> int:
        """Apply one batch of validated events in order; return the no-op count.

        Parameters
        ----------
        op : array of int8
            :data:`~solver.kernels.OP_INSERT`, ``OP_DELETE`` or ``OP_SEED``.
        src, dst : arrays of int
            Node ids (for a seed: the node and the profile row).
        weight : array of float
            Edge weight for inserts (finite, > 0), teleport weight for seeds
            (finite, >= 0); ignored for deletes.
        """
        op = np.ascontiguousarray(op, dtype=np.int8)
        src = np.ascontiguousarray(src, dtype=np.int32)
        dst = np.ascontiguousarray(dst, dtype=np.int32)
        weight = np.ascontiguousarray(weight, dtype=np.float64)
        if op.size == 0:
            return 0
        bad, top, n_inserts = kernels.check_batch(op, src, dst, weight, MIN_WEIGHT, MAX_WEIGHT)
        if bad >= 0:
            _reject(int(bad), src, dst, weight)
        graph = self.graph
        if top > graph.n_nodes:
            self.ensure_nodes(int(top), int(n_inserts))
        elif n_inserts:
            graph.reserve_edges(int(n_inserts))
        if n_inserts >= PRESIZE_MIN_INSERTS and n_inserts >= PRESIZE_SHARE * graph.n_edges:
            self._presize(op, src)
        more, done = self._apply_from(op, src, dst, weight, 0)
        noop = int(more)
        while done < op.size:
            # a block had to move and the slot arrays were full: grow them, go on from there
            graph.reserve_slots(2 * int(graph.arrays.cap[src[done]]) + 2 * (op.size - done))
            more, done = self._apply_from(op, src, dst, weight, done)
            noop += int(more)
        if graph.needs_compaction():
            graph.compact()
        return noop

    def _apply_from(self, op: np.ndarray, src: np.ndarray, dst: np.ndarray, weight: np.ndarray,
                    first: int) -> tuple[int, int]:
        """Run :func:`kernels.apply_events` from event ``first``; ``(no-ops, where it stopped)``."""
        g = self.graph.arrays
        return kernels.apply_events(
            op, src, dst, weight,
            g.start, g.cap, g.out_weight, g.out_degree, g.dst, g.weight, g.free_blocks,
            g.table, g.counters,
            self.P, self.R, self.S, self.teleport, self.damping,
            self._active, self._n_active, self._flags, self._parked, self._seed_error,
            kernels.LOCAL_REPAIR_MAX_DEGREE, self._psum, first,
        )

    def _presize(self, op: np.ndarray, src: np.ndarray) -> None:
        """Before many inserts, move each block they would overflow to its final size plus a quarter.

        Doubling would leave a node that ends just past a power of two with
        half its block empty; this packs a bulk insert like a bulk load.
        """
        g = self.graph.arrays
        nodes, counts = np.unique(src[op == kernels.OP_INSERT], return_counts=True)
        need = g.out_degree[nodes] + counts
        over = need > g.cap[nodes]
        nodes = nodes[over].astype(np.int32)
        sizes = self.graph.slots_for(need[over]).astype(np.int32)
        self.graph.reserve_slots(int(sizes.sum(dtype=np.int64)))
        g = self.graph.arrays
        kernels.presize_blocks(nodes, sizes, g.start, g.cap, g.out_degree, g.dst, g.weight, g.free_blocks,
                               g.table, g.counters)

    def settle(self, tolerance: float | None = None) -> SettleStats:
        """Push every profile until it meets the contract: ``rtol`` and, if set, the L1 ``tolerance``.

        ``tolerance`` given here replaces the L1 target of this call.
        """
        tol = self.tolerance if tolerance is None else float(tolerance)
        total = SettleStats()
        n = self.n_nodes
        for k in range(len(self.profiles)):
            if self._seed_error[k] > 0.0 and self._seed_error[k] > SEED_ROUNDING_SHARE * self._smallest_budget(k, tol):
                # seed updates may have rounded the residual beyond a sliver of the budget
                self._recompute_profile_residual(k)
            if self.rtol is not None:
                total.add(self._settle_relative(k))
            if tol is None:
                self._compact(k, None, 0.0)
                continue
            stats, s_p = self._settle_profile(k, tol)
            total.add(stats)
            # (the running sum s_p is exact enough to rule the case out when it is not small)
            if s_p < 1.0 and self.S[k, :n].any() and float(self.P[k, :n].sum()) <= 0.0:
                # the running residual lost the teleport mass to cancellation (a seed removed and
                # re-added with weights far apart): rebuild it exactly and settle once more
                self._recompute_profile_residual(k)
                total.add(self._settle_profile(k, tol)[0])
        return total

    def _smallest_budget(self, k: int, tol: float | None) -> float:
        """The smallest residual that matters to profile ``k``'s targets (for the rounding guard)."""
        n = self.n_nodes
        budgets = []
        if tol is not None:
            budgets.append(tol * float(self.S[k, :n].sum()))
        if self.rtol is not None:
            budgets.append(self._weights[k].beta)
        return min(budgets)

    # ------------------------------------------------------------ per-node contract
    def _settle_relative(self, k: int) -> SettleStats:
        """Settle profile ``k`` to the per-node contract."""
        if k == 0:
            return self._settle_global()
        stats = SettleStats()
        n = self.n_nodes
        if not self.S[k, :n].any():
            return stats
        weights = None
        for attempt in range(CONTRACT_ATTEMPTS):
            weights = self._personal_weights(k, weights, fresh=attempt > 0)
            self._weights[k] = weights
            stats.add(self._push_and_sweep(k, weights))
            # pushes move the estimates: the K-th score the thresholds assumed must still hold
            if self._sum_shift(k) <= self._budget_part() and self._kth_holds(k, weights.kth):
                break
        return stats

    def _budget_part(self) -> float:
        """A personalization's share of the error budget for each of its error terms."""
        return self.rtol / (1.0 + self.rtol) / BUDGET_PARTS

    def _sum_shift(self, k: int) -> float:
        """``||r_k||_1 / sum p_k``: how far the normalisation may move (``inf`` before any estimate)."""
        return kernels.sum_shift(k, self.R, self._active, self._n_active, self._parked, self._psum)

    def _settle_global(self) -> SettleStats:
        """Push the global profile to the largest threshold that certifies ``rtol``.

        The published score's certified relative error is
        ``(rho / (1 - rho) + delta) / (1 - delta)`` with ``rho = max |r|`` and
        ``delta = ||r||_1 / sum p`` (``solver.bounds``). Pushes never raise
        ``||r||_1``, so a threshold chosen from ``delta`` after pushing stays
        valid; thresholds come from a ladder of quarter octaves below the
        largest one, so that small changes of ``delta`` do not unpark nodes.
        The ladder runs inside one kernel (:func:`solver.kernels.push_global`):
        a settle after a few events is one call.
        """
        g = self.graph.arrays
        stats = np.zeros(5, dtype=np.int64)
        edge_limit = self._edge_limit()
        beta = self._weights[0].beta  # where the last settle ended: the kernel starts near it
        push_seconds = 0.0
        for _ in range(1_000):
            started = time.perf_counter()
            handover, beta = kernels.push_global(
                self.n_nodes, self.n_edges, g.start, g.out_weight, g.out_degree, g.dst, g.weight,
                self.P, self.R, self.S, self.teleport, self.damping,
                self._active, self._n_active, self._flags, self._parked, self._parked_max, self._queue,
                edge_limit, stats, self._psum, self.graph.unit_weights, self.rtol, THRESHOLD_MARGIN, beta,
            )
            push_seconds += time.perf_counter() - started
            if not handover or self._sweep_to_thresholds(0, Weights(0.0, beta), edge_limit, stats) == SWEEPS_STALLED:
                break
        self._weights[0] = Weights(0.0, beta)
        return SettleStats(*(int(x) for x in stats), push_seconds=push_seconds)

    def _edge_limit(self) -> float:
        """Edges a per-node push may touch before it hands over to global sweeps."""
        return max(PUSH_EDGE_SHARE * self.n_edges, PUSH_EDGE_FLOOR)

    def _global_limit(self, delta: float) -> float:
        """Largest ``max |r_g|`` certifying ``rtol`` given the sum shift ``delta`` (0 if none does)."""
        return kernels.global_limit(delta, self.rtol, THRESHOLD_MARGIN)

    def _personal_weights(self, k: int, previous: Weights | None, fresh: bool) -> Weights:
        """Thresholds ``alpha s + beta`` under which personalization ``k`` meets ``rtol``.

        With ``c = max |r| / (alpha s + beta) <= 1`` the lemma bounds
        ``|x_k(v) - p_k(v)|`` by ``alpha x_k(v) + beta x_g(v)``: ``alpha`` takes a
        part of the relative budget; ``beta`` is sized so that even at the
        largest global score the absolute part stays within that share of the
        ``K``-th best score (a certified lower bound, :meth:`_kth_score`). A
        retry (``previous``) halves ``beta``.
        """
        n = self.n_nodes
        part = self._budget_part()
        kth = self._kth_score(k, fresh)
        theta_g = self._weights[0].beta
        xg_max = float(self.P[0, :n].max(initial=0.0)) / (1.0 - min(theta_g, 0.5))
        alpha = part * THRESHOLD_MARGIN
        beta = alpha * (1.0 - part) * kth / xg_max if xg_max > 0.0 else alpha * kth
        if previous is not None:
            beta = min(beta, 0.5 * previous.beta)
        return Weights(alpha, max(beta, 1e-300), kth)

    def _kth_score(self, k: int, fresh: bool) -> float:
        """A lower bound on the ``certified_top``-th largest estimate of profile ``k``, as it is now.

        The partial sort is cached; in between, :meth:`_kth_holds` checks with
        one count that :data:`KTH_MARGIN` times the cached value is still a
        lower bound, else it is recomputed. Estimates within the rounding floor
        of zero do not count (fewer than K significant ones: the smallest).
        """
        cached = self._kth.get(k, 0.0)
        if not fresh and cached > 0.0 and self._kth_holds(k, KTH_MARGIN * cached):
            return KTH_MARGIN * cached
        p = self._significant(k)
        if p.size:
            cached = kth_largest(p, self.certified_top)
        else:  # nothing settled yet: x_k >= a s_k gives a lower bound
            seeds = self.S[k, : self.n_nodes]
            cached = self.teleport * kth_largest(seeds[seeds > 0.0], self.certified_top)
        self._kth[k] = cached
        return cached

    def _significant(self, k: int) -> np.ndarray:
        """Profile ``k``'s estimates above the rounding floor of zero."""
        p = self.P[k, : self.n_nodes]
        return p[p > ROUNDING_FLOOR * p.max(initial=0.0)]

    def _kth_holds(self, k: int, value: float) -> bool:
        """At least K significant estimates (all of them, when fewer) reach ``value``."""
        significant, reached = kernels.count_significant(k, self.P, self.n_nodes, ROUNDING_FLOOR, value)
        return reached >= min(self.certified_top, significant)

    def settle_certified(self) -> dict[str, Certificate]:
        """Settle, then certify every profile; tighten and settle again where a certificate falls short.

        What publishing calls (snapshots, the read API): the returned
        certificates meet ``rtol`` unless rounding makes it impossible.
        """
        self.settle()
        certificates = {}
        for k, name in enumerate(self.profiles):
            cert = self.certificate(name)
            attempt = 0
            while self.rtol is not None and not cert.meets(self.rtol) and attempt < CONTRACT_ATTEMPTS:
                attempt += 1
                if k == 0:
                    weights = Weights(0.0, self._weights[0].beta / 2.0)
                else:
                    weights = self._personal_weights(k, self._weights[k], fresh=True)
                self._weights[k] = weights
                self._push_and_sweep(k, weights)
                cert = self.certificate(name)
            certificates[name] = cert
        self.last_certificates = certificates
        return certificates

    def _push_and_sweep(self, k: int, weights: Weights) -> SettleStats:
        """Forward push to the thresholds ``weights``; global sweeps where pushes would cost more."""
        g = self.graph.arrays
        n = self.n_nodes
        stats = np.zeros(5, dtype=np.int64)
        if self._parked_max[k] > weights.beta:
            # thresholds fell below residuals parked earlier: list every node again
            kernels.relist_active(k, self.R, n, self._active, self._n_active, self._flags, self._parked)
            self._parked_max[k] = 0.0
        edge_limit = self._edge_limit()
        unit = self.graph.unit_weights
        push_seconds = 0.0
        for _ in range(1_000):
            started = time.perf_counter()
            handover = kernels.push_to_thresholds(
                k, n, self.n_edges, g.start, g.out_weight, g.out_degree, g.dst, g.weight,
                self.P, self.R, self.S, weights.alpha, weights.beta, self.teleport, self.damping,
                self._active, self._n_active, self._flags, self._parked,
                self._queue, edge_limit, stats, self._psum, unit,
            )
            push_seconds += time.perf_counter() - started
            if not handover or self._sweep_to_thresholds(k, weights, edge_limit, stats) != SWEEPS_PUSH_ON:
                break
        return SettleStats(*(int(x) for x in stats), push_seconds=push_seconds)

    def _sweep_to_thresholds(self, k: int, weights: Weights, edge_limit: float, stats: np.ndarray) -> int:
        """Global sweeps until pushes can finish.

        Returns :data:`SWEEPS_PUSH_ON` (pushes should finish the work),
        :data:`SWEEPS_DONE` (every node is within its threshold) or
        :data:`SWEEPS_STALLED` (rounding stops progress).

        Sweeps shrink the residual everywhere but slowly at hubs, where it
        keeps flowing in; so they stop once the nodes still above their
        thresholds carry at most ``edge_limit`` out-edges, and pushes finish.
        """
        n = self.n_nodes
        best = np.inf
        stalled = 0
        while True:
            self._sweep(k)
            stats[2] += 1
            stats[3] += self.n_edges
            worst, frontier = kernels.over_thresholds(k, n, self.R, self.S, weights.alpha, weights.beta,
                                                      self.graph.arrays.out_degree)
            if worst <= 1.0 or frontier <= edge_limit:
                break
            stalled = stalled + 1 if worst >= best else 0
            best = min(best, worst)
            if stalled >= 50:
                break  # rounding floor: the certificate reports what was reached
        kernels.relist_active(k, self.R, n, self._active, self._n_active, self._flags, self._parked)
        self._parked_max[k] = 0.0
        if stalled >= 50:
            return SWEEPS_STALLED
        return SWEEPS_PUSH_ON if worst > 1.0 else SWEEPS_DONE

    def certificate(self, profile: str = GLOBAL) -> Certificate:
        """Certified per-node bounds of ``profile``'s published scores, and the contract they meet.

        One pass over the nodes (``solver.bounds``): call it when publishing,
        not per event.
        """
        k = self.profile_index(profile)
        n = self.n_nodes
        p, r, s = self.P[k, :n], self.R[k, :n], self.S[k, :n]
        top = None if k == 0 else self.certified_top
        if k > 0 and not s.any():
            zeros = np.zeros(n)
            return certify(zeros, zeros, 0.0, top)
        l1 = certified_bound(p, r)
        xbar_g = global_upper(self.P[0, :n], self.R[0, :n])
        err = unnormalised_bounds(p, r, s, xbar_g, None if k == 0 else self._weights[k])
        bounds = normalised_bounds(p, r, err, l1)
        total = float(p.sum())
        scores = p / total if total > 0.0 else np.zeros(n)
        return certify(scores, bounds, l1, top)

    def error_bounds(self, profile: str = GLOBAL) -> np.ndarray:
        """Certified bound on ``|published - exact|`` for every node of ``profile``."""
        return self.certificate(profile).bounds

    def _settle_profile(self, k: int, tol: float) -> tuple[SettleStats, float]:
        """Settle profile ``k``; return the work done and the sum of its estimate."""
        g = self.graph.arrays
        stats = np.zeros(5, dtype=np.int64)
        sweep, rho, s_p, abs_p = kernels.settle_profile(
            k, tol, self.n_nodes, self.n_edges,
            g.start, g.out_weight, g.out_degree, g.dst, g.weight,
            self.P, self.R, self.teleport, self.damping,
            self._active, self._n_active, self._flags, self._parked,
            self._queue, SWEEP_SHARE, THETA_STEP, PUSH_LIMIT, stats,
        )
        if sweep:
            s_p = self._sweep_until_done(k, tol, rho, s_p, abs_p, stats)
        self._psum[k] = s_p
        self._compact(k, tol, float(s_p))
        return SettleStats(*(int(x) for x in stats)), float(s_p)

    def _sweep_until_done(self, k: int, tol: float, rho: float, s_p: float, abs_p: float,
                          stats: np.ndarray) -> float:
        """Global sweeps of profile ``k`` until its bound is met or rounding stalls them.

        The loop runs here, not in a kernel: the parallel scatter must be
        called from Python (see :func:`solver.kernels.scatter_nodes`).
        Returns the sum of the estimate.
        """
        n = self.n_nodes
        stalled = 0
        while not kernels.is_done(rho, s_p, abs_p, tol):
            before = rho
            rho, s_p, abs_p = self._sweep(k)
            stats[2] += 1
            stats[3] += self.n_edges
            stalled = stalled + 1 if rho >= before else 0
            if stalled >= 50:
                break  # rounding floor reached: the bound reported is what it is
        kernels.relist_active(k, self.R, n, self._active, self._n_active, self._flags, self._parked)
        self._parked_max[k] = 0.0
        return s_p

    def _scatter(self, out: np.ndarray, coef: np.ndarray) -> None:
        """``out += P^T``-like scatter of ``coef`` over every edge (``out`` has one entry per node)."""
        g = self.graph.arrays
        n = self.n_nodes
        bounds = kernels.chunk_bounds(n, g.out_degree, kernels.SWEEP_CHUNKS)
        kernels.scatter_nodes(out[:n], self._spill, coef, bounds, g.start, g.out_degree, g.dst, g.weight,
                              self.graph.unit_weights)

    def _sweep(self, k: int) -> tuple[float, float, float]:
        """One global sweep ``p += a r; r = d P^T r``; returns ``(||r||_1, sum p, ||p||_1)``."""
        g = self.graph.arrays
        n = self.n_nodes
        kernels.sweep_begin(k, self.P, self.R, self._tmp, n, g.out_weight, self.teleport, self.damping)
        self._scatter(self.R[k], self._tmp)
        sums = kernels.profile_sums(k, self.P, self.R, n)
        self._psum[k] = sums[1]
        return sums

    def _compact(self, k: int, tol: float | None, s_p: float) -> None:
        """Shorten the active list: park residuals that no target needs pushed.

        Under the per-node contract every residual within its threshold may be
        parked; under an L1 target, tiny ones within a share of the error budget.
        """
        each, budget = np.inf, np.inf
        if tol is not None:
            budget = PARK_SHARE * tol * max(s_p, 0.0) / (2.0 + tol)
            each = kernels.park_threshold(k, self.R, self._active, self._n_active, budget - self._parked[k])
        if self.rtol is not None:
            each = min(each, self._weights[k].beta)
        largest = kernels.compact_active(k, self.R, self._active, self._n_active, self._flags, self._parked,
                                         budget, each)
        self._parked_max[k] = max(self._parked_max[k], largest)

    # ------------------------------------------------------------ exactness
    def recompute_residual(self) -> float:
        """Recompute out-weights and every residual exactly from ``p``.

        Removes the floating-point drift of incremental updates. Returns the
        largest drift found, relative to ``max(||s||_1, 1)`` of its profile.
        """
        n = self.n_nodes
        self.graph.arrays.out_weight[:n] = self.graph.exact_out_weight()
        return max((self._recompute_profile_residual(k) for k in range(len(self.profiles))), default=0.0)

    def _recompute_profile_residual(self, k: int) -> float:
        """Exact residual of profile ``k`` from ``p``; returns the drift found (relative)."""
        g = self.graph.arrays
        n = self.n_nodes
        fresh = np.zeros(n)
        kernels.exact_residual_begin(k, n, self.P, self.S, g.out_weight, self.teleport, self.damping,
                                     self._tmp, fresh)
        self._scatter(fresh, self._tmp)
        scale = max(float(np.abs(self.S[k, :n]).sum()), 1.0)
        drift = float(np.abs(fresh - self.R[k, :n]).max(initial=0.0)) / scale
        self.R[k, :n] = fresh
        self._psum[k] = float(self.P[k, :n].sum())
        self._seed_error[k] = 0.0
        self._reset_active(k)
        return drift

    def restore(
        self,
        n_nodes: int,
        edges: tuple[np.ndarray, np.ndarray, np.ndarray],
        estimates: dict[str, np.ndarray],
        teleports: dict[str, np.ndarray],
    ) -> None:
        """Load a saved state into an empty engine; the residual is recomputed exactly.

        Parameters
        ----------
        n_nodes : int
            Number of nodes (ids ``0 .. n_nodes-1``).
        edges : (src, dst, weight) arrays
        estimates : profile name -> estimate ``p`` (length ``n_nodes``)
        teleports : profile name -> teleport ``s`` for personalizations; the
            global profile's teleport is 1 everywhere.

        Raises
        ------
        ValueError
            When an edge is listed twice, a weight is out of range or an
            endpoint is not a node.
        """
        if self.n_nodes or self.n_edges:
            raise RuntimeError("restore() needs an empty engine")
        for name in estimates:
            self.add_profile(name)
        self.ensure_nodes(n_nodes, int(edges[0].size))
        self._load_edges(*edges)
        for name, p in estimates.items():
            self.P[self.profile_index(name), :n_nodes] = p
        for name, s in teleports.items():
            if name != GLOBAL:
                self.S[self.profile_index(name), :n_nodes] = s
        self.recompute_residual()

    def _load_edges(self, src: np.ndarray, dst: np.ndarray, weight: np.ndarray) -> None:
        """Bulk-load distinct edges into the empty graph (``p`` is still 0: nothing to repair)."""
        src = np.ascontiguousarray(src, dtype=np.int32)
        dst = np.ascontiguousarray(dst, dtype=np.int32)
        weight = np.ascontiguousarray(weight, dtype=np.float64)
        if not src.size:
            return
        bad, top, _ = kernels.check_batch(np.zeros(src.size, np.int8), src, dst, weight, MIN_WEIGHT, MAX_WEIGHT)
        if bad >= 0 and src[bad] >= 0 and dst[bad] >= 0:
            _reject(int(bad), src, dst, weight)
        if bad >= 0 or top > self.n_nodes:
            raise ValueError(f"edge endpoints must lie in 0 .. {self.n_nodes - 1}")
        sizes = self.graph.slots_for(np.bincount(src, minlength=self.n_nodes)).astype(np.int32)
        self.graph.reserve_slots(int(sizes.sum()))
        g = self.graph.arrays
        twice = kernels.load_edges(src, dst, weight, sizes, g.start, g.cap, g.out_weight, g.out_degree,
                                   g.dst, g.weight, g.table, g.counters)
        if twice >= 0:
            raise ValueError(f"edge {twice} ({int(src[twice])} -> {int(dst[twice])}) is listed twice")

    def _reset_active(self, k: int) -> None:
        n = self.n_nodes
        self._parked[k] = 0.0
        self._parked_max[k] = 0.0
        self._flags[k, :] = 0
        nz = np.flatnonzero(self.R[k, :n]).astype(np.int32)
        self._active[k, : nz.size] = nz
        self._flags[k, nz] = kernels.ACTIVE
        self._n_active[k] = nz.size

    def exact_scores(self, profile: str = GLOBAL, tol: float = 1e-12, warm: bool = False) -> np.ndarray:
        """Scores re-solved from scratch (``warm=False``) or from ``p`` to ``tol``."""
        k = self.profile_index(profile)
        n = self.n_nodes
        PT = self.graph.transition_transpose()
        x0 = self.P[k, :n] if warm else None
        return solve(PT, self.S[k, :n], self.damping, tol, x0=x0).scores

    def resolve(self, tol: float = 1e-12, warm: bool = True) -> int:
        """Set every profile's estimate to an exact solve (``tol``) and recompute residuals.

        A full recompute: used to start from a bulk-loaded graph and by
        operators who want the residual near zero. Returns the iterations used.
        """
        n = self.n_nodes
        PT = self.graph.transition_transpose()
        iterations = 0
        for k in range(len(self.profiles)):
            x0 = self.P[k, :n] if warm and self.P[k, :n].any() else None
            sol = solve(PT, self.S[k, :n], self.damping, tol, x0=x0)
            self.P[k, :n] = sol.x
            iterations += sol.iterations
        self.recompute_residual()
        return iterations

    # ------------------------------------------------------------ reading
    def certified_bound(self, profile: str = GLOBAL) -> float:
        """Certified bound on the normalised L1 error of ``profile``'s scores."""
        k = self.profile_index(profile)
        n = self.n_nodes
        return certified_bound(self.P[k, :n], self.R[k, :n], empty=not self.S[k, :n].any())

    def scores(self, profile: str = GLOBAL) -> np.ndarray:
        """Normalised scores of ``profile`` (a copy; sums to 1, or all zero when empty)."""
        k = self.profile_index(profile)
        p = self.P[k, : self.n_nodes]
        total = p.sum()
        return p / total if total > 0 else np.zeros_like(p)

    def top_k(self, profile: str = GLOBAL, k: int = 20) -> tuple[np.ndarray, np.ndarray]:
        """Node ids and scores of the ``k`` best nodes of ``profile``, best first."""
        sc = self.scores(profile)
        idx = top_k_indices(sc, k)
        return idx, sc[idx]

    def teleport_vector(self, profile: str = GLOBAL) -> np.ndarray:
        """The (unnormalised) teleport weights of ``profile``."""
        return self.S[self.profile_index(profile), : self.n_nodes].copy()

    def memory_bytes(self) -> dict[str, int]:
        """Bytes held: graph arrays, per-edge arrays alone, profile arrays."""
        prof = sum(x.nbytes for x in (self.P, self.R, self.S, self._active, self._flags))
        prof += self._queue.nbytes + self._tmp.nbytes
        return {
            "graph": self.graph.memory_bytes(),
            "edges": self.graph.edge_memory_bytes(),
            "profiles": int(prof),
        }
