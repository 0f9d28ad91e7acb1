"""Event sources of the service: followed JSON Lines files and Kafka topics.

A source hands out :class:`SourceChunk` objects: the parsed events of a run of
records, the place of every reject, and the position *after* the chunk. The
service snapshots positions and, only once the snapshot is durable, commits
them back to the source; after a crash it seeks to the snapshot's positions.
So every record is reflected exactly once in what a snapshot holds.

Positions, as stored in a manifest's ``positions``:

* files: ``{"files": {"/abs/path.jsonl": {"offset": BYTES, "line": LINES_READ}}}``
* Kafka: ``{"kafka": {"topic": {"0": NEXT_OFFSET, "1": ...}}}``
"""

from __future__ import annotations

import logging
import math
import queue
import re
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Protocol

from ranktide.stream.events import Limits, SourceChunk, decode_values, is_arrow_message
from ranktide.stream.logs import LogError, read_log

log = logging.getLogger("ranktide.sources")


class SourceError(RuntimeError):
    """A source that cannot be reached or used (exit code 2); the message names it and the reason."""


class RateLimited(logging.Filter):
    """Let a message through at most once per ``every`` seconds, counting the copies held back.

    librdkafka retries an unreachable broker several times a second and logs
    every failure; messages that differ only in numbers count as the same.
    """

    def __init__(self, every: float = 10.0) -> None:
        super().__init__()
        self.every = every
        self._last: dict[str, float] = {}
        self._held: dict[str, int] = {}

    def filter(self, record: logging.LogRecord) -> bool:
        text = record.getMessage()
        key = re.sub(r"\d+", "#", text)[:200]
        now = time.monotonic()
        if now - self._last.get(key, -math.inf) < self.every:
            self._held[key] = self._held.get(key, 0) + 1
            return False
        if len(self._last) > 1000:
            self._last.clear()
        self._last[key] = now
        held = self._held.pop(key, 0)
        if held:
            record.msg, record.args = f"{text} ({held} more like it not shown)", ()
        return True


#: librdkafka's own log: warnings and errors only, each kind at most once per 10 s.
KAFKA_LOG = logging.getLogger("ranktide.kafka")
KAFKA_LOG.setLevel(logging.WARNING)
KAFKA_LOG.addFilter(RateLimited())


def kafka_config(bootstrap: str, properties: dict[str, str], **settings) -> dict:
    """Configuration of a Kafka client: ours, then the user's librdkafka properties.

    ``log_level`` 4 keeps librdkafka at warnings; its lines go through
    :data:`KAFKA_LOG` (rate-limited) instead of straight to stderr.
    """
    return {"bootstrap.servers": bootstrap, "log_level": 4, "logger": KAFKA_LOG, **settings, **properties}


def wait_for_brokers(bootstrap: str, properties: dict[str, str], timeout: float) -> None:
    """Return once the brokers answer a metadata request; SourceError after ``timeout`` seconds."""
    from confluent_kafka import KafkaException
    from confluent_kafka.admin import AdminClient

    errors: list[str] = []
    # the probe's own failures are summed up in the one error below, not logged one by one
    quiet = logging.getLogger("ranktide.kafka.probe")
    quiet.setLevel(logging.CRITICAL)
    admin = AdminClient(kafka_config(bootstrap, properties, logger=quiet,
                                     error_cb=lambda err: errors.append(err.str())))
    try:
        admin.list_topics(timeout=timeout)
    except KafkaException as exc:
        admin.poll(0.5)  # serve the error callback: it names the cause (refused, unknown host, ...)
        reason = errors[-1] if errors else exc.args[0].str()
        raise SourceError(f"cannot reach the Kafka brokers {bootstrap} within {timeout:g} s "
                          f"(connect_timeout): {reason}") from None



class Source(Protocol):
    def poll(self, timeout: float) -> SourceChunk | None: ...
    def positions(self) -> dict: ...
    def seek(self, positions: dict) -> None: ...
    def release(self) -> None: ...
    def commit(self, positions: dict) -> None: ...
    def at_end(self) -> bool: ...
    def lag(self) -> dict[str, int]: ...
    def close(self) -> None: ...


