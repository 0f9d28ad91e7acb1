"""Replay of a recorded event log into a snapshot."""

from __future__ import annotations

import json
import logging
import queue
import sys
import threading
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterator

import numpy as np

from ranktide.solver import EventBatch, Ranker
from ranktide.stream.events import Limits
from ranktide.stream.logs import LogChunk, read_log, row_count_hint, seed_personalizations
from ranktide.stream.rootlock import RootLock
from ranktide.stream.snapshots import (Counters, OutputError, SnapshotError, load_snapshot, select_snapshot,
                                       snapshot_dirs, write_snapshot)

logger = logging.getLogger("ranktide.replay")


@dataclass
class ReplayOptions:
    """Settings of one replay.

    Attributes
    ----------
    damping : float
        Probability of following an edge (default 0.85).
    rtol, tolerance : float or None
        The settle targets (``solver.Engine``): per-node relative ``rtol``
        (default 1e-3) and the optional normalised L1 ``tolerance`` (default off).
    certified_top : int
        ``K`` of the personalizations' contract (default 100).
    personalizations : dict
        Profile name -> seeds file (one node per line, optionally
        ``node,weight``), applied before the log's first event.
    micro_batch : int, optional
        Settle after every this many events, as the live service does; by
        default the engine is settled only before each snapshot.
    limits : Limits
        Input caps.
    progress : bool
        Show a progress bar on standard error.
    from_snapshot : Path, optional
        Start from this snapshot folder (or the newest valid snapshot of this
        root) instead of an empty graph; the log is read from the snapshot's
        position in it (or, for a recording of a topic, without the messages
        the snapshot's offsets cover).
    until : int or int, optional
        Stop after this line (JSON Lines) or row number when an ``int``; a
        time is given as ``Until.time_ms`` (events with a later ts stop it).
    pace : float, optional
        Follow the events' timestamps: 1.0 in real time, N times faster.
    snapshot_every : int
        Also write a snapshot after every this many records (0: only at the end).
    """

    damping: float = 0.85
    rtol: float | None = 1e-3
    tolerance: float | None = None
    certified_top: int = 100
    personalizations: dict[str, Path] = field(default_factory=dict)
    micro_batch: int | None = None
    limits: Limits = field(default_factory=Limits)
    progress: bool = False
    from_snapshot: Path | None = None
    until: int | float | None = None
    pace: float | None = None
    snapshot_every: int = 0


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
    snapshots: list[Path] = field(default_factory=list)

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


@dataclass
class Timings:
    """Seconds a replay spent in each phase (logged at DEBUG level, read by ``ranktide bench``)."""

    read_parse: float = 0.0  # in the reader thread, overlapping the rest
    waiting: float = 0.0  # for the reader thread
    apply: float = 0.0
    snapshot: float = 0.0

    def line(self, total: float) -> str:
        return (f"replay timing: read+parse {self.read_parse:.3f} s (in a reader thread; waited for "
                f"{self.waiting:.3f} s), apply {self.apply:.3f} s (ids interned included), snapshot "
                f"{self.snapshot:.3f} s, total {total:.3f} s")


class RejectsWriter:
    """Appends rejected records, with their place and reason, to a JSON Lines file."""

    def __init__(self, path: Path, source: str) -> None:
        self.path = Path(path)
        self.source = source
        self._fh = None
        self.count = 0

    def write_chunk(self, chunk: LogChunk, upto: int | None = None) -> None:
        """Append the chunk's rejects (those of input rows below ``upto`` only, when given)."""
        p = chunk.parsed
        if not p.reasons:
            return
        try:
            self._write(chunk, upto)
        except OSError as exc:
            raise OutputError(f"cannot write the rejects file {self.path}: {exc.strerror or exc}") from exc

    def _write(self, chunk: LogChunk, upto: int | None) -> None:
        p = chunk.parsed
        if self._fh is None:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._fh = open(self.path, "a", encoding="utf-8")
        for row, reason in zip(p.rejected_rows, p.reasons):
            if upto is not None and row >= upto:
                break
            rec = {
                "source": self.source,
                "line": int(chunk.lines[row]),
                "offset": int(chunk.offsets[row]),
                "reason": reason,
                "record": chunk.raw(int(row))[:2000],
            }
            self._fh.write(json.dumps(rec, ensure_ascii=False) + "\n")
            self.count += 1

    def close(self) -> None:
        if self._fh is not None:
            fh, self._fh = self._fh, None
            try:
                fh.close()
            except OSError as exc:
                raise OutputError(f"cannot write the rejects file {self.path}: {exc.strerror or exc}") from exc


