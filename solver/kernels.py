"""Compiled per-edge kernels: event repair, forward push, global sweep.

Notation (see ``DEVELOPERS.md`` and the design notes): damping ``d``, teleport
probability ``a = 1 - d``, teleport vector ``s`` per profile, estimate ``p`` and
residual ``r`` with the invariant

    r = s - (I - d P^T) p / a,

so that the exact solution of ``x = a s + d P^T x`` is ``x = p + R r`` with
``R = a (I - d P^T)^{-1}`` whose columns sum to at most 1.

Every kernel here keeps that invariant exactly (up to rounding). The profile
arrays ``P``, ``R``, ``S`` have one row per profile; all profiles share the
graph.

References
----------
.. [1] R. Andersen, F. Chung, K. Lang, "Local graph partitioning using
   PageRank vectors", FOCS 2006 (forward push).
.. [2] H. Zhang, P. Lofgren, A. Goel, "Approximate personalized PageRank on
   dynamic graphs", KDD 2016 (O(1) invariant repair by rescaling ``p(u)``).
.. [3] H. Wu, J. Gan, Z. Wei, R. Zhang, "Unifying the global and local
   approaches: an efficient power iteration with forward push", SIGMOD 2021
   (switching from local pushes to global sweeps).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .graph import TOMBSTONE, hash_home
from .prefetch import prefetch, prefetch_2d

OP_INSERT = 0
OP_DELETE = 1
OP_SEED = 2

#: Above this out-degree an event on ``u`` is repaired in O(1) by rescaling
#: ``p(u)`` [2]; at or below it, the residual of every out-neighbour is
#: corrected instead (O(deg u)). Both keep the invariant exactly; the second
#: leaves a residual that sums to zero, which cancels out as it spreads
#: instead of having to be absorbed by teleportation (see DEVELOPERS.md). Each
#: corrected neighbour costs a random access (about 65 ns at 200k nodes, most of
#: ``apply``'s time at 64); at 24 the settles after the medium bench's batches did
#: no more work under the per-node contract (measured in DEVELOPERS.md).
LOCAL_REPAIR_MAX_DEGREE = 24

# Kernels release the interpreter lock (``nogil``): the service's fetch thread
# decodes the next Kafka batch meanwhile.
# Helpers called per edge or per event are inlined (``inline="always"``): a call
# between compiled functions passes each array with reference counting, which
# made the push loop three times slower than its memory traffic.

#: Bits of a node's per-profile flags (``Engine._flags``): on the profile's
#: active list, and waiting in the push queue. One byte per node holds both, so
#: a pushed edge reads one byte of state besides the residual.
ACTIVE = np.uint8(1)
QUEUED = np.uint8(2)
#: Slots that the active lists and the push queue keep beyond the node capacity: the
#: pushes write the next free slot of both for every edge, whether or not the node
#: joins (:func:`_add_to_residual`, :func:`_enqueue_if`), and a queue holding every
#: node never fills its ring buffer.
SPARE_SLOTS = 1
#: How many queued nodes ahead a push prefetches the node records, and (half as
#: far) the out-edge block.
PREFETCH_AHEAD = 4

#: Fixed number of node chunks a global sweep is split into (see :func:`scatter_nodes`).
SWEEP_CHUNKS = 2

# ---------------------------------------------------------------- hash table
# A cell holds a slot number e. It is the pair (u, v) when e lies in u's block and
# dst[e] == v: blocks never overlap, and the range test needs no memory access beyond
# start[u] and out_degree[u], read once per lookup (see solver.graph).


@njit(cache=True, inline="always")
def find_cell(table, shift, start, out_degree, dst, u, v):
    """Hash cell holding the slot of ``u -> v``, or -1."""
    deg = out_degree[u]
    if deg == 0:
        return -1
    lo = start[u]
    hi = lo + deg
    mask = table.shape[0] - 1
    i = hash_home(u, v, shift)
    while True:
        e = table[i]
        if e == -1:
            return -1
        if lo <= e < hi and dst[e] == v:  # a tombstone (-2) fails lo <= e
            return i
        i = (i + 1) & mask


@njit(cache=True, inline="always")
def _hash_insert(table, shift, u, v, e, counters):
    """Put slot ``e`` of the absent pair ``(u, v)`` in the first free or deleted cell of its probe."""
    mask = table.shape[0] - 1
    i = hash_home(u, v, shift)
    while table[i] >= 0:
        i = (i + 1) & mask
    if table[i] == TOMBSTONE:
        counters[1] -= 1
    table[i] = e


@njit(cache=True, inline="always")
def _hash_remove(table, cell, counters):
    """Empty ``cell``: a tombstone, unless no probe can pass it (the next cell is empty).

    The home cell of the other entries is unknown (no source per slot), so
    entries cannot shift back; a run of tombstones ending at an empty cell is
    emptied instead, which keeps their count low under churn.
    """
    mask = table.shape[0] - 1
    if table[(cell + 1) & mask] != -1:
        table[cell] = TOMBSTONE
        counters[1] += 1
        return
    table[cell] = -1
    i = (cell - 1) & mask
    while table[i] == TOMBSTONE:
        table[i] = -1
        counters[1] -= 1
        i = (i - 1) & mask


# ---------------------------------------------------------------- out-edge blocks
# Node u's out-edges fill slots start[u] .. start[u] + out_degree[u] - 1 of its block of
# cap[u] slots (see solver.graph). Free blocks wait in lists by size class c (at least
# 2**c slots), linked through dst[first slot].


@njit(cache=True, inline="always")
def _size_class(size):
    """Largest ``c`` with ``2**c <= size`` (the class a free block of ``size`` slots joins)."""
    c = 0
    while (2 << c) <= size:
        c += 1
    return c


@njit(cache=True, inline="always")
def _alloc_block(size, free_blocks, counters, capacity, e_dst):
    """First slot of a free block of ``size`` (a power of two) slots, or -1 when the arrays are full."""
    c = _size_class(size)
    b = free_blocks[c]
    if b >= 0:
        free_blocks[c] = e_dst[b]
        return b
    return _alloc_top(size, counters, capacity)


@njit(cache=True, inline="always")
def _alloc_top(size, counters, capacity):
    """First slot of ``size`` new slots at the tail, or -1 when the arrays are full."""
    top = counters[0]
    if top + size > capacity:
        return -1
    counters[0] = top + size
    return top


@njit(cache=True, inline="always")
def _free_block(b, size, free_blocks, counters, e_dst):
    if size <= 0:
        return
    c = _size_class(size)
    e_dst[b] = free_blocks[c]
    free_blocks[c] = b


@njit(cache=True, inline="always")
def _move_block(u, b, new_size, start, cap, out_degree, e_dst, e_w, free_blocks, table, counters):
    """Move u's out-edges to the block at ``b`` of ``new_size`` slots and free the old one."""
    old, size = start[u], cap[u]
    shift = counters[3]
    for j in range(out_degree[u]):
        y = e_dst[old + j]
        # looked up while start[u] is still the old block
        table[find_cell(table, shift, start, out_degree, e_dst, u, y)] = b + j
        e_dst[b + j] = y
        e_w[b + j] = e_w[old + j]
    _free_block(old, size, free_blocks, counters, e_dst)
    start[u] = b
    cap[u] = new_size