# ------------------------------------------------------------------ files


class FileSource:
    """JSON Lines files followed as they grow.

    Parameters
    ----------
    path : Path
        One file, or a folder whose ``*.jsonl`` files are read in name order
        (a new file appearing in the folder is picked up).
    limits : Limits
        Input caps.
    chunk_bytes : int
        Most bytes taken from a file in one poll.
    finite : bool
        The files are complete (``--stop-at-end``): a last record without its
        newline counts once the file has stopped growing. Otherwise a partial
        last line waits for its newline, since the writer may not be done.
    """

    def __init__(self, path: Path, limits: Limits = Limits(), chunk_bytes: int = 8 << 20,
                 finite: bool = False) -> None:
        self.path = Path(path)
        if not self.path.exists():
            raise LogError(f"{self.path}: no such file or folder")
        self.limits = limits
        self.chunk_bytes = chunk_bytes
        self.finite = finite
        self._pos: dict[str, dict[str, int]] = {}
        self._tail: dict[str, int] = {}  # file -> size when only a partial line was left unread

    def _files(self) -> list[Path]:
        if self.path.is_dir():
            return sorted(p for p in self.path.iterdir() if p.suffix in (".jsonl", ".ndjson", ".json") and p.is_file())
        return [self.path]

    def positions(self) -> dict:
        return {"files": {k: dict(v) for k, v in self._pos.items()}}

    def seek(self, positions: dict) -> None:
        self._pos = {k: dict(v) for k, v in positions.get("files", {}).items()}

    def commit(self, positions: dict) -> None:
        """Nothing to tell a file: its position lives in the snapshot."""

    def release(self) -> None:
        """A file source has a single owner: nothing to hand over."""

    def poll(self, timeout: float) -> SourceChunk | None:
        for f in self._files():
            key = str(f.resolve())
            pos = self._pos.setdefault(key, {"offset": 0, "line": 0})
            try:
                size = f.stat().st_size
            except OSError:
                continue
            if size < pos["offset"]:
                raise LogError(f"{f}: file shrank below the recorded position {pos['offset']} (truncated or replaced?)")
            if size == pos["offset"]:
                continue
            chunk = self._read(f, pos, follow_partial=True)
            if chunk is None and self.finite:
                # only a partial last line is left: it is the last record once the file stops growing
                if self._tail.get(key) == size:
                    chunk = self._read(f, pos, follow_partial=False)
                self._tail[key] = size
            if chunk is None:
                continue
            places = [
                {"file": key, "line": int(chunk.lines[r]), "offset": int(chunk.offsets[r]), "record": chunk.raw(int(r))[:2000]}
                for r in chunk.parsed.rejected_rows
            ]
            records = int(chunk.parsed.valid_rows.size + chunk.parsed.rejected_rows.size)
            pos["line"] = chunk.end_line
            pos["offset"] = chunk.end_offset
            return SourceChunk(chunk.parsed, places, records)
        time.sleep(min(timeout, 0.05))
        return None

    def _read(self, f: Path, pos: dict[str, int], follow_partial: bool):
        """The next chunk of ``f`` from ``pos`` (None when no complete record is there)."""
        reader = read_log(f, self.limits, pos["offset"], pos["line"] + 1, follow_partial=follow_partial,
                          chunk_bytes=self.chunk_bytes)
        try:
            return next(reader, None)
        finally:
            reader.close()

    def at_end(self) -> bool:
        for f in self._files():
            pos = self._pos.get(str(f.resolve()), {"offset": 0})
            try:
                if f.stat().st_size > pos["offset"]:
                    return False
            except OSError:
                continue
        return True

    def lag(self) -> dict[str, int]:
        out = {}
        for f in self._files():
            key = str(f.resolve())
            try:
                out[key] = max(f.stat().st_size - self._pos.get(key, {"offset": 0})["offset"], 0)
            except OSError:
                pass
        return out

    def close(self) -> None:
        pass


