"""What the local and the Spark recompute share: input, settings, progress, manifest, writing."""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

from ranktide.solver.recompute import Targets
from ranktide.stream.snapshots import Counters, SnapshotError, write_prepared_snapshot


class RecomputeError(RuntimeError):
    """Bad input (exit 2) or an output that cannot be written (exit 3); the message says where."""

    def __init__(self, message: str, code: int = 2) -> None:
        super().__init__(message)
        self.code = code


@dataclass
class RecomputeInput:
    """What a recompute reads.

    Attributes
    ----------
    edges : str
        Path or URI of the edge table (file or folder of part files).
    nodes : str or None
        Node table (column ``node``); for a snapshot, its ``scores.parquet``
        (the global rows list every node).
    seeds : dict
        Personalization -> ``(nodes, weights)``.
    manifest : dict or None
        The input snapshot's manifest.
    """

    edges: str
    nodes: str | None = None
    seeds: dict[str, tuple[list[str], list[float]]] = field(default_factory=dict)
    manifest: dict | None = None

    @property
    def from_snapshot(self) -> bool:
        return self.manifest is not None


@dataclass
class Settings:
    """Targets, damping and the facts carried into the output manifest."""

    targets: Targets
    damping: float = 0.85
    positions: dict = field(default_factory=dict)
    counters: Counters = field(default_factory=Counters)


def print_progress(iteration: int, figures: dict[str, tuple[float, float, float]], seconds: float) -> None:
    """One line on stderr per iteration: each profile's largest residual and certified errors."""
    parts = [f"{name} max|r| {rho:.2e} rel {number_text(rel)} L1 {number_text(l1)}" for name, (rho, rel, l1) in figures.items()]
    print(f"iteration {iteration}: " + "; ".join(parts) + f" ({seconds:.2f} s)", file=sys.stderr, flush=True)


def number_text(x: float) -> str:
    return f"{x:.2e}" if math.isfinite(x) else "inf"


def write(out: Path, fill, manifest: dict) -> Path:
    """Write the snapshot; an unwritable root is a RecomputeError with exit code 3."""
    try:
        return write_prepared_snapshot(out, fill, manifest)
    except SnapshotError as exc:
        raise RecomputeError(str(exc), code=3) from exc


def _finite(x: float | None) -> float | None:
    return float(x) if x is not None and math.isfinite(x) else None


def recompute_manifest(settings: Settings, engine: str, iterations: int, nodes: int, edges: int,
                       facts: dict[str, dict], inp: RecomputeInput, seconds: float, extra: dict | None = None) -> dict:
    """The manifest keys of a recomputed snapshot (``write_prepared_snapshot`` adds format, sequence, files)."""
    t = settings.targets
    return {
        "source": "recompute",
        "engine": engine,
        "iterations": iterations,
        "recompute": {"input": inp.edges if not inp.from_snapshot else str(Path(inp.edges).parent),
                      "seconds": round(seconds, 3), **(extra or {})},
        "damping": settings.damping,
        "rtol": t.rtol,
        "tolerance": t.tolerance,
        "certified_top": t.certified_top,
        "certified_bound": {name: _finite(f["l1_bound"]) for name, f in facts.items()},
        **settings.counters.as_dict(),
        "positions": settings.positions,
        "nodes": nodes,
        "edges": edges,
        "profiles": facts,
    }
