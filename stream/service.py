"""The long-lived consumer: source in, settled scores, snapshots and commits out.

One loop, one thread of work::

    load the newest good snapshot (or start empty) -> seek the source there
    repeat: poll a chunk -> apply in micro-batches, settling after each
            -> rejects to their sink -> score-change feed when due
            -> snapshot when due: write (atomic, fsynced) -> commit positions -> prune
    on SIGTERM/SIGINT or the end of a finite source: final snapshot, commit, exit 0

Exactly-once effect: positions are committed to the source only after the
snapshot that covers them is durable, and a restart resumes from the
snapshot's positions, not from the source's own idea of where it was. A
crash between the two replays, from the snapshot, what the snapshot did
not include, so every record counts exactly once in the next snapshot.
The file rejects sink is truncated on restart to the size recorded in the
snapshot, so it too holds each reject once.
"""

from __future__ import annotations

import gc
import json
import logging
import os
import signal
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from ranktide.solver import Ranker
from ranktide.stream.api import ApiSettings, LiveState, ReadApi, build_view, positions_distance
from ranktide.stream.config import ServiceConfig
from ranktide.stream.events import Limits
from ranktide.stream.logs import seed_personalizations
from ranktide.stream.metrics import Metrics, start_metrics_server
from ranktide.stream.recompute_job import RecomputeJob
from ranktide.stream.rootlock import RootLock, RootLocked
from ranktide.stream.snapshots import (Counters, SnapshotError, check_writable, load_latest, prune,
                                       write_snapshot)
from ranktide.stream.sources import Source, SourceChunk, kafka_config, open_source

log = logging.getLogger("ranktide.service")

#: A view is published at most once per this many times the cost of the last one.
VIEW_COST_FACTOR = 50

#: Allocations between young-generation collections while the service runs
#: (Python's default is 700).
GC_YOUNG_THRESHOLD = 100_000
#: Seconds a Kafka process that became the owner waits for the previous owner
#: (on this host) to let go of the snapshot root's writer lock.
ROOT_LOCK_WAIT = 60.0


def _stamp(when: datetime) -> str:
    """The manifest's ``created_at`` text of a time (millisecond precision)."""
    return when.isoformat(timespec="milliseconds")


def _created(manifest: dict) -> float:
    """Unix time of a manifest's ``created_at`` (0.0 when it cannot be read)."""
    try:
        return datetime.fromisoformat(manifest["created_at"]).timestamp()
    except (KeyError, TypeError, ValueError):
        return 0.0


class RejectsSink:
    """Rejected records with place and reason: a JSON Lines file or a Kafka topic."""

    def __init__(self, target: str, out: Path, kafka_props: dict[str, str], bootstrap: str | None) -> None:
        self.topic = None
        self.path = None
        self._producer = None
        if target.startswith("kafka:"):
            from confluent_kafka import Producer

            self.topic = target[len("kafka:"):]
            if not bootstrap:
                raise SnapshotError("a kafka: rejects sink needs a kafka:// source to name the brokers")
            self._producer = Producer(kafka_config(bootstrap, kafka_props))
        else:
            self.path = Path(target[len("file:"):] if target.startswith("file:") else (target or Path(out) / "rejects.jsonl"))
            check_writable(self.path.parent, "rejects file", self.path)

    def size(self) -> int:
        return self.path.stat().st_size if self.path is not None and self.path.exists() else 0

    def truncate(self, size: int) -> None:
        """Cut the file back to what a snapshot covered (drops rejects it will see again)."""
        if self.path is not None and self.path.exists() and self.path.stat().st_size > size:
            with open(self.path, "r+b") as fh:
                fh.truncate(size)

    def write(self, chunk: SourceChunk) -> None:
        if not chunk.parsed.reasons:
            return
        lines = [json.dumps({**place, "reason": reason}, ensure_ascii=False)
                 for place, reason in zip(chunk.reject_places, chunk.parsed.reasons)]
        if self._producer is not None:
            for line in lines:
                self._producer.produce(self.topic, line.encode())
                self._producer.poll(0)
        else:
            with open(self.path, "a", encoding="utf-8") as fh:
                fh.write("\n".join(lines) + "\n")

    def flush(self) -> None:
        if self._producer is not None:
            self._producer.flush(10)
        elif self.path is not None and self.path.exists():
            with open(self.path, "rb+") as fh:
                os.fsync(fh.fileno())