# ------------------------------------------------------------------ kafka


def parse_kafka_url(url: str) -> tuple[str, list[str]]:
    """``kafka://h1:p1,h2:p2/topic1,topic2`` -> (bootstrap servers, topics)."""
    if not url.startswith("kafka://"):
        raise ValueError(f"{url!r} is not a kafka:// source")
    rest = url[len("kafka://"):]
    hosts, sep, topics = rest.partition("/")
    if not hosts or not sep or not topics:
        raise ValueError(f"{url!r}: expected kafka://HOST:PORT[,HOST:PORT...]/TOPIC[,TOPIC...]")
    return hosts, [t for t in topics.split(",") if t]


def decode_messages(messages: list, limits: Limits) -> SourceChunk:
    """Parse Kafka messages: JSON values, or Arrow IPC streams marked by a header."""

    def place(i: int) -> dict:
        m = messages[i]
        return {"topic": m.topic(), "partition": m.partition(), "offset": m.offset()}

    arrow = [bool(m.headers()) and is_arrow_message(m) for m in messages]
    return decode_values([m.value() for m in messages], arrow, place, limits)


@dataclass
class Fetched:
    """One batch of Kafka messages, decoded by the fetch thread, not yet taken.

    Positions move only when the service takes the batch (:meth:`KafkaSource.poll`),
    so a snapshot never covers a message that was fetched but not applied.

    Attributes
    ----------
    chunk : SourceChunk or None
        The decoded messages (None when the batch held only events).
    last : dict
        (topic, partition) -> offset of the last message of the batch.
    events : list of (code, key, offset, text, fatal)
        End-of-partition and error events in their order.
    """

    chunk: SourceChunk | None
    last: dict[tuple[str, int], int]
    events: list[tuple[int, tuple[str, int], int, str, bool]]


def fetch_batch(consumer, batch_records: int, limits: Limits, timeout: float, partitions: int) -> Fetched | None:
    """Consume up to ``batch_records`` messages and decode them (no position changes).

    The last offset of each partition is found scanning from the end, and the
    scan stops once all ``partitions`` assigned partitions are seen.
    """
    messages = consumer.consume(num_messages=batch_records, timeout=timeout)
    if not messages:
        return None
    failed = [m for m in messages if m.error() is not None]
    good = [m for m in messages if m.error() is None] if failed else messages
    last: dict[tuple[str, int], int] = {}
    for msg in reversed(good):
        key = (msg.topic(), msg.partition())
        if key not in last:
            last[key] = msg.offset()
            if len(last) == partitions:
                break
    events = [(m.error().code(), (m.topic(), m.partition()), m.offset(), m.error().str(), m.error().fatal())
              for m in failed]
    return Fetched(decode_messages(good, limits) if good else None, last, events)


@dataclass
class _Call:
    """A request for the fetch thread to run ``fn(consumer)`` (it owns the consumer)."""

    fn: Callable[[object], object]
    done: threading.Event = field(default_factory=threading.Event)
    result: object = None
    error: BaseException | None = None