def apply_events(ranker: Ranker, batch: EventBatch, counters: Counters, micro_batch: int | None) -> None:
    """Apply valid events; with ``micro_batch``, settle after every that many events.

    Without it nothing is settled here: a replay publishes only snapshots, and
    :func:`~stream.snapshots.write_snapshot` settles before writing, so one
    settle per snapshot does the work of many.
    """
    step = micro_batch or max(len(batch), 1)
    for start in range(0, len(batch), step):
        part = batch.slice(start, start + step)
        counters.events_noop += ranker.apply(part)
        counters.events_applied += len(part)
        if micro_batch:
            ranker.settle()


@dataclass
class Segment:
    """Input rows ``[start, stop)`` of a chunk, with what follows them."""

    start: int
    stop: int
    snapshot_after: bool = False
    stop_after: bool = False
    wall_offset: float | None = None  # seconds after the replay's start, when paced


class _Plan:
    """Where a chunk is cut: --snapshot-every, --until and --pace."""

    def __init__(self, options: "ReplayOptions", records_before: int) -> None:
        self.options = options
        self.records = records_before
        self.ts0: int | None = None

    def segments(self, chunk: LogChunk) -> list[Segment]:
        n = int(chunk.lines.size)
        cuts: dict[int, Segment] = {}
        stop_row = self._until_row(chunk)
        every = self.options.snapshot_every
        if every:
            first = every - self.records % every
            for r in range(first, min(n, stop_row) + 1, every):
                cuts.setdefault(r, Segment(0, r)).snapshot_after = True
        if stop_row < n or (stop_row == n and self._until_hit_at_end(chunk)):
            cuts.setdefault(stop_row, Segment(0, stop_row)).stop_after = True
        paced = self._pace_rows(chunk, min(n, stop_row))
        for r, wall in paced.items():
            cuts.setdefault(r, Segment(0, r))
        out, begin = [], 0
        for r in sorted(cuts):
            if r <= 0 and not cuts[r].stop_after:
                continue
            seg = cuts[r]
            seg.start, seg.stop = begin, r
            seg.wall_offset = paced.get(begin)
            out.append(seg)
            begin = r
            if seg.stop_after:
                return out
        if begin < n:
            out.append(Segment(begin, n, wall_offset=paced.get(begin)))
        return out

    def _until_row(self, chunk: LogChunk) -> int:
        until = self.options.until
        n = int(chunk.lines.size)
        if until is None:
            return n + 1
        if isinstance(until, int):
            return int(np.searchsorted(chunk.lines, until, side="right"))
        ts = chunk.parsed.batch.ts
        late = np.flatnonzero(ts > until)
        return int(chunk.parsed.valid_rows[late[0]]) if late.size else n + 1

    def _until_hit_at_end(self, chunk: LogChunk) -> bool:
        until = self.options.until
        return isinstance(until, int) and chunk.lines.size > 0 and chunk.lines[-1] >= until

    def _pace_rows(self, chunk: LogChunk, limit: int) -> dict[int, float]:
        """Rows where a paced replay waits, with the wall-clock offset to wait for."""
        speed = self.options.pace
        ts = chunk.parsed.batch.ts
        rows = chunk.parsed.valid_rows
        keep = (ts >= 0) & (rows < limit)
        if not speed or not keep.any():
            return {}
        ts, rows = ts[keep], rows[keep]
        if self.ts0 is None:
            self.ts0 = int(ts[0])
        wall = (ts - self.ts0) / 1000.0 / speed
        window = np.floor(wall / PACE_WINDOW)
        starts = np.concatenate(([0], np.flatnonzero(np.diff(window)) + 1))
        return {int(rows[i]): float(wall[i]) for i in starts}

    def advance(self, records: int) -> None:
        self.records += records


