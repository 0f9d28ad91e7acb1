"""Settings and small helpers shared by the parts of ``ranktide bench``.

The graph sizes, accuracy targets and workload shares of every measurement,
timing and progress helpers, and the description of the machine a run is on.
"""

from __future__ import annotations

import math
import os
import platform
import resource
import statistics
import sys
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import numpy as np

from ranktide.replay.bench_options import SIZES  # noqa: F401 - defined with the options the parser needs

#: Messages produced for the end-to-end run, per size.
E2E_EVENTS = {"tiny": 20_000, "small": 100_000, "medium": 300_000, "large": 1_000_000}
#: Micro-batches in the engine throughput stream, per size.
THROUGHPUT_BATCHES = {"tiny": 1, "small": 2, "medium": 6, "large": 10}
#: micro-batches of the backlog run (it grows the graph by 60 % of its events)
BACKLOG_BATCHES = {"tiny": 2, "small": 4, "medium": 20, "large": 20}
DAMPING = 0.85
TOLERANCE = 1e-6
REFERENCE_TOL = 1e-11
LOAD_TOL = 1e-9
INSERT_SHARE = 0.8
SEEDS_PER_PROFILE = 10
ARROW_ROWS = 10_000
HEADLINE_BATCH = 1_000
REAL_GRAPH_BATCHES = (1, 10, 100, 1000)


# ====================================================================== small helpers


def _say(text: str) -> None:
    print(f"[bench] {text}", file=sys.stderr, flush=True)


def _progress(total: int, desc: str):
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, file=sys.stderr, leave=False, mininterval=0.5)


def _timed(fn: Callable[[], object]) -> tuple[object, float]:
    started = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - started


def _peak_rss_bytes() -> int:
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


def _normalised(x: np.ndarray) -> np.ndarray:
    total = float(x.sum())
    return x / total if total > 0 else np.zeros_like(x)


def _median(values: list[float]) -> float:
    return float(statistics.median(values)) if values else math.nan


def _finite_or_none(value):
    """JSON-safe copy: inf and nan become None, numpy scalars become Python numbers."""
    if isinstance(value, dict):
        return {str(k): _finite_or_none(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_or_none(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value


# ====================================================================== machine


def machine_info() -> dict:
    """CPU count, model, RAM, load, date and library versions of this run."""
    import numba
    import pyarrow
    import scipy

    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    ram = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    return {
        "nproc": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count(),
        "cpu": model or platform.processor(),
        "ram_bytes": int(ram),
        "load_average": list(os.getloadavg()),
        "date": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "python": platform.python_version(),
        "numpy": np.__version__, "scipy": scipy.__version__, "numba": numba.__version__,
        "pyarrow": pyarrow.__version__,
    }