@dataclass
class ScoreFeed:
    """Score-change feed: a (compacted) Kafka topic keyed by ``profile/node``.

    A node's score is sent when it moved by more than ``threshold`` relative
    to the last value sent (new nodes always are), at most every
    ``interval`` seconds.
    """

    topic: str
    bootstrap: str
    props: dict[str, str]
    threshold: float = 0.01
    interval: float = 5.0
    _producer: object = None
    _sent: dict[str, np.ndarray] = field(default_factory=dict)
    _last: float = 0.0

    def __post_init__(self) -> None:
        from confluent_kafka import Producer

        self._producer = Producer(kafka_config(self.bootstrap, self.props, **{"linger.ms": 50}))

    def due(self) -> bool:
        return time.monotonic() - self._last >= self.interval

    def publish(self, ranker: Ranker, positions: dict) -> int:
        """Send the changed scores of every profile; return how many were sent."""
        self._last = time.monotonic()
        names = ranker.node_names().to_pylist() if ranker.engine.n_nodes else []
        sent = 0
        certificates = ranker.engine.settle_certified()
        for profile in ranker.profiles:
            cert = certificates[profile]
            scores = cert.scores
            old = self._sent.get(profile, np.zeros(0))
            prev = np.zeros_like(scores)
            prev[: old.size] = old[: scores.size]
            with np.errstate(divide="ignore", invalid="ignore"):
                moved = np.abs(scores - prev) > self.threshold * np.abs(prev)
            moved &= (scores != prev)
            for i in np.flatnonzero(moved):
                value = {"node": names[i], "profile": profile, "score": float(scores[i]),
                         "error_bound": float(cert.bounds[i]), "certified_bound": cert.l1_bound,
                         "positions": positions}
                self._producer.produce(self.topic, key=f"{profile}/{names[i]}".encode(), value=json.dumps(value).encode())
                if sent % 10_000 == 0:
                    self._producer.poll(0)
                sent += 1
            prev[moved] = scores[moved]
            self._sent[profile] = prev
        self._producer.flush(30)
        return sent