#: Paced replays apply events in windows of this many seconds of (scaled) time.
PACE_WINDOW = 0.05


def _segment_batch(chunk: LogChunk, seg: Segment) -> tuple[EventBatch, int]:
    """Valid events and reject count of input rows ``[seg.start, seg.stop)``."""
    p = chunk.parsed
    lo, hi = np.searchsorted(p.valid_rows, [seg.start, seg.stop])
    rlo, rhi = np.searchsorted(p.rejected_rows, [seg.start, seg.stop])
    return p.batch.slice(int(lo), int(hi)), int(rhi - rlo)


def _timed_chunks(chunks: Iterator[LogChunk], timings: Timings) -> Iterator[LogChunk]:
    """The chunks, adding the time spent reading and parsing each to ``timings.read_parse``."""
    while True:
        started = time.perf_counter()
        chunk = next(chunks, None)
        timings.read_parse += time.perf_counter() - started
        if chunk is None:
            return
        yield chunk


class _Prefetched:
    """The chunks in order, read and parsed up to ``depth`` ahead by a worker thread started at once.

    Arrow's JSON reader and the compiled kernels release the interpreter lock,
    so parsing the next chunks overlaps applying this one, and the first ones
    overlap building the engine and loading the kernels, as the worker starts
    when this object is made, not when the first chunk is asked for. An error
    of the reader is raised where the chunk it broke would have come.
    :meth:`close` stops the worker (leaving early, or on an error elsewhere).
    """

    def __init__(self, chunks: Iterator[LogChunk], timings: Timings, depth: int = 2) -> None:
        self._ready: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._timings = timings
        self._done = False
        self._worker = threading.Thread(target=_produce, args=(_timed_chunks(chunks, timings), self._ready, self._stop),
                                        name="replay-reader", daemon=True)
        self._worker.start()

    def __iter__(self) -> "_Prefetched":
        return self

    def __next__(self) -> LogChunk:
        if self._done:
            raise StopIteration
        started = time.perf_counter()
        kind, item = self._ready.get()
        self._timings.waiting += time.perf_counter() - started
        if kind == "chunk":
            return item
        self.close()
        if kind == "error":
            raise item
        raise StopIteration

    def close(self) -> None:
        """Stop the worker and wait for it (idempotent)."""
        self._done = True
        self._stop.set()
        while self._worker.is_alive():  # free a worker blocked on a full queue
            try:
                self._ready.get(timeout=0.05)
            except queue.Empty:
                pass
        self._worker.join()


def _produce(chunks: Iterator[LogChunk], ready: queue.Queue, stop: threading.Event) -> None:
    """Worker of :class:`_Prefetched`: put ("chunk", c) items, then ("end", None) or ("error", exc)."""
    try:
        for chunk in chunks:
            ready.put(("chunk", chunk))
            if stop.is_set():
                return
        ready.put(("end", None))
    except BaseException as exc:  # noqa: BLE001 - handed to the consuming thread, which raises it
        ready.put(("error", exc))
    finally:
        chunks.close()


def _load_kernels() -> None:
    """Load the id-interning kernel from numba's cache, and numba's compiler state with it.

    The first compiled call of a process sets numba up (about 0.5 s); made
    here, on a throwaway id map, it overlaps the reader thread's parsing
    instead of holding up the first chunk.
    """
    import pyarrow as pa

    from ranktide.solver.ids import NodeIds

    NodeIds().intern(pa.array(["-"], pa.string()))


def _position_after(chunk: LogChunk, row: int) -> tuple[int, int]:
    """(offset, lines read) once input rows below ``row`` are consumed."""
    if row >= chunk.lines.size:
        return chunk.end_offset, chunk.end_line
    return int(chunk.offsets[row]), int(chunk.lines[row]) - 1