class Prefetch:
    """A thread that fetches and decodes the next batches while the engine works.

    The Kafka client builds one Python object per message, and the engine's
    kernels release the interpreter lock: overlapping the two is most of the
    end-to-end rate on two cores. At most ``depth`` batches wait; stopping
    discards them (their positions were never taken). While it runs, the
    thread is the only one that touches the consumer: a call from another
    thread could wait behind a consume indefinitely, so commits are handed to
    it (:meth:`call`) and it keeps the partitions' high watermarks for the lag.
    """

    def __init__(self, consumer, batch_records: int, limits: Limits, partitions: list[tuple[str, int]],
                 depth: int = 2) -> None:
        self._consumer = consumer
        self._batch_records = batch_records
        self._limits = limits
        self._partitions = partitions
        self.high: dict[tuple[str, int], int] = {}
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._requests: queue.Queue = queue.Queue()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="ranktide-fetch", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        try:
            while not self._stop.is_set():
                self._serve_requests()
                item = fetch_batch(self._consumer, self._batch_records, self._limits, 0.1, len(self._partitions))
                self._note_watermarks()
                if item is not None:
                    self._put(item)
        except Exception as exc:  # noqa: BLE001 - handed to the service's thread, raised there
            self._put(exc)
        finally:
            self._serve_requests(refuse=True)

    def _serve_requests(self, refuse: bool = False) -> None:
        while True:
            try:
                call = self._requests.get_nowait()
            except queue.Empty:
                return
            try:
                if refuse:
                    raise RuntimeError("the Kafka fetch thread has stopped")
                call.result = call.fn(self._consumer)
            except Exception as exc:  # noqa: BLE001 - re-raised in the caller's thread
                call.error = exc
            call.done.set()

    def _note_watermarks(self) -> None:
        from confluent_kafka import TopicPartition

        for key in self._partitions:
            try:
                _, high = self._consumer.get_watermark_offsets(TopicPartition(*key), cached=True)
            except Exception:  # noqa: BLE001 - a lag figure is best effort
                continue
            if high is not None and high >= 0:
                self.high[key] = high

    def _put(self, item) -> None:
        while not self._stop.is_set():
            self._serve_requests()
            try:
                self._queue.put(item, timeout=0.1)
                return
            except queue.Full:
                continue

    def call(self, fn, timeout: float = 60.0):
        """Run ``fn(consumer)`` on the fetch thread and return its result."""
        request = _Call(fn)
        self._requests.put(request)
        if not self._thread.is_alive():
            self._serve_requests(refuse=True)
        if not request.done.wait(timeout):
            raise RuntimeError(f"the Kafka consumer did not answer within {timeout:g} s")
        if request.error is not None:
            raise request.error
        return request.result

    def get(self, timeout: float) -> Fetched | None:
        """The next fetched batch, or None after ``timeout`` seconds without one."""
        try:
            item = self._queue.get(timeout=timeout)
        except queue.Empty:
            return None
        if isinstance(item, Exception):
            raise item
        return item

    def stop(self) -> None:
        """End the thread and drop what it fetched."""
        self._stop.set()
        self._thread.join()
        while not self._queue.empty():
            self._queue.get_nowait()


