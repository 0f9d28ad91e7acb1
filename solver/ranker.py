"""The engine on string node ids and named profiles: the embedding API.

:class:`Ranker` is what the service, the replay and a user embedding
ranktide call::

    from ranktide.solver import EventBatch, Ranker

    ranker = Ranker(damping=0.85, tolerance=1e-6)
    ranker.apply(EventBatch.edges(["a", "b"], ["b", "c"]))   # inserts
    ranker.settle()
    ranker.top_k("global", 10)        # [(node, score), ...]
    ranker.certified_bound("global")
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .bounds import CERTIFIED_TOP, Certificate
from .engine import GLOBAL, RTOL, Engine, SettleStats
from .ids import NodeIds
from .kernels import OP_DELETE, OP_INSERT, OP_SEED


@dataclass
class EventBatch:
    """Validated events, in order, as columns.

    Attributes
    ----------
    op : int8 array
        ``OP_INSERT``, ``OP_DELETE`` or ``OP_SEED``.
    src : pyarrow string array
        Edge source, or the seed node.
    dst : pyarrow string array
        Edge target, or the profile name of a seed.
    weight : float64 array
        Edge weight (insert) or teleport weight (seed).
    ts : int64 array
        Milliseconds since the epoch, -1 when absent.
    """

    op: np.ndarray
    src: pa.Array
    dst: pa.Array
    weight: np.ndarray
    ts: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def __post_init__(self) -> None:
        if self.ts.size != self.op.size:
            self.ts = np.full(self.op.size, -1, dtype=np.int64)

    def __len__(self) -> int:
        return int(self.op.size)

    @classmethod
    def edges(cls, src, dst, weight=None, delete: bool = False) -> "EventBatch":
        """Inserts (or deletes) of ``src[i] -> dst[i]``; a convenience for embedding."""
        n = len(src)
        w = np.ones(n) if weight is None else np.asarray(weight, dtype=np.float64)
        op = np.full(n, OP_DELETE if delete else OP_INSERT, dtype=np.int8)
        return cls(op, pa.array([str(x) for x in src]), pa.array([str(x) for x in dst]), w)

    @classmethod
    def seeds(cls, profile: str, nodes, weight=None) -> "EventBatch":
        """Seed events setting teleport weights of ``nodes`` in ``profile``."""
        n = len(nodes)
        w = np.ones(n) if weight is None else np.asarray(weight, dtype=np.float64)
        return cls(
            np.full(n, OP_SEED, dtype=np.int8),
            pa.array([str(x) for x in nodes]),
            pa.array([profile] * n),
            w,
        )

    def slice(self, start: int, stop: int) -> "EventBatch":
        return EventBatch(
            self.op[start:stop],
            self.src[start:stop],
            self.dst[start:stop],
            self.weight[start:stop],
            self.ts[start:stop],
        )

    @classmethod
    def concat(cls, batches: list["EventBatch"]) -> "EventBatch":
        if not batches:
            return cls(np.zeros(0, np.int8), pa.array([], pa.string()), pa.array([], pa.string()), np.zeros(0))
        return cls(
            np.concatenate([b.op for b in batches]),
            pa.concat_arrays([b.src for b in batches]),
            pa.concat_arrays([b.dst for b in batches]),
            np.concatenate([b.weight for b in batches]),
            np.concatenate([b.ts for b in batches]),
        )


class Ranker:
    """An :class:`~solver.engine.Engine` addressed by node names and profile names.

    Parameters
    ----------
    damping, rtol, tolerance, certified_top
        As for :class:`~solver.engine.Engine`: by default every published score
        is certified within relative ``rtol`` (1e-3); ``tolerance`` adds an L1 target.
    """

    def __init__(self, damping: float = 0.85, *, rtol: float | None = RTOL, tolerance: float | None = None,
                 certified_top: int = CERTIFIED_TOP, **capacity: int) -> None:
        self.engine = Engine(damping=damping, rtol=rtol, tolerance=tolerance, certified_top=certified_top,
                             **capacity)
        self.ids = NodeIds()

    @property
    def profiles(self) -> list[str]:
        return list(self.engine.profiles)

    def apply(self, batch: EventBatch) -> int:
        """Apply a batch in order; return how many of its events were no-ops."""
        if len(batch) == 0:
            return 0
        is_seed = batch.op == OP_SEED
        src = self.ids.intern(batch.src)
        if not is_seed.any():  # edge events only: every dst is a node
            return self.engine.apply(batch.op, src, self.ids.intern(batch.dst), batch.weight)
        dst = np.zeros(len(batch), dtype=np.int32)
        edge_rows = np.flatnonzero(~is_seed)
        if edge_rows.size:
            dst[edge_rows] = self.ids.intern(batch.dst.take(pa.array(edge_rows)))
        seed_rows = np.flatnonzero(is_seed)
        if seed_rows.size:
            dst[seed_rows] = self._profile_rows(batch.dst.take(pa.array(seed_rows)))
        return self.engine.apply(batch.op, src, dst, batch.weight)

    def _profile_rows(self, names: pa.Array) -> np.ndarray:
        encoded = pc.dictionary_encode(names)
        rows = np.array([self.engine.add_profile(x) for x in encoded.dictionary.to_pylist()], dtype=np.int32)
        return rows[encoded.indices.to_numpy(zero_copy_only=False)]

    def add_profile(self, name: str) -> None:
        """Create an empty personalization ``name`` (seeds come by events)."""
        self.engine.add_profile(name)

    def settle(self) -> SettleStats:
        """Push every profile to the tolerance."""
        return self.engine.settle()

    def certificate(self, profile: str = GLOBAL) -> Certificate:
        """Published scores of ``profile`` with each node's certified bound (in node id order)."""
        return self.engine.certificate(profile)

    def certified_bound(self, profile: str = GLOBAL) -> float:
        return self.engine.certified_bound(profile)

    def scores(self, profile: str = GLOBAL) -> np.ndarray:
        """Normalised scores in node-id order (see :meth:`node_names`)."""
        return self.engine.scores(profile)

    def node_names(self) -> pa.Array:
        return self.ids.names()

    def score_of(self, node: str, profile: str = GLOBAL) -> float | None:
        idx = self.ids.lookup(node)
        return None if idx is None else float(self.engine.scores(profile)[idx])

    def top_k(self, profile: str = GLOBAL, k: int = 20) -> list[tuple[str, float]]:
        """The ``k`` best nodes of ``profile`` as ``(name, score)``, best first."""
        idx, sc = self.engine.top_k(profile, k)
        return [(self.ids.name(int(i)), float(s)) for i, s in zip(idx, sc)]