@njit(cache=True, inline="always")
def _grow_block(u, start, cap, out_degree, e_dst, e_w, free_blocks, table, counters):
    """Move u's out-edges to a block of the next power of two (at least 2 slots); False when no room is left."""
    size = cap[u]
    new_size = 2
    while new_size <= size:
        new_size *= 2
    b = _alloc_block(new_size, free_blocks, counters, e_dst.shape[0], e_dst)
    if b < 0:
        return False
    _move_block(u, b, new_size, start, cap, out_degree, e_dst, e_w, free_blocks, table, counters)
    return True


@njit(cache=True, nogil=True)
def presize_blocks(nodes, sizes, start, cap, out_degree, e_dst, e_w, free_blocks, table, counters):
    """Move the block of each ``nodes[i]`` to ``sizes[i]`` new slots at the tail, unless it holds that many.

    Run before a batch of many inserts (``sizes`` from the batch's insert
    counts), so that a block reaches its final size in one move instead of
    doubling, and a bulk insert leaves no more slack than a bulk load. Returns
    the number of nodes done (fewer when the slot arrays are full).
    """
    for i in range(nodes.shape[0]):
        u = nodes[i]
        if sizes[i] <= cap[u]:
            continue
        b = _alloc_top(sizes[i], counters, e_dst.shape[0])
        if b < 0:
            return i
        if cap[u] == 0:
            start[u] = b
            cap[u] = sizes[i]
        else:
            _move_block(u, b, sizes[i], start, cap, out_degree, e_dst, e_w, free_blocks, table, counters)
    return nodes.shape[0]


# ---------------------------------------------------------------- batches


@njit(cache=True, nogil=True)
def check_batch(op, src, dst, wt, min_weight, max_weight):
    """One pass over a batch: ``(first bad event or -1, 1 + largest node id, inserts)``.

    An event is bad when a node id or profile row is negative, an insert weight lies outside
    ``[min_weight, max_weight]`` (NaN included) or a seed weight is neither 0
    nor in that range. ``dst`` of a seed is a profile row, not a node.
    """
    top = 0
    inserts = 0
    for i in range(op.shape[0]):
        kind = op[i]
        u = src[i]
        w = wt[i]
        ok = min_weight <= w <= max_weight
        if u < 0 or dst[i] < 0 or (kind == OP_INSERT and not ok) or (kind == OP_SEED and not (ok or w == 0.0)):
            return i, top, inserts
        if kind != OP_SEED:
            top = max(top, dst[i] + 1)
        top = max(top, u + 1)
        inserts += kind == OP_INSERT
    return -1, top, inserts


# ---------------------------------------------------------------- repair


@njit(cache=True, inline="always")
def _mark(k, v, R, active, n_active, flags, parked):
    """Put ``v`` on profile ``k``'s active list; call it *before* changing ``R[k, v]``.

    A node taken off the list with a small residual is *parked*: its residual
    stays counted in ``parked[k]`` until it comes back here. ``flags`` holds
    the :data:`ACTIVE` bit.
    """
    if not (flags[k, v] & ACTIVE):
        parked[k] -= abs(R[k, v])  # no inner branch: it keeps the push loop fast
        flags[k, v] |= ACTIVE
        active[k, n_active[k]] = v
        n_active[k] += 1


@njit(cache=True, inline="always")
def _repair_rescale(P, R, k, u, v, w_old, w_new, W_old, W_new, a, d, active, n_active, flags, parked, psum):
    """O(1) repair of [2]: rescale p(u) so flows on u's other edges stay put."""
    _mark(k, u, R, active, n_active, flags, parked)
    _mark(k, v, R, active, n_active, flags, parked)
    p_u = P[k, u]
    if W_old == 0.0:
        # u was dangling: its row becomes e_v, p(u) is unchanged
        R[k, v] += (d / a) * p_u
    elif W_new == 0.0:
        # u becomes dangling: the flow it sent to v is gone, p(u) is kept
        R[k, v] -= (d / a) * p_u
    else:
        p_new = p_u * W_new / W_old
        P[k, u] = p_new
        psum[k] += p_new - p_u
        R[k, u] -= (p_new - p_u) / a
        delta = w_new - w_old
        if delta > 0.0:
            R[k, v] += (d / a) * p_new * delta / W_new
        else:
            R[k, v] += (d / a) * p_u * delta / W_old


