"""Service metrics in the Prometheus text exposition format, served over HTTP."""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

log = logging.getLogger("ranktide.metrics")


@dataclass
class Metrics:
    """Counters and gauges of one service process."""

    events_applied: int = 0
    events_rejected: int = 0
    push_edges: int = 0
    feed_sent: int = 0
    snapshots: int = 0
    snapshot_seconds: float = 0.0
    last_snapshot: float = 0.0  # Unix time of the newest snapshot (written or restored); 0: none
    records_since_snapshot: int = 0  # records read that no snapshot covers yet
    bounds: dict[str, float] = field(default_factory=dict)
    rtol_reached: dict[str, float] = field(default_factory=dict)
    lag: dict[str, int] = field(default_factory=dict)
    _rate_window: list[tuple[float, int, int]] = field(default_factory=list)

    def record_batch(self, applied: int, rejected: int) -> None:
        self.events_applied += applied
        self.events_rejected += rejected
        now = time.monotonic()
        self._rate_window.append((now, self.events_applied, self.events_rejected))
        self._rate_window = [w for w in self._rate_window if now - w[0] <= 60.0]

    def record_snapshot(self, seconds: float, created: float) -> None:
        """A snapshot written in ``seconds``, stamped ``created`` (Unix time), covering every record read."""
        # the count first: a scrape between the two never pairs the new time with old records
        self.records_since_snapshot = 0
        self.last_snapshot = created
        self.snapshot_seconds = seconds
        self.snapshots += 1

    def rates(self) -> tuple[float, float]:
        """Events applied and rejected per second over the last minute."""
        if len(self._rate_window) < 2:
            return 0.0, 0.0
        (t0, a0, r0), (t1, a1, r1) = self._rate_window[0], self._rate_window[-1]
        span = max(t1 - t0, 1e-9)
        return (a1 - a0) / span, (r1 - r0) / span

    def render(self) -> str:
        applied_rate, rejected_rate = self.rates()
        lines = [
            "# HELP ranktide_events_applied_total Valid events applied (no-ops included).",
            "# TYPE ranktide_events_applied_total counter",
            f"ranktide_events_applied_total {self.events_applied}",
            "# HELP ranktide_events_rejected_total Malformed records sent to the rejects sink.",
            "# TYPE ranktide_events_rejected_total counter",
            f"ranktide_events_rejected_total {self.events_rejected}",
            "# HELP ranktide_events_applied_per_second Events applied per second, last minute.",
            "# TYPE ranktide_events_applied_per_second gauge",
            f"ranktide_events_applied_per_second {applied_rate:.3f}",
            "# HELP ranktide_events_rejected_per_second Records rejected per second, last minute.",
            "# TYPE ranktide_events_rejected_per_second gauge",
            f"ranktide_events_rejected_per_second {rejected_rate:.3f}",
            "# HELP ranktide_push_edges_total Edges touched by pushes and sweeps.",
            "# TYPE ranktide_push_edges_total counter",
            f"ranktide_push_edges_total {self.push_edges}",
            "# HELP ranktide_score_feed_messages_total Messages sent on the score-change feed.",
            "# TYPE ranktide_score_feed_messages_total counter",
            f"ranktide_score_feed_messages_total {self.feed_sent}",
            "# HELP ranktide_certified_bound Certified bound on the normalised L1 error.",
            "# TYPE ranktide_certified_bound gauge",
        ]
        lines += [f'ranktide_certified_bound{{profile="{p}"}} {b:.6g}' for p, b in sorted(self.bounds.items())]
        lines += [
            "# HELP ranktide_rtol_reached Largest certified relative error of the last snapshot's scores "
            "(per-node contract; the K best nodes of a personalization).",
            "# TYPE ranktide_rtol_reached gauge",
        ]
        lines += [f'ranktide_rtol_reached{{profile="{p}"}} {b:.6g}' for p, b in sorted(self.rtol_reached.items())]
        lines += [
            "# HELP ranktide_consumer_lag Records not yet read, per partition (or bytes, per file).",
            "# TYPE ranktide_consumer_lag gauge",
        ]
        lines += [f'ranktide_consumer_lag{{partition="{k}"}} {v}' for k, v in sorted(self.lag.items())]
        age = time.time() - self.last_snapshot if self.last_snapshot else float("nan")
        stamp = self.last_snapshot if self.last_snapshot else float("nan")
        lines += [
            "# HELP ranktide_snapshot_age_seconds Seconds since the newest snapshot was written (restored ones count).",
            "# TYPE ranktide_snapshot_age_seconds gauge",
            f"ranktide_snapshot_age_seconds {age:.3f}",
            "# HELP ranktide_snapshot_timestamp_seconds Unix time of the newest snapshot (its manifest's created_at).",
            "# TYPE ranktide_snapshot_timestamp_seconds gauge",
            f"ranktide_snapshot_timestamp_seconds {stamp:.3f}",
            "# HELP ranktide_records_since_snapshot Records read that no snapshot covers yet (0 when idle and saved).",
            "# TYPE ranktide_records_since_snapshot gauge",
            f"ranktide_records_since_snapshot {self.records_since_snapshot}",
            "# HELP ranktide_snapshot_duration_seconds Time the last snapshot took.",
            "# TYPE ranktide_snapshot_duration_seconds gauge",
            f"ranktide_snapshot_duration_seconds {self.snapshot_seconds:.3f}",
            "# HELP ranktide_snapshots_total Snapshots written by this process.",
            "# TYPE ranktide_snapshots_total counter",
            f"ranktide_snapshots_total {self.snapshots}",
        ]
        return "\n".join(lines) + "\n"


def start_metrics_server(address: str, metrics: Metrics) -> ThreadingHTTPServer | None:
    """Serve ``GET /metrics`` on ``HOST:PORT`` in a daemon thread (port 0 picks a free one)."""
    host, _, port = address.rpartition(":")

    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 - the http.server name
            if self.path.split("?")[0] not in ("/metrics", "/"):
                self.send_error(404, "only /metrics is served")
                return
            body = metrics.render().encode()
            self.send_response(200)
            self.send_header("Content-Type", "text/plain; version=0.0.4; charset=utf-8")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, fmt: str, *args) -> None:
            log.debug(fmt, *args)

    try:
        server = ThreadingHTTPServer((host or "127.0.0.1", int(port)), Handler)
    except OSError as exc:
        log.warning("metrics endpoint %s not started: %s", address, exc)
        return None
    threading.Thread(target=server.serve_forever, daemon=True, name="metrics").start()
    log.info("metrics on http://%s:%d/metrics", *server.server_address[:2])
    return server
