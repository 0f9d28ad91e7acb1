"""The mathematics of ranktide: dynamic graph, residual push, exact recompute, drift metrics.

No I/O happens here. The embedding API is :class:`Ranker` (string ids) on top of
:class:`Engine` (integer ids).
"""

from .engine import GLOBAL, Engine, SettleStats
from .kernels import OP_DELETE, OP_INSERT, OP_SEED
from .ranker import EventBatch, Ranker

__all__ = ["GLOBAL", "Engine", "EventBatch", "OP_DELETE", "OP_INSERT", "OP_SEED", "Ranker", "SettleStats"]