@njit(cache=True, inline="always")
def _repair_neighbours(P, R, k, u, v, w_old, W_old, W_new, start, out_degree, dst, weight, a, d,
                       active, n_active, flags, parked):
    """O(deg u) repair: keep p(u), correct r on each out-neighbour of u.

    The correction is ``(d/a) p(u) (P'(u, y) - P(u, y))`` for every ``y``; it sums
    to zero unless u starts or stops being dangling.
    """
    c = (d / a) * P[k, u]
    if c == 0.0:
        return
    seen_v = False
    first = start[u]
    for e in range(first, first + out_degree[u]):
        y = dst[e]
        w = weight[e]
        before = 0.0
        if W_old > 0.0:
            before = (w_old if y == v else w) / W_old
        if y == v:
            seen_v = True
        _mark(k, y, R, active, n_active, flags, parked)
        R[k, y] += c * (w / W_new - before)
    if not seen_v and W_old > 0.0:
        # the edge u -> v was removed: its old flow leaves v
        _mark(k, v, R, active, n_active, flags, parked)
        R[k, v] -= c * w_old / W_old


@njit(cache=True, inline="always")
def _out_weight_sum(start, out_degree, e_w, u):
    total = 0.0
    for e in range(start[u], start[u] + out_degree[u]):
        total += e_w[e]
    return total


#: Events ahead whose node data and hash cell :func:`apply_events` prefetches (the
#: cache misses of several events then overlap); half as far ahead, the block; a
#: quarter as far, the out-neighbours' residuals.
APPLY_PREFETCH_AHEAD = 8


@njit(cache=True, inline="always")
def _prefetch_nodes(kind, u, v, table, shift, start, cap, out_weight, out_degree, P, R, flags):
    """Prefetch what an edge event on ``u -> v`` reads first: its hash cell, u's arrays, every profile's p and r."""
    if kind == OP_SEED:
        return
    prefetch(table, hash_home(u, v, shift))
    prefetch(start, u)
    prefetch(out_degree, u)
    prefetch(cap, u)
    prefetch(out_weight, u)
    for k in range(P.shape[0]):
        prefetch_2d(P, k, u)
        prefetch_2d(R, k, u)
        prefetch_2d(R, k, v)
        prefetch_2d(flags, k, u)
        prefetch_2d(flags, k, v)


@njit(cache=True, inline="always")
def _prefetch_neighbours(kind, u, start, out_degree, e_dst, R, flags, local_max_degree):
    """Prefetch r and the flags of u's out-neighbours, which a neighbour repair will correct."""
    if kind == OP_SEED or out_degree[u] > local_max_degree:
        return
    first = start[u]
    for e in range(first, first + out_degree[u]):
        y = e_dst[e]
        for k in range(R.shape[0]):
            prefetch_2d(R, k, y)
            prefetch_2d(flags, k, y)


@njit(cache=True, inline="always")
def _prefetch_block(kind, u, start, out_degree, e_dst, e_w):
    """Prefetch the end of u's block (where an insert goes, and what a delete moves); its start for a repair."""
    if kind == OP_SEED:
        return
    first = start[u]
    prefetch(e_dst, first)
    prefetch(e_dst, first + out_degree[u])
    prefetch(e_w, first + out_degree[u])


