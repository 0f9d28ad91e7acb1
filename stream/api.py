"""The read API of the running service: health, readiness, scores, top nodes and status over HTTP.

It is served on the metrics listener (:func:`stream.metrics.start_metrics_server`)
and answers only from a :class:`ReadView`: an immutable copy of what a client
may ask about, published by the service's own thread right after a settle
that ends a fully applied chunk of events (:meth:`stream.service.Service._publish`).
The HTTP threads never read the engine's arrays, so an answer never reflects
a half-applied batch, and a request never waits for the engine nor makes it
wait. A view holds the certificates of :meth:`solver.engine.Engine.settle_certified`
(published scores and a certified bound per node); the sorted arrays behind
rank ranges and top lists are built by the HTTP threads, once per view and
profile, on first use.

Bounds and ranks. Each node's score comes with a certified absolute bound
(the per-node contract, :mod:`solver.bounds`); with the intervals ``[lo, hi] =
[score - bound, score + bound]`` a node's possible ranks run from ``1 + #{w : lo(w) > hi(v)}`` to
``1 + #{w != v : hi(w) >= lo(v)}`` (Wills & Ipsen, "Ordinal ranking for
Google's PageRank", SIAM J. Matrix Anal. Appl. 30(4), 2009; design notes,
section 4b), counted with binary searches in the sorted ``lo`` and ``hi``.
"""

from __future__ import annotations

import copy
import hmac
import json
import logging
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Callable
from urllib.parse import parse_qs, urlsplit

import numpy as np

from ranktide.solver import GLOBAL, Ranker
from ranktide.solver.bounds import Certificate, ranks_between
from ranktide.solver.ids import FrozenIds
from ranktide.stream.snapshots import contract_facts

JSON = "application/json"
#: /v1/top answers kept per view and profile (distinct k values).
TOP_ANSWERS_KEPT = 32
log = logging.getLogger("ranktide.api")


# ------------------------------------------------------------------ bounds and ranks


class ProfileView:
    """One profile's published scores and per-node bounds (a certificate), with lazily built sorted arrays.

    The arrays are the certificate's own, which nothing writes after it is made.
    """

    def __init__(self, cert: Certificate, is_global: bool) -> None:
        self.cert = cert
        self.is_global = is_global
        self.scores = cert.scores
        self.bounds = cert.bounds
        self.l1_bound = float(cert.l1_bound)
        self._lock = threading.Lock()
        self._sorted: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None
        self.answers: dict[int, Response] = {}  # /v1/top answers by k: the same for the view's life

    def sorted_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(lo sorted, hi sorted, hi order descending, score order descending), built once."""
        with self._lock:
            if self._sorted is None:
                lo = self.scores - self.bounds
                hi = self.scores + self.bounds
                hi_desc = np.argsort(-hi, kind="stable")
                order = np.argsort(-self.scores, kind="stable")  # ties in id order
                self._sorted = (np.sort(lo), hi[hi_desc][::-1].copy(), hi_desc, order)
            return self._sorted

    def ranks(self, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        lo_sorted, hi_sorted, _, _ = self.sorted_arrays()
        s, b = self.scores[idx], self.bounds[idx]
        return ranks_between(lo_sorted, hi_sorted, s - b, s + b)

    def top(self, k: int) -> tuple[np.ndarray, bool]:
        """Ids of the ``k`` best nodes, and whether that set is certified.

        The set is certified when its smallest ``lo`` exceeds the largest
        ``hi`` outside it (design notes, section 4b).
        """
        _, _, hi_desc, order = self.sorted_arrays()
        best = order[:k]
        if best.size == self.scores.size:
            return best, True
        head = hi_desc[: k + 1]
        outside = head[~np.isin(head, best)][0]
        lowest = float(np.min(self.scores[best] - self.bounds[best])) if best.size else float("inf")
        return best, bool(lowest > self.scores[outside] + self.bounds[outside])


@dataclass(frozen=True)
class ReadView:
    """What the API answers from: one settled state of the service, never changed once published."""

    seq: int
    settled_at: str
    positions: dict
    counters: dict
    nodes: int
    edges: int
    damping: float
    tolerance: float
    profiles: dict[str, ProfileView]
    ids: FrozenIds
    rtol: float | None
    certified_top: int
    within_contract: bool


def build_view(seq: int, ranker: Ranker, counters: dict, positions: dict,
               certificates: dict[str, Certificate]) -> ReadView:
    """What the API needs of a settled ranker and its certificates (service thread, between batches)."""
    eng = ranker.engine
    profiles = {name: ProfileView(certificates[name], k == 0) for k, name in enumerate(eng.profiles)}
    met = all((eng.rtol is None or c.meets(eng.rtol)) and (eng.tolerance is None or c.l1_bound <= eng.tolerance)
              for c in certificates.values())
    return ReadView(seq, _now(), copy.deepcopy(positions), dict(counters), eng.n_nodes, eng.n_edges,
                    eng.damping, eng.tolerance, profiles, ranker.ids.frozen(), eng.rtol, eng.certified_top, met)


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


# ------------------------------------------------------------------ service state


@dataclass
class ApiSettings:
    """Limits and access of the read API (``ServiceConfig.api_*`` settings)."""

    token: str = ""
    max_k: int = 1000
    max_nodes: int = 1000
    max_request_bytes: int = 8192
    ready_max_lag: int = 10_000
    stall_seconds: float = 300.0
    max_concurrent: int = 16


@dataclass
class LiveState:
    """What the service's thread tells the HTTP threads (plain references, replaced whole)."""

    phase: str = "starting"  # starting, waiting for ownership, restoring, running, stopping
    view: ReadView | None = None
    loop_turns: int = 0
    last_turn: float = field(default_factory=time.monotonic)
    lag: dict = field(default_factory=dict)
    behind: int = 0  # source units taken but not yet in the view (see positions_distance)
    last_snapshot: dict | None = None

    def turned(self, lag: dict, behind: int = 0) -> None:
        self.loop_turns += 1
        self.last_turn = time.monotonic()
        self.lag = lag
        self.behind = behind


