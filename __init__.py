"""ranktide: PageRank scores of a changing graph, kept fresh as edge events stream in.

The embedding API::

    from ranktide import Engine, EventBatch, Ranker

Subpackages: :mod:`ranktide.solver` (the mathematics, no I/O),
:mod:`ranktide.stream` (the live service and its command line) and
:mod:`ranktide.replay` (recorded logs, audit, demo, benchmarks).

The names below are imported on first use, so that ``import ranktide`` (and
the command line's start-up) does not load the compiled kernels.
"""

from __future__ import annotations

import importlib
from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("ranktide")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

_EXPORTS = {
    "Engine": "ranktide.solver.engine",
    "SettleStats": "ranktide.solver.engine",
    "GLOBAL": "ranktide.solver.engine",
    "EventBatch": "ranktide.solver.ranker",
    "Ranker": "ranktide.solver.ranker",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str):
    if name in _EXPORTS:
        value = getattr(importlib.import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'ranktide' has no attribute {name!r}")