class KafkaSource:
    """All partitions of one or more topics, consumed in large batches.

    The consumer assigns itself every partition (no group subscription): a
    graph needs all of its events, so partitions are never split between
    processes. Offsets are committed to the group only by :meth:`commit`,
    which the service calls after the snapshot that includes them is durable.
    :meth:`seek` positions every partition at a snapshot's recorded next
    offset; a partition the snapshot does not name starts from its beginning
    (the snapshot, not the group's committed offset, is the truth).
    """

    def __init__(self, url: str, group: str, properties: dict[str, str], limits: Limits = Limits(),
                 batch_records: int = 100_000) -> None:
        from confluent_kafka import Consumer

        self.bootstrap, self.topics = parse_kafka_url(url)
        self.group = group
        self.properties = properties
        self.limits = limits
        self.batch_records = batch_records
        conf = {
            "bootstrap.servers": self.bootstrap,
            "group.id": group,
            "enable.auto.commit": False,
            "enable.auto.offset.store": False,
            "auto.offset.reset": "earliest",
            "enable.partition.eof": True,
            "log_level": 4,
            "message.max.bytes": max(limits.max_record_bytes + 65536, 1000000),
            # large, eager fetches: measured twice the messages per second of the defaults
            "fetch.wait.max.ms": 10,
            "fetch.max.bytes": 64 << 20,
            "max.partition.fetch.bytes": 16 << 20,
            "queued.min.messages": 1_000_000,
            "queued.max.messages.kbytes": 1 << 20,
            **properties,
        }
        self._consumer = Consumer(conf, logger=KAFKA_LOG)
        self._next: dict[tuple[str, int], int] = {}
        self._eof: set[tuple[str, int]] = set()
        self._assigned: set[tuple[str, int]] = set()
        self._read: set[tuple[str, int]] = set()  # partitions that delivered a message since assignment
        self._prefetch: Prefetch | None = None

    def _stop_prefetch(self) -> None:
        if self._prefetch is not None:
            self._prefetch.stop()
            self._prefetch = None

    def _partitions(self, timeout: float = 30.0) -> list[tuple[str, int]]:
        deadline = time.monotonic() + timeout
        while True:
            meta = self._consumer.list_topics(timeout=max(deadline - time.monotonic(), 1.0))
            missing = [t for t in self.topics if t not in meta.topics or meta.topics[t].error is not None]
            if not missing:
                return [(t, p) for t in self.topics for p in sorted(meta.topics[t].partitions)]
            if time.monotonic() > deadline:
                raise SourceError(f"Kafka topic(s) {', '.join(missing)} not found at {self.bootstrap}")
            time.sleep(0.5)

    def seek(self, positions: dict) -> None:
        """Assign every partition, at the snapshot's next offsets (else from the start)."""
        from confluent_kafka import OFFSET_BEGINNING, TopicPartition

        wanted = {(t, int(p)): int(o) for t, parts in positions.get("kafka", {}).items() for p, o in parts.items()}
        self._stop_prefetch()
        parts = []
        for key in self._partitions():
            start = wanted.get(key, OFFSET_BEGINNING)
            parts.append(TopicPartition(key[0], key[1], start))
            self._next[key] = max(start, 0)
        self._consumer.assign(parts)
        self._assigned = {(p.topic, p.partition) for p in parts}
        self._eof.clear()
        self._read.clear()
        self._prefetch = Prefetch(self._consumer, self.batch_records, self.limits, sorted(self._assigned))
        log.info("consuming %s", ", ".join(f"{p.topic}[{p.partition}]@{p.offset if p.offset >= 0 else 'start'}"
                                             for p in parts))

    def release(self) -> None:
        """Stop consuming (another process takes over)."""
        self._stop_prefetch()
        self._consumer.unassign()
        self._assigned.clear()
        self._next.clear()
        self._eof.clear()

    def positions(self) -> dict:
        out: dict[str, dict[str, int]] = {}
        for (topic, part), off in sorted(self._next.items()):
            out.setdefault(topic, {})[str(part)] = off
        return {"kafka": out}

    def commit(self, positions: dict) -> None:
        from confluent_kafka import KafkaException, TopicPartition

        offsets = [
            TopicPartition(topic, int(part), int(off))
            for topic, parts in positions.get("kafka", {}).items()
            for part, off in parts.items()
        ]
        if offsets:
            try:
                self._on_consumer(lambda consumer: consumer.commit(offsets=offsets, asynchronous=False))
            except KafkaException as exc:
                # the snapshot holds the positions; a failed commit only delays the group's view
                log.warning("offset commit failed (positions are safe in the snapshot): %s", exc)

    def poll(self, timeout: float) -> SourceChunk | None:
        from confluent_kafka import KafkaError

        if not self._assigned or self._prefetch is None:
            time.sleep(min(timeout, 0.05))
            return None
        fetched = self._prefetch.get(timeout)
        if fetched is None:
            return None
        for key, offset in fetched.last.items():
            self._read.add(key)
            self._next[key] = offset + 1
            self._eof.discard(key)
        for code, key, offset, text, fatal in fetched.events:
            if code == KafkaError._PARTITION_EOF:
                if key not in self._read:
                    # nothing read since assignment (empty, or emptied by retention): start at its end
                    self._next[key] = max(self._next.get(key, 0), offset)
                # the event carries the end offset: at the end only if nothing came after it
                if self._next.get(key, 0) >= offset:
                    self._eof.add(key)
            elif fatal:
                raise SourceError(f"Kafka consumer failed: {text}")
            else:
                log.warning("Kafka: %s", text)
        return fetched.chunk

    def at_end(self) -> bool:
        return bool(self._assigned) and self._assigned <= self._eof

    def _on_consumer(self, fn):
        """``fn(consumer)`` on the thread that owns the consumer now."""
        return self._prefetch.call(fn) if self._prefetch is not None else fn(self._consumer)

    def lag(self) -> dict[str, int]:
        """Messages behind the high watermark, per partition (the fetch thread keeps the watermarks)."""
        if self._prefetch is None:  # nothing assigned
            return {}
        return {f"{t}/{p}": max(high - self._next.get((t, p), 0), 0)
                for (t, p), high in sorted(self._prefetch.high.items())}

    def close(self) -> None:
        self._stop_prefetch()
        try:
            self._consumer.close()
        except RuntimeError:
            pass