@njit(cache=True, nogil=True)
def apply_events(
    op, src, dst, wt,
    start, cap, out_weight, out_degree, e_dst, e_w, free_blocks, table, counters,
    P, R, S, a, d, active, n_active, flags, parked, seed_error, local_max_degree, psum, first,
):
    """Apply events ``first ..`` of one batch in order and repair every profile.

    Parameters
    ----------
    op : int8 array
        ``OP_INSERT`` (set weight of src->dst), ``OP_DELETE`` (remove it) or
        ``OP_SEED`` (set the teleport weight of node ``src`` in profile ``dst``).
    src, dst : int32 arrays
        Node indices (for a seed: node and profile row).
    wt : float64 array
        Edge weight (insert) or teleport weight (seed); validated by the caller.

    Returns
    -------
    noop : int64
        Number of valid events that changed nothing (delete of a missing edge,
        insert with the weight already present, seed with the same weight).
    stop : int64
        ``op.shape[0]`` when every event was applied; else the index of the
        first event not applied because the slot arrays are full (the caller
        grows them and calls again from there).
    """
    shift = counters[3]
    n_prof = P.shape[0]
    noop = 0
    end = op.shape[0]
    far = APPLY_PREFETCH_AHEAD
    near = APPLY_PREFETCH_AHEAD // 2
    nearest = APPLY_PREFETCH_AHEAD // 4
    for i in range(first, min(first + far, end)):
        _prefetch_nodes(op[i], src[i], dst[i], table, shift, start, cap, out_weight, out_degree, P, R, flags)
    for i in range(first, end):
        if i + far < end:
            _prefetch_nodes(op[i + far], src[i + far], dst[i + far], table, shift, start, cap, out_weight,
                            out_degree, P, R, flags)
        if i + near < end:
            _prefetch_block(op[i + near], src[i + near], start, out_degree, e_dst, e_w)
        if i + nearest < end:
            _prefetch_neighbours(op[i + nearest], src[i + nearest], start, out_degree, e_dst, R, flags, local_max_degree)
        kind = op[i]
        u = src[i]
        v = dst[i]
        if kind == OP_SEED:
            change = wt[i] - S[v, u]
            if change == 0.0:
                noop += 1
                continue
            # r(u) = s(u) + (flow terms) is stored as one number: a seed weight far above the
            # flow terms rounds them away, so the rounding is tallied for the engine to repair
            seed_error[v] += 2.3e-16 * (abs(R[v, u]) + abs(S[v, u]) + abs(wt[i]))
            S[v, u] = wt[i]
            _mark(v, u, R, active, n_active, flags, parked)
            R[v, u] += change
            continue
        cell = find_cell(table, shift, start, out_degree, e_dst, u, v)
        if kind == OP_INSERT:
            w_new = wt[i]
            if cell >= 0:
                e = table[cell]
                w_old = e_w[e]
                if w_old == w_new:
                    noop += 1
                    continue
                e_w[e] = w_new
                counters[4] += int(w_new != 1.0) - int(w_old != 1.0)
            else:
                w_old = 0.0
                deg = out_degree[u]
                if deg == cap[u] and not _grow_block(u, start, cap, out_degree, e_dst, e_w,
                                                     free_blocks, table, counters):
                    return noop, i
                e = start[u] + deg
                e_dst[e] = v
                e_w[e] = w_new
                _hash_insert(table, shift, u, v, e, counters)
                out_degree[u] = deg + 1
                counters[2] += 1
                counters[4] += int(w_new != 1.0)
        else:
            if cell < 0:
                noop += 1
                continue
            e = table[cell]
            w_old = e_w[e]
            w_new = 0.0
            _hash_remove(table, cell, counters)
            last = start[u] + out_degree[u] - 1
            if e != last:
                # the block stays packed: its last edge fills the hole
                y = e_dst[last]
                table[find_cell(table, shift, start, out_degree, e_dst, u, y)] = e
                e_dst[e] = y
                e_w[e] = e_w[last]
            out_degree[u] -= 1
            counters[2] -= 1
            counters[4] -= int(w_old != 1.0)
            if out_degree[u] == 0:
                _free_block(start[u], cap[u], free_blocks, counters, e_dst)
                cap[u] = 0
        W_old = out_weight[u]
        W_new = W_old + (w_new - w_old)
        if out_degree[u] == 0 or W_new < 0.0:
            W_new = 0.0  # exact zero for a dangling node, whatever the rounding
        elif W_old > 2.0 * W_new:
            # most of the weight went: W_old - w_old would cancel, so sum what is left
            W_new = _out_weight_sum(start, out_degree, e_w, u)
        out_weight[u] = W_new
        # the O(1) rescaling multiplies p(u) by W_new / W_old: only for a moderate ratio,
        # else rounding grows by that factor
        local = out_degree[u] <= local_max_degree or not (0.5 * W_old <= W_new <= 2.0 * W_old)
        for k in range(n_prof):
            if local:
                _repair_neighbours(P, R, k, u, v, w_old, W_old, W_new, start, out_degree, e_dst, e_w,
                                   a, d, active, n_active, flags, parked)
            else:
                _repair_rescale(P, R, k, u, v, w_old, w_new, W_old, W_new, a, d,
                                active, n_active, flags, parked, psum)
    return noop, op.shape[0]


@njit(cache=True, nogil=True)
def load_edges(src, dst, wt, sizes, start, cap, out_weight, out_degree, e_dst, e_w, table, counters):
    """Bulk-load distinct edges into an empty graph: one block of ``sizes[u]`` slots per node, in node order.

    The state equals that of inserting them one by one with
    :func:`apply_events` while every estimate is 0 (no repair is due), in far
    less time. The slot arrays must hold ``sum(sizes)`` slots. Returns -1, or
    the index of the first edge whose pair came before (the caller reports
    it; the graph is then incomplete).
    """
    shift = counters[3]
    top = counters[0]
    for u in range(sizes.shape[0]):
        if sizes[u] > 0:
            start[u] = top
            cap[u] = sizes[u]
            top += sizes[u]
    counters[0] = top
    for i in range(src.shape[0]):
        u = src[i]
        v = dst[i]
        if find_cell(table, shift, start, out_degree, e_dst, u, v) >= 0:
            return i
        e = start[u] + out_degree[u]
        e_dst[e] = v
        e_w[e] = wt[i]
        _hash_insert(table, shift, u, v, e, counters)
        out_degree[u] += 1
        out_weight[u] += wt[i]
        counters[2] += 1
        counters[4] += int(wt[i] != 1.0)
    return -1


# ---------------------------------------------------------------- scheduling


@njit(cache=True, inline="always")
def _done(rho, s_p, abs_p, tol):
    """True when the certified bound on the normalised scores is within ``tol``.

    Bound (see ``solver.metrics.certified_bound``):
    ``rho * (1 + |p|_1 / sum p) / (sum p - rho)``.
    """
    if rho == 0.0:
        return True
    if s_p <= rho:
        return False
    return rho * (1.0 + abs_p / s_p) <= tol * (s_p - rho)


@njit(cache=True, nogil=True)
def chunk_bounds(n, out_degree, chunks):
    """Node ranges of ``chunks`` fixed chunks holding about equal numbers of out-edges.

    They depend on the graph only, never on the thread count (see :func:`scatter_nodes`).
    """
    total = 0
    for u in range(n):
        total += out_degree[u]
    bounds = np.zeros(chunks + 1, np.int64)
    bounds[chunks] = n
    c = 1
    seen = 0
    for u in range(n):
        while c < chunks and seen >= total * c // chunks:
            bounds[c] = u
            c += 1
        seen += out_degree[u]
    while c < chunks:
        bounds[c] = n
        c += 1
    return bounds