class Service:
    """``ranktide run``: see the module docstring."""

    def __init__(self, config: ServiceConfig, root_lock: RootLock | None = None) -> None:
        """``root_lock``: the root's writer lock when the caller took it already (``demo``)."""
        self.cfg = config
        self.out = Path(config.out)
        self._root_lock = root_lock
        self.source_is_kafka = False
        self.limits = Limits(config.max_id_length, config.max_message_bytes)
        self.metrics = Metrics()
        self._stop = threading.Event()
        self.ranker: Ranker | None = None
        self.counters = Counters()
        self.source: Source | None = None
        self._dirty = False     # events applied since the last snapshot
        self._closing = False
        self._owner = False     # this process owns the graph (always, for a file source)
        self._events_at_snapshot = 0
        self._last_snapshot = time.monotonic()
        self._unsettled = False  # events applied since the last settle
        self._settled_at = time.monotonic()
        self.live = LiveState()  # what the read API answers from (see stream/api.py)
        self._view_due = False   # state or positions moved since the last published view
        self._views = 0
        self._next_view = 0.0    # monotonic time before which no view is published (their cost)

    # -------------------------------------------------------------- lifecycle
    def request_stop(self, *_args) -> None:
        log.info("stop requested: finishing the current batch")
        self._stop.set()

    def install_signal_handlers(self) -> None:
        signal.signal(signal.SIGTERM, self.request_stop)
        signal.signal(signal.SIGINT, self.request_stop)

    def _restore(self, rejects: RejectsSink) -> dict:
        """Load the newest good snapshot (or start empty); return its source positions."""
        snap = load_latest(self.out)
        if snap is None:
            self.ranker = Ranker(damping=self.cfg.damping, **self.cfg.targets())
            seed_personalizations(self.ranker, {k: Path(v) for k, v in self.cfg.personalizations.items()})
            self.counters = Counters()
            rejects.truncate(0)
            log.info("no snapshot under %s: starting from an empty graph", self.out)
            return {}
        self.ranker = snap.ranker
        self.counters = snap.counters
        self.metrics.last_snapshot = _created(snap.manifest)
        rejects.truncate(int(snap.manifest.get("positions", {}).get("rejects_bytes", 0)))
        log.info("resumed from %s: %d events applied, %d rejected", snap.path.name,
                 self.counters.events_applied, self.counters.events_rejected)
        return snap.manifest.get("positions", {})

    def _lock_root(self, wait: float = 0.0) -> None:
        """Hold the snapshot root's writer lock (a no-op when held already)."""
        if self._root_lock is None:
            self._root_lock = RootLock.wait(self.out, "ranktide run", wait, self._stop,
                                            source=self.cfg.source, group=self.cfg.group)

    def _unlock_root(self) -> None:
        if self._root_lock is not None:
            self._root_lock.release()
            self._root_lock = None

    def _check_kafka_root(self) -> None:
        """A Kafka process waits as a standby only beside writers of its own group."""
        holder = RootLock.holder(self.out)
        if holder is not None and not (holder.get("group") == self.cfg.group
                                       and str(holder.get("source", "")).startswith("kafka://")):
            raise RootLocked(self.out, holder)

    def _take_over(self, rejects: RejectsSink) -> None:
        """Become the owner: state from the newest snapshot, source at its positions."""
        if self.source_is_kafka:
            # the previous owner gives the lock back when it hands over; wait for it
            self._lock_root(wait=ROOT_LOCK_WAIT)
        self.live.phase = "restoring"
        self.source.seek(self._restore(rejects))
        self._owner = True
        self._events_at_snapshot = self._seen()
        self.metrics.records_since_snapshot = 0
        self._last_snapshot = time.monotonic()
        self._unsettled = self.ranker.engine.n_nodes > 0  # an empty engine has nothing to settle
        self._view_due = True
        self._settle()  # publishes the restored state
        self.metrics.lag = self.source.lag()
        self.live.lag = self.metrics.lag
        self.live.phase = "running"

    def _hand_over(self, rejects: RejectsSink) -> None:
        """Ownership is going: make everything applied durable, then stop consuming."""
        if not self._owner:
            return
        if self._dirty and not self._closing:
            self._snapshot(rejects, reason="handover")
        self.source.release()
        self._owner = False
        self.ranker = None
        self._unlock_root()
        self.live.view = None
        self.live.phase = "waiting for ownership"

    def run(self) -> int:
        """Run until stopped; return the process exit code."""
        cfg = self.cfg
        bootstrap = cfg.source[len("kafka://"):].split("/")[0] if cfg.source.startswith("kafka://") else None
        self.source_is_kafka = bootstrap is not None
        check_writable(self.out, "snapshot root")  # before any long wait or work
        # before anything else touches the root; a Kafka process locks it once it owns the graph
        if bootstrap:
            self._check_kafka_root()
            from ranktide.stream.sources import wait_for_brokers

            wait_for_brokers(bootstrap, cfg.kafka, cfg.connect_timeout)
        else:
            self._lock_root()
        log.info("starting with %s", json.dumps(cfg.redacted(), default=str))
        rejects = RejectsSink(cfg.rejects, self.out, cfg.kafka, bootstrap)
        self.source = open_source(cfg.source, cfg.group, cfg.kafka, self.limits, cfg.poll_records,
                                  cfg.file_chunk_bytes, finite=cfg.stop_at_end)
        # the listener comes first, so that probes are answered (503) while restoring
        server = start_metrics_server(cfg.metrics, self.metrics, ReadApi(self.live, self.api_settings())) \
            if cfg.metrics else None
        try:
            return self._run(rejects, bootstrap)
        finally:
            if server is not None:
                server.shutdown()
                server.server_close()

    def api_settings(self) -> ApiSettings:
        cfg = self.cfg
        return ApiSettings(token=cfg.api_token, max_k=cfg.api_max_k, max_nodes=cfg.api_max_nodes,
                           max_request_bytes=cfg.api_max_request_bytes, ready_max_lag=cfg.ready_max_lag,
                           stall_seconds=cfg.health_stall_seconds)

    def _run(self, rejects: RejectsSink, bootstrap: str | None) -> int:
        cfg = self.cfg
        lock = None
        if bootstrap:
            from ranktide.stream.sources import OwnerLock

            self.live.phase = "waiting for ownership"
            lock = OwnerLock(bootstrap, cfg.group, cfg.owner_topic or f"{cfg.group}.owner", cfg.kafka,
                             on_lost=lambda: self._hand_over(rejects))
            log.info("waiting to own the graph (group %s)", cfg.group)
        else:
            self._take_over(rejects)
        feed = ScoreFeed(cfg.score_topic, bootstrap, cfg.kafka, cfg.score_threshold, cfg.score_interval) \
            if cfg.score_topic and bootstrap else None
        recompute = RecomputeJob(self.out, cfg.recompute_interval, cfg.recompute_engine, cfg.recompute_master,
                                 self.metrics)
        thresholds = gc.get_threshold()
        # the Kafka client makes one object per message: with the default thresholds the
        # collector runs hundreds of times per batch over objects that all live on
        gc.freeze()
        gc.set_threshold(GC_YOUNG_THRESHOLD, *thresholds[1:])
        try:
            while not self._stop.is_set():
                self.live.turned(self.metrics.lag, self._behind())
                if lock is not None and not self._follow_lock(lock, rejects):
                    continue
                chunk = self.source.poll(timeout=0.5)
                if chunk is not None:
                    self._apply(chunk)
                    rejects.write(chunk)
                    self._dirty = True
                else:
                    self._settle()  # caught up: scores fresh now, not only at the next interval
                self.metrics.lag = self.source.lag()
                if feed is not None and self._dirty and feed.due():
                    self._settle()
                    self.metrics.feed_sent += feed.publish(self.ranker, self.source.positions())
                self._snapshot_if_due(rejects)
                recompute.tick()  # starts or collects a child process; never waits on it
                if cfg.stop_at_end and chunk is None and self.source.at_end():
                    log.info("source exhausted: stopping")
                    break
            self.live.phase = "stopping"
            if self._owner:
                self._snapshot(rejects, reason="final")  # settles first
                if feed is not None:
                    feed.publish(self.ranker, self.source.positions())
        except RootLocked:
            raise
        except SnapshotError as exc:
            log.error("%s", exc)
            return 3
        except OSError as exc:  # the rejects file, for instance, on a full disk
            log.error("cannot write %s: %s", exc.filename or "output", exc.strerror or exc)
            return 3
        finally:
            gc.set_threshold(*thresholds)
            gc.unfreeze()
            self._closing = True
            recompute.close()
            if lock is not None:
                lock.close()
            self.source.close()
            self._unlock_root()
        return 0

    def _follow_lock(self, lock, rejects: RejectsSink) -> bool:
        """Serve the owner lock; True when this process owns the graph and may consume."""
        held = lock.held(0.0 if self._owner else 0.2)
        if held and not self._owner:
            self._take_over(rejects)
        return held and self._owner

    def _snapshot_if_due(self, rejects: RejectsSink) -> None:
        every = self.cfg.snapshot_events
        by_count = every > 0 and self._seen() - self._events_at_snapshot >= every
        if self._dirty and (by_count or time.monotonic() - self._last_snapshot >= self.cfg.snapshot_interval):
            self._snapshot(rejects)
            self._last_snapshot = time.monotonic()

    # -------------------------------------------------------------- work
    def _apply(self, chunk: SourceChunk) -> None:
        """Apply a chunk's events in micro-batches; settle when a settle is due."""
        batch = chunk.parsed.batch
        step = self.cfg.micro_batch
        for start in range(0, len(batch), step):
            part = batch.slice(start, start + step)
            self.counters.events_noop += self.ranker.apply(part)
            self.counters.events_applied += len(part)
            self._unsettled = True
            if time.monotonic() - self._settled_at >= self.cfg.settle_interval:
                self._settle(publish=False)  # the chunk is not all applied: its positions would lie
        self.counters.events_rejected += len(chunk.parsed.reasons)
        self.metrics.record_batch(len(batch), len(chunk.parsed.reasons))
        self.metrics.records_since_snapshot = self._seen() - self._events_at_snapshot

        self._view_due = True
        if not self._unsettled and time.monotonic() >= self._next_view:
            self._publish()  # the chunk ended with a settle: a consistent state to show

    def _seen(self) -> int:
        """Records read so far (applied or rejected), over the whole history of the root."""
        return self.counters.events_applied + self.counters.events_rejected

    def _settle(self, publish: bool = True) -> None:
        """Bring every profile within the tolerance (scores are fresh again).

        With ``publish``, every chunk taken from the source is applied, so the
        settled state and the source positions agree: the read API gets it.
        """
        if self._unsettled:
            # the certified figures are exported at publish points (snapshots): a certificate is
            # one pass over the nodes, too much for every settle of a small batch
            self.metrics.push_edges += self.ranker.settle().edge_touches
            self._unsettled = False
        self._settled_at = time.monotonic()
        if publish and self._view_due and time.monotonic() >= self._next_view:
            self._publish()

    def _behind(self) -> int:
        """Source units (bytes, records) taken since the published view: part of the lag readers see."""
        view = self.live.view
        if view is None or not self._view_due or self.source is None:
            return 0
        return positions_distance(self.source.positions(), view.positions)

    def _publish(self, certificates: dict | None = None) -> None:
        """Hand the read API the settled state with its certificates (this thread, between batches).

        A certificate is a pass over the nodes of every profile: views are
        published at most every ``api_view_interval`` seconds, and at most
        once per ``VIEW_COST_FACTOR`` times what the last one cost.
        """
        started = time.monotonic()
        eng = self.ranker.engine
        if certificates is None and eng.n_nodes == 0:  # nothing to settle
            certificates = {name: eng.certificate(name) for name in eng.profiles}
        elif certificates is None:
            certificates = eng.settle_certified()
            self._unsettled = False
            self.metrics.bounds = {p: c.l1_bound for p, c in certificates.items()}
            self.metrics.rtol_reached = {p: max(c.rtol_reached, c.absolute_reached) for p, c in certificates.items()}
        self._views += 1
        self.live.view = build_view(self._views, self.ranker, self.counters.as_dict(), self.source.positions(),
                                    certificates)
        self._view_due = False
        now = time.monotonic()
        self._next_view = now + max(self.cfg.api_view_interval, VIEW_COST_FACTOR * (now - started))

    def _snapshot(self, rejects: RejectsSink, reason: str = "interval") -> Path:
        started = time.perf_counter()
        rejects.flush()
        positions = {**self.source.positions(), "rejects_bytes": rejects.size()}
        created = datetime.now(timezone.utc)
        path = write_snapshot(self.out, self.ranker, self.counters, positions, created_at=created)  # settles first
        self._events_at_snapshot = self._seen()
        self._unsettled = False
        self._settled_at = time.monotonic()
        certificates = self.ranker.engine.last_certificates
        self.metrics.bounds = {p: c.l1_bound for p, c in certificates.items()}
        self.metrics.rtol_reached = {p: max(c.rtol_reached, c.absolute_reached) for p, c in certificates.items()}
        self.live.last_snapshot = {"name": path.name, "written_at": datetime.now(timezone.utc).isoformat(
            timespec="milliseconds")}
        self._publish(certificates)  # those of the snapshot's own settle
        self.source.commit(positions)
        removed = prune(self.out, self.cfg.keep_snapshots)
        self._dirty = False
        # the manifest's time, to the millisecond, so the metric and the manifest agree
        self.metrics.record_snapshot(time.perf_counter() - started, datetime.fromisoformat(_stamp(created)).timestamp())
        log.info("snapshot %s (%s): %d applied, %d rejected, pruned %d", path.name, reason,
                 self.counters.events_applied, self.counters.events_rejected, len(removed))
        return path