class OwnerLock:
    """Which process of a consumer group owns the graph: the holder of one partition.

    Every ranktide process of a group subscribes to a one-partition topic in
    the group ``GROUP.owner`` (cooperative-sticky assignment, so a newcomer
    does not steal it). The holder is the active owner; the others wait as
    standbys. Kafka hands the partition over only after the previous holder's
    revocation callback returns, and that callback writes a snapshot and
    commits: the next owner starts exactly where the last one stopped. A
    holder that dies loses the partition after ``session.timeout.ms``; its
    successor starts from the newest snapshot.

    Parameters
    ----------
    on_lost : callable
        Called (inside :meth:`held`) before ownership goes away.
    """

    def __init__(self, bootstrap: str, group: str, topic: str, properties: dict[str, str], on_lost) -> None:
        from confluent_kafka import Consumer

        self.topic = topic
        self._ensure_topic(bootstrap, properties)
        self._on_lost = on_lost
        self._held = False
        self._consumer = Consumer({
            "bootstrap.servers": bootstrap,
            "group.id": f"{group}.owner",
            "partition.assignment.strategy": "cooperative-sticky",
            "session.timeout.ms": 10_000,
            "heartbeat.interval.ms": 1_000,
            "enable.auto.commit": False,
            **properties,
        }, logger=KAFKA_LOG)
        self._consumer.subscribe([topic], on_assign=self._assign, on_revoke=self._revoke, on_lost=self._revoke)

    def _ensure_topic(self, bootstrap: str, properties: dict[str, str]) -> None:
        from confluent_kafka import KafkaError, KafkaException
        from confluent_kafka.admin import AdminClient, NewTopic

        admin = AdminClient(kafka_config(bootstrap, properties))
        futures = admin.create_topics([NewTopic(self.topic, num_partitions=1)], request_timeout=30)
        try:
            futures[self.topic].result(timeout=30)
            log.info("created owner topic %s", self.topic)
        except KafkaException as exc:
            code = exc.args[0].code()
            if code == KafkaError.TOPIC_ALREADY_EXISTS:
                return
            # without the Create ACL, a topic an operator created beforehand is enough
            denied = code in (KafkaError.TOPIC_AUTHORIZATION_FAILED, KafkaError.CLUSTER_AUTHORIZATION_FAILED)
            if not (denied and self.topic in admin.list_topics(timeout=30).topics):
                raise SourceError(f"cannot create owner topic {self.topic}: {exc.args[0].str()}") from exc

    def _assign(self, consumer, partitions) -> None:
        if partitions:
            self._held = True
            log.info("this process now owns the graph (holds %s)", self.topic)

    def _revoke(self, consumer, partitions) -> None:
        if partitions and self._held:
            self._on_lost()
            self._held = False
            log.info("ownership handed over")

    def held(self, timeout: float = 0.0) -> bool:
        """Serve the group protocol (callbacks run here) and tell whether this process owns the graph."""
        self._consumer.poll(timeout)
        return self._held

    def close(self) -> None:
        try:
            self._consumer.close()
        except RuntimeError:
            pass


def open_source(url: str, group: str, properties: dict[str, str], limits: Limits, batch_records: int,
                chunk_bytes: int = 8 << 20, finite: bool = False) -> Source:
    """A source for ``file:PATH`` or ``kafka://...``; ``finite``: files are complete (see FileSource)."""
    if url.startswith("file:"):
        return FileSource(Path(url[len("file:"):]), limits, chunk_bytes, finite)
    return KafkaSource(url, group, properties, limits, batch_records)