@njit(parallel=True, cache=True, nogil=True)
def scatter_nodes(out, spill, coef, bounds, start, out_degree, e_dst, e_w, unit):
    """``out[v] += coef[u] * w(u, v)`` over every edge, on all threads.

    Each node's out-edges are read in one run from its block (no slack, no
    source array). The nodes are cut into fixed chunks (:func:`chunk_bounds`):
    chunk 0 adds into ``out``, chunk ``c > 0`` into ``spill[c - 1]``, and the
    spills are added afterwards in order. The chunk count, not the thread
    count, fixes the order of every floating-point sum, so results do not
    depend on how many threads run. With ``unit`` (every weight is 1) the
    weights are not read: the scatter is bound by memory traffic.

    Call it from Python only, never from another compiled function: a cached
    caller of a ``parallel=True`` function can be loaded in a later process
    without numba starting its threading layer (the caller's cache entry lacks
    the parfor reload hook when the callee itself came from the cache), and the
    first parallel region then crashes the process (SIGSEGV). numba issue
    #8578 describes the same failure. ``tests/test_kernel_cache.py`` runs the
    orders of first commands that once crashed.
    """
    chunks = bounds.shape[0] - 1
    n = out.shape[0]
    for c in prange(chunks):
        target = out if c == 0 else spill[c - 1]
        if c > 0:
            target[:n] = 0.0
        for u in range(bounds[c], bounds[c + 1]):
            cu = coef[u]
            if cu == 0.0:
                continue
            first = start[u]
            if unit:
                for e in range(first, first + out_degree[u]):
                    target[e_dst[e]] += cu
            else:
                for e in range(first, first + out_degree[u]):
                    target[e_dst[e]] += cu * e_w[e]
    for c in range(1, chunks):
        for u in range(n):
            out[u] += spill[c - 1, u]


@njit(cache=True, nogil=True)
def sweep_begin(k, P, R, tmp, n, out_weight, a, d):
    """First half of a global sweep: ``p += a r``; ``tmp = d r / W``; ``r = 0``.

    The second half is ``scatter_nodes(R[k], ..., tmp, ...)`` (``r = d P^T r``),
    called from Python (see :func:`scatter_nodes` for why).
    """
    for u in range(n):
        ru = R[k, u]
        P[k, u] += a * ru
        W = out_weight[u]
        tmp[u] = d * ru / W if W > 0.0 else 0.0
        R[k, u] = 0.0


@njit(cache=True, nogil=True)
def profile_sums(k, P, R, n):
    """``(||r||_1, sum p, ||p||_1)`` of profile ``k``."""
    rho = 0.0
    s_p = 0.0
    abs_p = 0.0
    for u in range(n):
        rho += abs(R[k, u])
        s_p += P[k, u]
        abs_p += abs(P[k, u])
    return rho, s_p, abs_p


@njit(cache=True, nogil=True)
def is_done(rho, s_p, abs_p, tol):
    """:func:`_done` for callers in Python."""
    return _done(rho, s_p, abs_p, tol)


@njit(cache=True, nogil=True)
def relist_active(k, R, n, active, n_active, flags, parked):
    """After sweeps every node may carry residual: list all that do, park none."""
    n_active[k] = 0
    parked[k] = 0.0
    for u in range(n):
        if R[k, u] != 0.0:
            flags[k, u] = ACTIVE
            active[k, n_active[k]] = u
            n_active[k] += 1
        else:
            flags[k, u] = 0


@njit(cache=True, inline="always")
def _add_to_residual(v, add, Rk, fk, ak, listed, unparked):
    """``r(v) += add``, listing ``v`` first if it is not on the active list: :func:`_mark` without a branch.

    ``v`` is written to the next free slot of the list ``ak`` every time and
    the list grows by 0 or 1 (the list keeps :data:`SPARE_SLOTS` for it).
    Returns ``(r(v) before, r(v) after, v's flag byte before, listed, unparked)``.
    """
    f = fk[v]
    before = Rk[v]
    fresh = 1 - (f & ACTIVE)
    unparked += abs(before) * fresh
    ak[listed] = v
    listed += fresh
    after = before + add
    Rk[v] = after
    return before, after, f, listed, unparked


@njit(cache=True, inline="always")
def _enqueue_if(v, due, f, fk, queue, qt, pending):
    """Append ``v`` to the ring buffer if ``due``, without a branch; mark it listed (and queued if due).

    The slot at ``qt`` is written every time (the buffer keeps
    :data:`SPARE_SLOTS`); the tail moves on by 0 or 1. Returns ``(qt, pending)``.
    """
    queue[qt] = v
    qt += due
    if qt == queue.shape[0]:
        qt = 0
    fk[v] = f | ACTIVE | (QUEUED * due)
    return qt, pending + due


@njit(cache=True, inline="always")
def _unqueue_rest(flags, k, queue, qh, pending):
    """Clear the QUEUED bit of the ``pending`` nodes left in the ring buffer from ``qh`` on."""
    cap = queue.shape[0]
    for _ in range(pending):
        flags[k, queue[qh]] &= ~QUEUED
        qh += 1
        if qh == cap:
            qh = 0


