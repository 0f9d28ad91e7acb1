"""Replay of a recorded event log into a snapshot."""

from __future__ import annotations

import json
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from solver import EventBatch, Ranker
from stream.events import Limits
from stream.snapshots import Counters, write_snapshot

from .logs import LogChunk, LogError, read_log


@dataclass
class ReplayOptions:
    """Settings of one replay.

    Attributes
    ----------
    damping, tolerance : float
        Engine parameters (defaults 0.85 and 1e-6).
    personalizations : dict
        Profile name -> seeds file (one node per line, optionally
        ``node,weight``), applied before the log's first event.
    micro_batch : int
        Events applied between two settles.
    limits : Limits
        Input caps.
    progress : bool
        Show a progress bar on standard error.
    """

    damping: float = 0.85
    tolerance: float = 1e-6
    personalizations: dict[str, Path] = field(default_factory=dict)
    micro_batch: int = 50_000
    limits: Limits = field(default_factory=Limits)
    progress: bool = False


@dataclass
class ReplaySummary:
    """What a replay did, as printed at its end."""

    snapshot: Path
    counters: Counters
    nodes: int
    edges: int
    bounds: dict[str, float]
    seconds: float
    rejects_file: Path | None

    def lines(self) -> list[str]:
        c = self.counters
        out = [
            f"snapshot       {self.snapshot}",
            f"events applied {c.events_applied:,} ({c.events_noop:,} of them no-ops)",
            f"events rejected {c.events_rejected:,}" + (f" (see {self.rejects_file})" if c.events_rejected else ""),
            f"nodes          {self.nodes:,}",
            f"edges          {self.edges:,}",
        ]
        out += [f"bound[{name}]  {b:.3g} (certified normalised L1 error)" for name, b in self.bounds.items()]
        out.append(f"time           {self.seconds:.2f} s")
        return out


def read_seeds_file(path: Path) -> tuple[list[str], list[float]]:
    """Seeds of a personalization: one node per line, optionally ``node,weight`` or ``node<TAB>weight``.

    Blank lines and lines starting with ``#`` are skipped.
    """
    nodes, weights = [], []
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise LogError(f"{path}: cannot read seeds file: {exc.strerror or exc}") from exc
    for number, line in enumerate(text.splitlines(), 1):
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        parts = [p.strip() for p in line.replace("\t", ",").split(",")]
        try:
            weight = float(parts[1]) if len(parts) > 1 and parts[1] else 1.0
        except ValueError:
            raise LogError(f"{path}:{number}: weight {parts[1]!r} is not a number") from None
        if not weight >= 0 or weight == float("inf"):
            raise LogError(f"{path}:{number}: seed weight must be a finite number >= 0")
        nodes.append(parts[0])
        weights.append(weight)
    return nodes, weights


class RejectsWriter:
    """Appends rejected records, with their place and reason, to a JSON Lines file."""

    def __init__(self, path: Path, source: str) -> None:
        self.path = Path(path)
        self.source = source
        self._fh = None
        self.count = 0

    def write_chunk(self, chunk: LogChunk) -> None:
        p = chunk.parsed
        if not p.reasons:
            return
        if self._fh is None:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._fh = open(self.path, "a", encoding="utf-8")
        for row, reason in zip(p.rejected_rows, p.reasons):
            rec = {
                "source": self.source,
                "line": int(chunk.lines[row]),
                "offset": int(chunk.offsets[row]),
                "reason": reason,
                "record": chunk.raw(int(row))[:2000],
            }
            self._fh.write(json.dumps(rec, ensure_ascii=False) + "\n")
        self.count += len(p.reasons)

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None


def apply_chunk(ranker: Ranker, chunk: LogChunk, counters: Counters, micro_batch: int) -> None:
    """Apply a chunk's valid events in micro-batches, settling after each."""
    batch = chunk.parsed.batch
    for start in range(0, len(batch), micro_batch):
        part = batch.slice(start, start + micro_batch)
        counters.events_noop += ranker.apply(part)
        counters.events_applied += len(part)
        ranker.settle()
    counters.events_rejected += len(chunk.parsed.reasons)


def seed_personalizations(ranker: Ranker, personalizations: dict[str, Path]) -> None:
    for name, path in personalizations.items():
        nodes, weights = read_seeds_file(path)
        ranker.add_profile(name)
        if nodes:
            ranker.apply(EventBatch.seeds(name, nodes, weights))


def replay_log(log: Path, out: Path, options: ReplayOptions = ReplayOptions()) -> ReplaySummary:
    """Replay ``log`` from an empty graph and write one snapshot under ``out``.

    Raises
    ------
    LogError
        When the log (or a seeds file) cannot be read at all.
    """
    started = time.perf_counter()
    log = Path(log)
    ranker = Ranker(damping=options.damping, tolerance=options.tolerance)
    seed_personalizations(ranker, options.personalizations)
    counters = Counters()
    rejects = RejectsWriter(Path(out) / "rejects.jsonl", str(log))
    bar = _progress(log, options.progress)
    end_offset, last_line = 0, 0
    try:
        for chunk in read_log(log, options.limits):
            apply_chunk(ranker, chunk, counters, options.micro_batch)
            rejects.write_chunk(chunk)
            end_offset = chunk.end_offset
            last_line = int(chunk.lines[-1]) if chunk.lines.size else last_line
            if bar is not None:
                bar.update(chunk.end_offset - bar.n)
                bar.set_postfix(events=f"{counters.events_applied:,}", bound=f"{ranker.certified_bound():.2g}")
    finally:
        rejects.close()
        if bar is not None:
            bar.close()
    positions = {"file": str(log.resolve()), "offset": end_offset, "line": last_line}
    path = write_snapshot(Path(out), ranker, counters, positions)
    return ReplaySummary(
        snapshot=path,
        counters=counters,
        nodes=ranker.engine.n_nodes,
        edges=ranker.engine.n_edges,
        bounds={name: ranker.certified_bound(name) for name in ranker.profiles},
        seconds=time.perf_counter() - started,
        rejects_file=rejects.path if rejects.count else None,
    )


def _progress(log: Path, enabled: bool):
    if not enabled:
        return None
    from tqdm import tqdm

    return tqdm(total=log.stat().st_size, unit="B", unit_scale=True, desc="replay", file=sys.stderr)