class _Replay:
    """State of one replay run."""

    def __init__(self, log: Path, out: Path, options: "ReplayOptions") -> None:
        self.log, self.out, self.options = Path(log), Path(out), options
        self.key = str(self.log.resolve())
        self.rejects = RejectsWriter(self.out / "rejects.jsonl", str(self.log))
        self.written: list[Path] = []
        self.timings = Timings()
        self.started_wall = time.monotonic()
        self.chunks: _Prefetched | None = None
        if options.from_snapshot is None:  # read from the log's start: parse while the engine is set up
            self.chunks = self._read(0, 0)
        try:
            self.ranker, self.counters, self.offset, self.line, self.skip = self._start()
        except BaseException:
            self.close()
            raise

    def _read(self, offset: int, line: int) -> _Prefetched:
        return _Prefetched(read_log(self.log, self.options.limits, offset, line + 1), self.timings)

    def close(self) -> None:
        """Stop the reader thread, if one is running."""
        if self.chunks is not None:
            self.chunks.close()

    def _start(self):
        if self.options.from_snapshot is None:
            ranker = Ranker(damping=self.options.damping, rtol=self.options.rtol, tolerance=self.options.tolerance,
                            certified_top=self.options.certified_top)
            seed_personalizations(ranker, self.options.personalizations)
            return ranker, Counters(), 0, 0, {}
        snap = load_snapshot(self.options.from_snapshot)
        positions = snap.manifest.get("positions", {})
        mine = positions.get("files", {}).get(self.key, {"offset": 0, "line": 0})
        # a recording of a topic: skip what the snapshot's partition offsets cover
        skip = {(t, int(p)): int(o) for t, parts in positions.get("kafka", {}).items() for p, o in parts.items()}
        return snap.ranker, snap.counters, int(mine["offset"]), int(mine["line"]), skip

    def positions(self) -> dict:
        out = {"files": {self.key: {"offset": self.offset, "line": self.line}}}
        if self.skip:
            out["kafka"] = {}
            for (topic, part), off in sorted(self.skip.items()):
                out["kafka"].setdefault(topic, {})[str(part)] = off
        return out

    def snapshot(self) -> Path:
        started = time.perf_counter()
        path = write_snapshot(self.out, self.ranker, self.counters, self.positions())
        self.written.append(path)
        self.timings.snapshot += time.perf_counter() - started
        return path

    def run(self, bar) -> None:
        opts = self.options
        plan = _Plan(opts, self.counters.events_applied + self.counters.events_rejected)
        rows = row_count_hint(self.log)
        if rows:
            engine = self.ranker.engine
            engine.ensure_nodes(engine.n_nodes, max(rows - self.offset, 0))
        if self.chunks is None:
            self.chunks = self._read(self.offset, self.line)
        _load_kernels()  # while the reader thread parses the first chunks
        try:
            for chunk in self.chunks:
                if self._chunk(self._drop_covered(chunk), plan):
                    return
                self._show(bar, chunk)
        finally:
            self.close()  # stops the reader thread when leaving early

    def _chunk(self, chunk: LogChunk, plan: "_Plan") -> bool:
        """Apply one chunk segment by segment; True when --until stops the replay in it."""
        for seg in plan.segments(chunk):
            self._wait(seg)
            batch, rejected = _segment_batch(chunk, seg)
            started = time.perf_counter()
            apply_events(self.ranker, batch, self.counters, self.options.micro_batch)
            self.timings.apply += time.perf_counter() - started
            self.counters.events_rejected += rejected
            self.offset, self.line = _position_after(chunk, seg.stop)
            self._note_kafka(chunk, seg)
            plan.advance(seg.stop - seg.start)
            if seg.snapshot_after:
                self.snapshot()
            if seg.stop_after:
                self.rejects.write_chunk(chunk, upto=seg.stop)
                return True
        self.rejects.write_chunk(chunk)
        return False

    def _show(self, bar, chunk: LogChunk) -> None:
        if bar is not None:
            bar.update(chunk.end_offset - bar.n)
            rate = self.counters.events_applied / max(time.monotonic() - self.started_wall, 1e-9)
            # the bound is that of the state so far; a replay settles before each snapshot
            bar.set_postfix(events=f"{self.counters.events_applied:,}", per_s=f"{rate:,.0f}",
                            bound=f"{self.ranker.certified_bound():.2g}")

    def _wait(self, seg: Segment) -> None:
        if seg.wall_offset is not None:
            delay = self.started_wall + seg.wall_offset - time.monotonic()
            if delay > 0:
                time.sleep(delay)

    def _drop_covered(self, chunk: LogChunk) -> LogChunk:
        """Drop the rows of a recording that the starting snapshot already covers."""
        if not self.skip or chunk.kafka is None:
            return chunk
        topics, parts, offsets = chunk.kafka
        starts = np.array([self.skip.get((t, int(p)), 0) for t, p in zip(topics, parts)], dtype=np.int64)
        keep = offsets >= starts
        return chunk if keep.all() else chunk.select(keep)

    def _note_kafka(self, chunk: LogChunk, seg: Segment) -> None:
        """Advance the per-partition positions of a recording past the segment's rows."""
        if chunk.kafka is None or seg.stop <= seg.start:
            return
        topics, parts, offsets = chunk.kafka
        t = np.asarray(topics[seg.start:seg.stop], dtype=object)
        p, o = parts[seg.start:seg.stop], offsets[seg.start:seg.stop]
        for topic in set(t.tolist()):
            in_topic = t == topic
            for part in np.unique(p[in_topic]):
                top = int(o[in_topic & (p == part)].max()) + 1
                key = (topic, int(part))
                self.skip[key] = max(self.skip.get(key, 0), top)