@njit(cache=True, nogil=True)
def settle_profile(
    k, tol, n, m,
    start, out_weight, out_degree, e_dst, e_w,
    P, R, a, d, active, n_active, flags, parked, queue, sweep_share, theta_step,
    push_limit, stats,
):
    """Push profile ``k`` until its certified bound is at most ``tol``, or hand over to sweeps.

    Local phases push, first-in first-out, every node whose residual exceeds
    ``theta * max(deg, 1)``; ``theta`` halves between phases, so large residuals
    go first and work stops as soon as the error budget is met (not when every
    node is below a fixed threshold). When the nodes due in a phase carry more
    than ``sweep_share * m`` out-edges, a global sweep is cheaper per unit of
    residual removed than scattered pushes, and the kernel switches to sweeps
    [3]. Forward push alone has bad worst cases on directed graphs; the switch
    bounds each phase's cost by a constant number of sweeps. A residual more
    than ``push_limit`` times the error budget goes to sweeps at once.

    Returns ``(sweep, rho, s_p, abs_p)``: with ``sweep`` true the caller
    continues with global sweeps (:func:`sweep_begin`, :func:`scatter_nodes`)
    until the bound is met; the sweep itself is not called from here (see
    :func:`scatter_nodes`).

    ``stats`` accumulates: [0] pushes, [1] edges touched by pushes,
    [2] sweeps, [3] edges touched by sweeps, [4] local phases.
    """
    rho = parked[k]
    for i in range(n_active[k]):
        rho += abs(R[k, active[k, i]])
    s_p = 0.0
    abs_p = 0.0
    for u in range(n):
        s_p += P[k, u]
        abs_p += abs(P[k, u])
    cap = queue.shape[0]
    theta = 0.0
    for i in range(n_active[k]):
        u = active[k, i]
        ratio = abs(R[k, u]) / max(out_degree[u], 1)
        if ratio > theta:
            theta = ratio
    theta *= 0.5
    # far above the budget the residual must reach every node anyway: pushes first would only
    # break up the pairing of its positive and negative parts that lets sweeps cancel them
    budget = tol * s_p / (1.0 + abs_p / s_p + tol) if s_p > 0.0 else 0.0
    sweeping = s_p > 0.0 and rho > push_limit * budget
    rounds = 0
    while not sweeping and not _done(rho, s_p, abs_p, tol):
        rounds += 1
        if rounds > 10_000:
            sweeping = True
            break
        # collect the nodes due in this phase
        qh = 0
        qt = 0
        frontier = 0
        for i in range(n_active[k]):
            u = active[k, i]
            if abs(R[k, u]) > theta * max(out_degree[u], 1) and not (flags[k, u] & QUEUED):
                flags[k, u] |= QUEUED
                queue[qt] = u
                qt += 1
                frontier += out_degree[u]
        pending = qt  # at most every node: the buffer's spare slot keeps qt below its end
        if frontier > sweep_share * m:
            for j in range(pending):
                flags[k, queue[j]] &= ~QUEUED
            sweeping = True
            continue
        Rk = R[k]
        fk = flags[k]
        ak = active[k]
        listed = n_active[k]
        unparked = 0.0
        while pending > 0 and not _done(rho, s_p, abs_p, tol):
            u = queue[qh]
            qh += 1
            if qh == cap:
                qh = 0
            pending -= 1
            flags[k, u] &= ~QUEUED
            ru = R[k, u]
            limit = theta * max(out_degree[u], 1)
            if abs(ru) <= limit:
                continue
            old_p = P[k, u]
            P[k, u] = old_p + a * ru
            s_p += a * ru
            abs_p += abs(old_p + a * ru) - abs(old_p)
            R[k, u] = 0.0
            rho -= abs(ru)
            stats[0] += 1
            W = out_weight[u]
            if W <= 0.0:
                continue
            scale = d * ru / W
            first = start[u]
            degree = out_degree[u]
            for e in range(first, first + degree):
                v = e_dst[e]
                before, after, f, listed, unparked = _add_to_residual(v, scale * e_w[e], Rk, fk, ak, listed, unparked)
                rho += abs(after) - abs(before)
                due = (abs(after) > theta * max(out_degree[v], 1)) & ((f & QUEUED) == 0)
                qt, pending = _enqueue_if(v, due, f, fk, queue, qt, pending)
            stats[1] += degree
        n_active[k] = listed
        parked[k] -= unparked
        _unqueue_rest(flags, k, queue, qh, pending)
        theta *= theta_step
        stats[4] += 1
        if theta < 1e-300:
            sweeping = True
        # re-sum to shed the rounding of the running totals
        rho = parked[k]
        for i in range(n_active[k]):
            rho += abs(R[k, active[k, i]])
    return sweeping and not _done(rho, s_p, abs_p, tol), rho, s_p, abs_p


@njit(cache=True, nogil=True)
def exact_residual_begin(k, n, P, S, out_weight, a, d, tmp, out):
    """First half of ``r = s - p/a + (d/a) P^T p``: ``out = s - p/a``, ``tmp = (d/a) p / W``.

    The caller adds ``P^T tmp`` into ``out`` with :func:`scatter_nodes` (from Python).
    """
    for u in range(n):
        out[u] = S[k, u] - P[k, u] / a
        W = out_weight[u]
        tmp[u] = (d / a) * P[k, u] / W if W > 0.0 else 0.0


@njit(cache=True, nogil=True)
def park_threshold(k, R, active, n_active, budget):
    """Largest power of two ``t`` such that the residuals ``0 < |r| < t`` sum to at most ``budget``.

    One pass with a histogram of binary exponents (``frexp``, no logarithm),
    instead of a sort. Bin ``b`` holds ``2**(b - 1075) <= |r| < 2**(b - 1074)``.
    """
    mass = np.zeros(2100)
    for i in range(n_active[k]):
        r = abs(R[k, active[k, i]])
        if r > 0.0:
            mass[math.frexp(r)[1] + 1074] += r
    total = 0.0
    for b in range(mass.shape[0]):
        if total + mass[b] > budget:
            return 2.0 ** (b - 1075)
        total += mass[b]
    return np.inf


@njit(cache=True, nogil=True)
def compact_active(k, R, active, n_active, flags, parked, park_budget, park_each):
    """Shorten profile ``k``'s active list.

    Nodes with a zero residual leave it; nodes with ``|r| <= park_each`` are
    parked (their residual moves into ``parked[k]``) while the parked total
    stays within ``park_budget``. Scans and pushes then skip them until an
    update touches them again (see :func:`_mark`). Returns the largest
    residual parked.
    """
    kept = 0
    largest = 0.0
    for i in range(n_active[k]):
        u = active[k, i]
        r = abs(R[k, u])
        if r == 0.0:
            flags[k, u] &= ~ACTIVE
        elif r <= park_each and parked[k] + r <= park_budget:
            flags[k, u] &= ~ACTIVE
            parked[k] += r
            largest = max(largest, r)
        else:
            active[k, kept] = u
            kept += 1
    n_active[k] = kept
    return largest


