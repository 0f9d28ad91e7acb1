"""ranktide: PageRank scores of a changing graph, kept fresh as edge events stream in.

The embedding API::

    from ranktide import Engine, EventBatch, Ranker

Subpackages: :mod:`ranktide.solver` (the mathematics, no I/O),
:mod:`ranktide.stream` (the live service and its command line) and
:mod:`ranktide.replay` (recorded logs, audit, demo, benchmarks).

The names below (and ``__version__``) are looked up on first use, so that
``import ranktide`` (and the command line's start-up) does not load the
compiled kernels.
"""

from __future__ import annotations

import importlib

_EXPORTS = {
    "Engine": "ranktide.solver.engine",
    "SettleStats": "ranktide.solver.engine",
    "GLOBAL": "ranktide.solver.engine",
    "EventBatch": "ranktide.solver.ranker",
    "Ranker": "ranktide.solver.ranker",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def _version() -> str:
    """The installed version (looked up on first use: importlib.metadata costs 30 ms at start-up)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("ranktide")
    except PackageNotFoundError:  # running from a source tree that is not installed
        return "0+unknown"


def __getattr__(name: str):
    if name == "__version__":
        globals()[name] = _version()
        return globals()[name]
    if name in _EXPORTS:
        value = getattr(importlib.import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'ranktide' has no attribute {name!r}")