def check_root(out: Path, start: Path | None) -> None:
    """Refuse to add snapshots of one graph to a root that holds another's.

    A replay writes into ``out`` when it holds no snapshot yet, or when the
    replay continues one of them (``start``, the ``--from`` snapshot, lies
    in ``out``); otherwise sequence numbers of two graphs would interleave
    and a restarted service would resume the wrong one.

    Raises
    ------
    SnapshotError
        ``out`` holds snapshots and the replay does not start from one of them.
    """
    existing = snapshot_dirs(out)
    if not existing:
        return
    if start is not None and Path(start).resolve().parent == Path(out).resolve():
        return
    held = existing[0].name if len(existing) == 1 else f"{existing[0].name} to {existing[-1].name}"
    raise SnapshotError(f"{out} already holds snapshots of another graph ({held}): replay into an empty "
                        f"folder, or continue this root with --from {out}")


def replay_log(log: Path, out: Path, options: ReplayOptions = ReplayOptions()) -> ReplaySummary:
    """Replay ``log`` (from an empty graph or ``options.from_snapshot``) into snapshots under ``out``.

    Holds the writer lock of ``out`` (:mod:`~ranktide.stream.rootlock`) throughout.

    Raises
    ------
    LogError
        When the log (or a seeds file) cannot be read at all.
    SnapshotError
        When the starting snapshot cannot be read, a snapshot not written,
        ``out`` is locked by another writer or holds another graph's snapshots.
    """
    started = time.perf_counter()
    lock = RootLock.acquire(out, "ranktide replay", log=str(log))
    try:
        if options.from_snapshot is not None:
            options = replace(options, from_snapshot=select_snapshot(options.from_snapshot).path)
        check_root(out, options.from_snapshot)
        state = _Replay(log, out, options)
        bar = None
        try:
            bar = _progress(Path(log), options.progress)
            state.run(bar)
        finally:
            state.close()
            state.rejects.close()
            if bar is not None:
                bar.close()
        path = state.snapshot()
    finally:
        lock.release()
    ranker = state.ranker
    logger.debug(state.timings.line(time.perf_counter() - started))
    return ReplaySummary(
        snapshot=path,
        counters=state.counters,
        nodes=ranker.engine.n_nodes,
        edges=ranker.engine.n_edges,
        bounds={name: ranker.certified_bound(name) for name in ranker.profiles},
        seconds=time.perf_counter() - started,
        rejects_file=state.rejects.path if state.rejects.count else None,
        snapshots=state.written,
    )


def _progress(log: Path, enabled: bool):
    if not enabled:
        return None
    from tqdm import tqdm

    return tqdm(total=log.stat().st_size, unit="B", unit_scale=True, desc="replay", file=sys.stderr)