# ---------------------------------------------------------------- per-node contract


@njit(cache=True, inline="always")
def _threshold(S, k, u, alpha, beta):
    return alpha * S[k, u] + beta


@njit(cache=True, inline="always")
def _queue_due(k, R, S, alpha, beta, flags, active, n_active, queue):
    """Queue every active node above its threshold; return how many."""
    qt = 0
    for i in range(n_active[k]):
        u = active[k, i]
        if abs(R[k, u]) > _threshold(S, k, u, alpha, beta) and not (flags[k, u] & QUEUED):
            flags[k, u] |= QUEUED
            queue[qt] = u
            qt += 1
    return qt


@njit(cache=True, inline="always")
def _prefetch_ahead(queue, qh, pending, start, out_weight, out_degree, e_dst, e_w, Pk, Rk, fk, unit):
    """Prefetch what the next queued nodes will read.

    The record of the node ``PREFETCH_AHEAD`` places ahead (its place in the
    graph, its estimate, residual and flag byte: a push writes all three), the
    block of the one half as far, and the residual and flag byte of every
    out-neighbour of the next one (its block was prefetched two nodes ago): a
    push's random reads then overlap the work on the node before. Adding the
    estimate and the flag byte to the record made pushes 12-25 % faster
    (DEVELOPERS.md, "The per-node contract").
    """
    cap = queue.shape[0]
    if pending > PREFETCH_AHEAD:
        j = qh + PREFETCH_AHEAD
        w = queue[j - cap if j >= cap else j]
        prefetch(start, w)
        prefetch(out_degree, w)
        prefetch(out_weight, w)
        prefetch(Pk, w)
        prefetch(Rk, w)
        prefetch(fk, w)
    if pending > PREFETCH_AHEAD // 2:
        j = qh + PREFETCH_AHEAD // 2
        b = start[queue[j - cap if j >= cap else j]]
        prefetch(e_dst, b)
        if not unit:
            prefetch(e_w, b)
    if pending > 1:
        j = qh + 1
        w = queue[j - cap if j >= cap else j]
        for e in range(start[w], start[w] + out_degree[w]):
            v = e_dst[e]
            prefetch(Rk, v)
            prefetch(fk, v)


@njit(cache=True, nogil=True)
def push_to_thresholds(
    k, n, m,
    start, out_weight, out_degree, e_dst, e_w,
    P, R, S, alpha, beta, a, d, active, n_active, flags, parked, queue, edge_limit, stats, psum, unit,
):
    """Forward push, first in first out, until every active ``|r(u)| <= alpha s(u) + beta``.

    With constant thresholds (``alpha s + beta``; ``s = 1`` for the global
    profile) this is the plain forward push of [1]; its work is local and,
    for the global profile, does not grow with the graph. It keeps
    ``max_u |r(u)| / w(u) <= 1``, which the per-node lemma of
    :mod:`solver.bounds` turns into a bound on every node.

    Forward push alone has bad worst cases on directed graphs (a multiplicative
    guarantee can need nearly linear time per update: Jayaram et al., ICALP
    2024): once pushes have touched ``edge_limit`` edges, or the nodes due at
    the start carry more than that many out-edges, the kernel stops and
    returns 1, and the caller continues with global sweeps.

    A pushed edge costs a read of the residual and of one flag byte (the
    node's :data:`ACTIVE` and :data:`QUEUED` bits together); with ``alpha = 0``
    the threshold is the constant ``beta``, and with ``unit`` (every weight 1)
    the weights are not read. Whether a neighbour joins the active list or the
    queue is data, not a branch: the loop writes the next free slot of both
    every time and advances each end by 0 or 1 (``active`` and ``queue`` keep
    one spare slot for it). Those two branches were unpredictable, and their
    mispredictions cost more than the memory traffic (measured: 29 against
    12 ns per edge on a graph that fits in cache). The next queued nodes'
    records and blocks are prefetched (:func:`_prefetch_ahead`).

    Returns 0 when every active node meets its threshold, 1 to hand over to
    sweeps. ``stats`` accumulates [0] pushes and [1] edges touched.
    """
    cap = queue.shape[0]
    uniform = alpha == 0.0
    Pk = P[k]
    Rk = R[k]
    fk = flags[k]
    ak = active[k]
    qt = _queue_due(k, R, S, alpha, beta, flags, active, n_active, queue)
    frontier = 0
    for i in range(qt):
        frontier += out_degree[queue[i]]
    pending = qt  # at most every node: the buffer's spare slot keeps qt below its end
    qh = 0
    touched = 0
    pushes = 0
    pushed_mass = 0.0
    listed = n_active[k]
    unparked = 0.0
    handover = frontier > edge_limit
    while pending > 0 and not handover:
        _prefetch_ahead(queue, qh, pending, start, out_weight, out_degree, e_dst, e_w, Pk, Rk, fk, unit)
        u = queue[qh]
        qh += 1
        if qh == cap:
            qh = 0
        pending -= 1
        fk[u] &= ~QUEUED
        ru = Rk[u]
        if abs(ru) <= (beta if uniform else _threshold(S, k, u, alpha, beta)):
            continue
        Pk[u] += a * ru
        pushed_mass += a * ru
        Rk[u] = 0.0
        pushes += 1
        W = out_weight[u]
        if W <= 0.0:
            continue
        scale = d * ru / W
        first = start[u]
        degree = out_degree[u]
        for e in range(first, first + degree):
            v = e_dst[e]
            _, after, f, listed, unparked = _add_to_residual(v, scale if unit else scale * e_w[e], Rk, fk, ak,
                                                             listed, unparked)
            due = (abs(after) > (beta if uniform else _threshold(S, k, v, alpha, beta))) & ((f & QUEUED) == 0)
            qt, pending = _enqueue_if(v, due, f, fk, queue, qt, pending)
        touched += degree
        if touched > edge_limit:
            handover = True
    n_active[k] = listed
    parked[k] -= unparked
    psum[k] += pushed_mass
    stats[0] += pushes
    stats[1] += touched
    _unqueue_rest(flags, k, queue, qh, pending)
    return 1 if handover else 0