def positions_distance(now: dict, then: dict) -> int:
    """How far source positions ``now`` are past ``then``: bytes of files plus Kafka records."""
    total = 0
    old_files = then.get("files", {})
    for path, pos in now.get("files", {}).items():
        total += pos.get("offset", 0) - old_files.get(path, {}).get("offset", 0)
    old_kafka = then.get("kafka", {})
    for topic, parts in now.get("kafka", {}).items():
        for part, offset in parts.items():
            total += offset - old_kafka.get(topic, {}).get(part, offset)
    return max(total, 0)


# ------------------------------------------------------------------ requests


@dataclass
class Response:
    status: int
    body: bytes
    content_type: str = JSON
    headers: dict = field(default_factory=dict)


class ApiError(Exception):
    """A request answered with an error status and a JSON body."""

    def __init__(self, status: int, message: str, **extra) -> None:
        super().__init__(message)
        self.status = status
        self.extra = extra


def _json(status: int, payload: dict, headers: dict | None = None) -> Response:
    return Response(status, (json.dumps(payload, separators=(",", ":")) + "\n").encode(), JSON, headers or {})


class ReadApi:
    """Routes ``GET`` requests to answers from the live state.

    Parameters
    ----------
    state : LiveState
        Updated by the service's thread.
    settings : ApiSettings
        Limits and token.
    """

    def __init__(self, state: LiveState, settings: ApiSettings) -> None:
        self.state = state
        self.settings = settings
        self._slots = threading.BoundedSemaphore(settings.max_concurrent)
        self._routes: dict[str, tuple[bool, Callable[[dict], Response]]] = {
            "/healthz": (False, self._healthz),
            "/readyz": (False, self._readyz),
            "/v1/scores": (True, self._scores),
            "/v1/top": (True, self._top),
            "/v1/status": (True, self._status),
        }

    def paths(self) -> list[str]:
        return list(self._routes)

    def handle(self, target: str, headers) -> Response:
        """Answer ``GET target``; never raises."""
        if not self._slots.acquire(blocking=False):
            return _json(503, {"error": "too many requests at once", "status": 503}, {"Retry-After": "1"})
        try:
            return self._dispatch(target, headers)
        except ApiError as exc:
            extra = {401: {"WWW-Authenticate": 'Bearer realm="ranktide"'}, 503: {"Retry-After": "1"}}.get(exc.status, {})
            return _json(exc.status, {"error": str(exc), "status": exc.status, **exc.extra}, extra)
        except Exception as exc:  # noqa: BLE001 - a bug here must not take the listener down
            log.error("read API: %s on %s: %s", type(exc).__name__, target[:200], exc)
            return _json(500, {"error": "internal error", "status": 500})
        finally:
            self._slots.release()

    def _dispatch(self, target: str, headers) -> Response:
        if len(target) > self.settings.max_request_bytes:
            raise ApiError(414, f"request target longer than {self.settings.max_request_bytes} bytes")
        parts = urlsplit(target)
        route = self._routes.get(parts.path)
        if route is None:
            raise ApiError(404, f"no such path {parts.path[:200]!r}", paths=self.paths() + ["/metrics"])
        needs_token, fn = route
        if needs_token and self.settings.token:
            given = headers.get("Authorization", "") or ""
            scheme, _, value = given.partition(" ")
            if scheme.lower() != "bearer" or not hmac.compare_digest(value.strip().encode(),
                                                                    self.settings.token.encode()):
                raise ApiError(401, "missing or wrong bearer token")
        try:
            query = parse_qs(parts.query, keep_blank_values=True, strict_parsing=False,
                             max_num_fields=self.settings.max_nodes + 8)
        except ValueError:
            raise ApiError(400, f"more than {self.settings.max_nodes} nodes in one request") from None
        return fn(query)

    # -------------------------------------------------------------- probes
    def _healthz(self, query: dict) -> Response:
        _only(query, set())
        st = self.state
        idle = time.monotonic() - st.last_turn
        body = {"status": "ok", "phase": st.phase, "loop_turns": st.loop_turns,
                "seconds_since_loop_turn": round(idle, 3)}
        if idle > self.settings.stall_seconds:
            body["status"] = "stalled"
            return _json(503, body)
        return _json(200, body)

    def readiness(self) -> tuple[bool, list[str], dict]:
        """(ready, reasons it is not, facts)."""
        st = self.state
        view = st.view
        lag = st.lag
        total = int(sum(lag.values())) + st.behind  # the view's lag: what is read but not shown counts
        reasons = []
        if st.phase != "running" or view is None:
            reasons.append(f"not serving yet ({st.phase})")
        if not lag:
            reasons.append("source lag not known yet")
        elif total > self.settings.ready_max_lag:
            reasons.append(f"lag {total} above {self.settings.ready_max_lag}")
        if view is not None and not view.within_contract:
            reasons.append("last published state outside the contract (rtol, tolerance)")
        facts = {"phase": st.phase, "lag": total, "max_lag": self.settings.ready_max_lag,
                 "settled_at": view.settled_at if view else None,
                 "within_tolerance": view.within_contract if view else None}
        return not reasons, reasons, facts

    def _readyz(self, query: dict) -> Response:
        _only(query, set())
        ready, reasons, facts = self.readiness()
        return _json(200 if ready else 503, {"ready": ready, **({"reasons": reasons} if reasons else {}), **facts})

    # -------------------------------------------------------------- reads
    def _view(self) -> ReadView:
        view = self.state.view
        if view is None:
            raise ApiError(503, f"no settled state to answer from yet ({self.state.phase})")
        return view

    def _profile(self, view: ReadView, query: dict) -> tuple[str, ProfileView]:
        name = _single(query, "profile", GLOBAL)
        prof = view.profiles.get(name)
        if prof is None:
            raise ApiError(404, f"unknown profile {name[:200]!r}", profiles=sorted(view.profiles))
        return name, prof

    def _answer_head(self, view: ReadView, profile: str) -> dict:
        return {"profile": profile, "positions": view.positions, "settled_at": view.settled_at,
                "events_applied": view.counters.get("events_applied"), "nodes": view.nodes,
                "certified_l1_bound": _finite(view.profiles[profile].l1_bound)}

    def _scores(self, query: dict) -> Response:
        _only(query, {"node", "profile"})
        names = query.get("node", [])
        if not names:
            raise ApiError(400, "name at least one node: /v1/scores?node=A&node=B")
        if len(names) > self.settings.max_nodes:
            raise ApiError(400, f"more than {self.settings.max_nodes} nodes in one request")
        if not all(names):
            raise ApiError(400, "node is empty")
        view = self._view()
        profile, prof = self._profile(view, query)
        ids = [view.ids.lookup(n) for n in names]
        unknown = [n for n, i in zip(names, ids) if i is None]
        if unknown:
            raise ApiError(404, f"unknown node{'s' if len(unknown) > 1 else ''}", unknown=unknown[:100])
        idx = np.asarray(ids, dtype=np.int64)
        best, worst = prof.ranks(idx)
        rows = [{"node": n, "score": float(prof.scores[i]), "bound": _finite(prof.bounds[i]),
                 "rank": {"best": int(b), "worst": int(w)}}
                for n, i, b, w in zip(names, idx.tolist(), best.tolist(), worst.tolist())]
        return _json(200, {**self._answer_head(view, profile), "scores": rows})

    def _top(self, query: dict) -> Response:
        _only(query, {"k", "profile"})
        text = _single(query, "k", "20")
        try:
            k = int(text)
        except ValueError:
            raise ApiError(400, f"k must be an integer, got {text[:40]!r}") from None
        if not 1 <= k <= self.settings.max_k:
            raise ApiError(400, f"k must lie between 1 and {self.settings.max_k}, got {k}")
        view = self._view()
        profile, prof = self._profile(view, query)
        cached = prof.answers.get(k)
        if cached is not None:
            return cached
        best_ids, certified = prof.top(k)
        best, worst = prof.ranks(best_ids)
        rows = [{"node": view.ids.name(i), "score": float(prof.scores[i]), "bound": _finite(prof.bounds[i]),
                 "rank": {"best": int(b), "worst": int(w)}}
                for i, b, w in zip(best_ids.tolist(), best.tolist(), worst.tolist())]
        answer = _json(200, {**self._answer_head(view, profile), "k": k, "certified_set": certified, "top": rows})
        if len(prof.answers) < TOP_ANSWERS_KEPT:
            prof.answers[k] = answer
        return answer

    def _status(self, query: dict) -> Response:
        _only(query, set())
        view = self._view()
        ready, reasons, facts = self.readiness()
        body = {"settled_at": view.settled_at, "nodes": view.nodes, "edges": view.edges,
                "damping": view.damping, "rtol": view.rtol, "tolerance": view.tolerance,
                "certified_top": view.certified_top, **view.counters,
                "certified_bound": {name: _finite(p.l1_bound) for name, p in view.profiles.items()},
                "profiles": {name: contract_facts(p.cert, p.is_global) for name, p in view.profiles.items()},
                "positions": view.positions, "lag": self.state.lag, "ready": ready,
                "last_snapshot": self.state.last_snapshot, "loop_turns": self.state.loop_turns}
        if reasons:
            body["not_ready"] = reasons
        return _json(200, body)


def _finite(x: float) -> float | None:
    """JSON has no infinity: an uncertified figure is null."""
    return float(x) if np.isfinite(x) else None


def _only(query: dict, allowed: set[str]) -> None:
    extra = sorted(set(query) - allowed)
    if extra:
        raise ApiError(400, f"unknown parameter {extra[0][:40]!r}" + (f" (allowed: {', '.join(sorted(allowed))})"
                                                                        if allowed else " (none taken)"))


def _single(query: dict, name: str, default: str) -> str:
    values = query.get(name, [default])
    if len(values) != 1:
        raise ApiError(400, f"give {name} once")
    if not values[0]:
        raise ApiError(400, f"{name} is empty")
    return values[0]