@njit(cache=True, nogil=True)
def sum_shift(k, R, active, n_active, parked, psum):
    """``||r_k||_1 / sum p_k``: how far the normalisation may move (``inf`` before any estimate)."""
    r1 = active_l1(k, R, active, n_active, parked)
    if r1 == 0.0:
        return 0.0  # an exact estimate, or an empty profile: nothing can shift
    return r1 / psum[k] if psum[k] > r1 else np.inf


@njit(cache=True, inline="always")
def global_limit(delta, rtol, margin):
    """Largest ``max |r_g|`` certifying ``rtol`` given the sum shift ``delta`` (0 if none does).

    The certified relative error ``(rho / (1 - rho) + delta) / (1 - delta)``
    must stay within ``rtol / (1 + rtol)`` (``solver.bounds``); ``margin`` < 1
    keeps a sliver for rounding.
    """
    q = rtol / (1.0 + rtol) * (1.0 - delta) - delta
    return margin * q / (1.0 + q) if q > 0.0 else 0.0


@njit(cache=True, inline="always")
def ladder_rung(limit, current, top):
    """The largest rung ``top * 2**(-j/4)`` at most ``limit``, and below ``current``."""
    if limit <= 0.0:
        return current / 2.0
    rungs = max(math.ceil(4.0 * math.log2(top / limit) - 1e-9), 0)
    return min(top * 2.0 ** (-rungs / 4.0), current / 2.0 ** 0.25)


@njit(cache=True, nogil=True)
def push_global(
    n, m, start, out_weight, out_degree, e_dst, e_w,
    P, R, S, a, d, active, n_active, flags, parked, parked_max, queue, edge_limit, stats, psum, unit,
    rtol, margin, beta,
):
    """Push the global profile (row 0) down the threshold ladder until ``rtol`` is certified.

    ``beta`` is the threshold the last settle ended at (anything above
    ``top`` for none). Pushes to a constant threshold (:func:`push_to_thresholds`),
    then checks it against the largest threshold the sum shift now allows
    (:func:`global_limit`); if ``beta`` is above it, steps down the ladder of
    quarter octaves (:func:`ladder_rung`) and pushes again. Pushes never raise
    ``||r||_1``, so a threshold that holds after pushing stays valid. One call
    does a whole settle of the global profile unless the pushes hand over to
    sweeps.

    Returns ``(handover, beta)``: with ``handover`` 1 the caller runs global
    sweeps (from Python, see :func:`scatter_nodes`) and calls again with the
    returned ``beta``.
    """
    top = global_limit(0.0, rtol, margin)
    # start at the largest rung the sum shift allows now (ladder_rung with a current rung
    # of 2 top, which caps nothing), or at the last settle's rung if that is higher
    # (pushes never raise ||r||_1, so the allowance grows as they go): a settle after a
    # few events is then one pass, not a pass at the top rung, which any residual fails,
    # and a second one below it
    limit = global_limit(sum_shift(0, R, active, n_active, parked, psum), rtol, margin)
    beta = min(max(ladder_rung(limit, 2.0 * top, top), beta), top)
    for _ in range(64):
        if parked_max[0] > beta:
            # the threshold fell below residuals parked earlier: list every node again
            relist_active(0, R, n, active, n_active, flags, parked)
            parked_max[0] = 0.0
        if push_to_thresholds(0, n, m, start, out_weight, out_degree, e_dst, e_w, P, R, S, 0.0, beta, a, d,
                              active, n_active, flags, parked, queue, edge_limit, stats, psum, unit):
            return 1, beta
        limit = global_limit(sum_shift(0, R, active, n_active, parked, psum), rtol, margin)
        if beta <= limit:
            break
        beta = ladder_rung(limit, beta, top)
    return 0, beta


@njit(cache=True, nogil=True)
def count_significant(k, P, n, floor_share, value):
    """``(estimates above floor_share * max, how many of those reach value)`` for profile ``k``.

    Two passes, no copies: what a personalization's settle asks after every
    push to check its certified lower bound on the K-th best score.
    """
    top = 0.0
    for u in range(n):
        if P[k, u] > top:
            top = P[k, u]
    floor = floor_share * top
    significant = 0
    reached = 0
    for u in range(n):
        if P[k, u] > floor:
            significant += 1
            if P[k, u] >= value:
                reached += 1
    return significant, reached


@njit(cache=True, nogil=True)
def over_thresholds(k, n, R, S, alpha, beta, out_degree):
    """``(max_u |r(u)| / w(u), out-edges of the nodes above their threshold)`` over all nodes."""
    worst = 0.0
    frontier = 0
    for u in range(n):
        w = _threshold(S, k, u, alpha, beta)
        ratio = abs(R[k, u]) / w
        if ratio > worst:
            worst = ratio
        if ratio > 1.0:
            frontier += out_degree[u]
    return worst, frontier


@njit(cache=True, nogil=True)
def active_l1(k, R, active, n_active, parked):
    """``||r_k||_1``: the active residuals plus the parked mass."""
    total = parked[k]
    for i in range(n_active[k]):
        total += abs(R[k, active[k, i]])
    return total
