"""Service configuration: TOML file, then ``RANKTIDE_*`` environment, then command line.

A configuration file looks like::

    source = "kafka://broker1:9092,broker2:9092/edges"
    out = "/var/lib/ranktide"
    group = "ranktide"
    rtol = 1e-3
    snapshot_interval = 60

    [kafka]                      # any librdkafka property, passed through
    "security.protocol" = "SASL_SSL"
    "sasl.mechanism" = "PLAIN"
    "sasl.username" = "ranker"
    "sasl.password" = "..."      # never logged nor written to snapshots

Environment variables override the file: ``RANKTIDE_RTOL=1e-4``,
``RANKTIDE_SNAPSHOT_INTERVAL=30``; ``RANKTIDE_KAFKA_SASL_PASSWORD=...`` sets
the librdkafka property ``sasl.password`` (underscores become dots).
Command-line options override both.
"""

from __future__ import annotations

import ipaddress
import os
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path

#: Substrings of property names whose values are secrets.
SECRET_MARKERS = ("password", "secret", "key", "token", "credential", "jaas")


class ConfigError(ValueError):
    """A configuration value is missing or wrong; the message names it."""


@dataclass
class ServiceConfig:
    """Every setting of ``ranktide run``.

    Attributes
    ----------
    source : str
        ``kafka://HOST:PORT[,HOST:PORT...]/TOPIC[,TOPIC...]`` or ``file:PATH``.
    out : str
        Snapshot root folder.
    group : str
        Kafka consumer group.
    owner_topic : str
        One-partition topic whose holder owns the graph among the group's
        processes (default ``GROUP.owner``, created when missing; option
        ``--owner-topic``, variable ``RANKTIDE_OWNER_TOPIC``). Its consumer
        group is always ``GROUP.owner``.
    rtol : float
        The per-node contract: every published score within relative ``rtol``
        of the exact one (default 1e-3; 0 turns it off, then ``tolerance`` must be set).
    tolerance : float
        Optional second target: the certified normalised L1 error of every
        profile (default 0: off).
    certified_top : int
        ``K``: a personalization certifies its K best nodes to ``rtol`` relative,
        the rest to ``rtol`` times the K-th score (default 100).
    damping : float
        Probability of following an edge (default 0.85).
    snapshot_interval : float
        Seconds between snapshots (offsets are committed with each one).
    snapshot_events : int
        Also snapshot after this many events (0: by time only).
    keep_snapshots : int
        How many snapshots to keep; older ones are pruned.
    micro_batch : int
        Most events handed to the engine in one call.
    settle_interval : float
        While a backlog is being read, settle at most this often (seconds);
        the engine settles as soon as the source is caught up, and always
        before a snapshot or a score-feed round.
    poll_records : int
        Largest number of messages taken from the source in one poll.
    file_chunk_bytes : int
        Largest number of bytes taken from a file source in one poll.
    rejects : str
        Where rejects go: ``file:PATH`` (default ``OUT/rejects.jsonl``) or
        ``kafka:TOPIC``.
    max_id_length, max_message_bytes : int
        Input caps.
    score_topic : str
        Kafka topic for the score-change feed; empty disables it.
    score_threshold : float
        Relative change that makes a node's score due on the feed.
    score_interval : float
        Seconds between two feed rounds.
    metrics : str
        ``HOST:PORT`` of the HTTP listener: the Prometheus text endpoint and
        the read API; empty disables both.
    api_token : str
        Bearer token the read API's ``/v1/`` paths require; empty: none.
    api_allow_no_token : bool
        Allow a non-loopback ``metrics`` address without a token (refused
        otherwise).
    api_max_k, api_max_nodes, api_max_request_bytes : int
        Largest ``k`` of ``/v1/top``, most nodes in one ``/v1/scores``, longest
        request target (bytes).
    api_view_interval : float
        Least seconds between two states published to the read API (each
        costs a certificate: a pass over the nodes of every profile).
    ready_max_lag : int
        ``/readyz`` fails while the source lag (records for Kafka, bytes for
        files) is above this.
    health_stall_seconds : float
        ``/healthz`` fails when the service loop has not turned for this long.
    log_format : str
        ``text`` or ``json``.
    stop_at_end : bool
        Stop (with a final snapshot) once the source has nothing more.
    recompute_interval : float
        Seconds between periodic full recomputes of the newest snapshot's
        graph, each audited against the service's own scores (0: off).
    recompute_engine : str
        ``local`` (SciPy, in memory) or ``spark`` (``ranktide[spark]``).
    recompute_master : str
        Spark master URL for ``recompute_engine = "spark"`` (default ``local[*]``).
    connect_timeout : float
        Seconds to wait for the Kafka brokers at start before giving up
        with an error (exit code 2).
    personalizations : dict
        Profile name -> seeds file, applied when starting from no snapshot.
    kafka : dict
        librdkafka properties passed through to every client.
    """

    source: str = ""
    out: str = "ranktide-out"
    group: str = "ranktide"
    owner_topic: str = ""
    rtol: float = 1e-3
    tolerance: float = 0.0
    certified_top: int = 100
    damping: float = 0.85
    snapshot_interval: float = 60.0
    snapshot_events: int = 0
    keep_snapshots: int = 5
    micro_batch: int = 50_000
    settle_interval: float = 1.0
    poll_records: int = 100_000
    file_chunk_bytes: int = 8 << 20
    rejects: str = ""
    max_id_length: int = 1024
    max_message_bytes: int = 1 << 20
    score_topic: str = ""
    score_threshold: float = 0.01
    score_interval: float = 5.0
    metrics: str = "127.0.0.1:9464"
    api_token: str = ""
    api_allow_no_token: bool = False
    api_max_k: int = 1000
    api_max_nodes: int = 1000
    api_max_request_bytes: int = 8192
    api_view_interval: float = 0.5
    ready_max_lag: int = 10_000
    health_stall_seconds: float = 300.0
    log_format: str = "text"
    stop_at_end: bool = False
    recompute_interval: float = 0.0
    recompute_engine: str = "local"
    recompute_master: str = ""
    connect_timeout: float = 30.0
    personalizations: dict[str, str] = field(default_factory=dict)
    kafka: dict[str, str] = field(default_factory=dict)

    def validate(self) -> "ServiceConfig":
        if not self.source:
            raise ConfigError("source is required (kafka://HOST:PORT/TOPIC or file:PATH)")
        if not (self.source.startswith("kafka://") or self.source.startswith("file:")):
            raise ConfigError(f"source {self.source!r}: expected kafka://HOST:PORT/TOPIC or file:PATH")
        if not 0 < self.damping < 1:
            raise ConfigError(f"damping must lie strictly between 0 and 1, got {self.damping}")
        if not 0 <= self.rtol < 1:
            raise ConfigError(f"rtol must lie in [0, 1) (0: off), got {self.rtol}")
        if not self.tolerance >= 0:
            raise ConfigError(f"tolerance must be >= 0 (0: off), got {self.tolerance}")
        if self.rtol == 0 and self.tolerance == 0:
            raise ConfigError("rtol and tolerance are both off: set at least one")
        if self.certified_top < 1:
            raise ConfigError(f"certified_top must be at least 1, got {self.certified_top}")
        if not self.snapshot_interval > 0:
            raise ConfigError(f"snapshot_interval must be > 0 seconds, got {self.snapshot_interval}")
        if self.keep_snapshots < 1:
            raise ConfigError(f"keep_snapshots must be at least 1, got {self.keep_snapshots}")
        if not self.recompute_interval >= 0:
            raise ConfigError(f"recompute_interval must be >= 0 seconds (0: off), got {self.recompute_interval}")
        if self.recompute_engine not in ("local", "spark"):
            raise ConfigError(f"recompute_engine must be local or spark, got {self.recompute_engine!r}")
        if self.log_format not in ("text", "json"):
            raise ConfigError(f"log_format must be text or json, got {self.log_format!r}")
        for name in ("micro_batch", "poll_records", "file_chunk_bytes", "max_id_length", "max_message_bytes"):
            if getattr(self, name) < 1:
                raise ConfigError(f"{name} must be at least 1, got {getattr(self, name)}")
        for name in ("snapshot_events", "settle_interval", "score_threshold"):
            if not getattr(self, name) >= 0:
                raise ConfigError(f"{name} must be >= 0, got {getattr(self, name)}")
        if not (self.connect_timeout > 0 and self.connect_timeout < float("inf")):
            raise ConfigError(f"connect_timeout must be a finite number of seconds > 0, got {self.connect_timeout}")
        if not self.score_interval > 0:
            raise ConfigError(f"score_interval must be > 0 seconds, got {self.score_interval}")
        if self.metrics:
            try:
                parse_address(self.metrics)
            except ValueError as exc:
                raise ConfigError(f"metrics: {exc}") from None
        self._validate_api()
        return self

    def _validate_api(self) -> None:
        for name in ("api_max_k", "api_max_nodes", "api_max_request_bytes"):
            if getattr(self, name) < 1:
                raise ConfigError(f"{name} must be at least 1, got {getattr(self, name)}")
        if not self.api_view_interval >= 0:
            raise ConfigError(f"api_view_interval must be >= 0 seconds, got {self.api_view_interval}")
        if self.ready_max_lag < 0:
            raise ConfigError(f"ready_max_lag must be >= 0, got {self.ready_max_lag}")
        if not self.health_stall_seconds > 0:
            raise ConfigError(f"health_stall_seconds must be > 0, got {self.health_stall_seconds}")
        if not self.metrics:
            return
        host, _ = parse_address(self.metrics)  # checked above
        if not is_loopback(host) and not self.api_token and not self.api_allow_no_token:
            raise ConfigError(f"metrics {self.metrics!r}: the read API would answer on a non-loopback address "
                              f"without a token; set api_token (RANKTIDE_API_TOKEN) or api_allow_no_token = true")

    def targets(self) -> dict:
        """The engine's settle targets (``None`` where a setting is 0: off)."""
        return {"rtol": self.rtol or None, "tolerance": self.tolerance or None,
                "certified_top": self.certified_top}

    def redacted(self) -> dict:
        """The settings with secret values replaced, for logs."""
        out = {f.name: getattr(self, f.name) for f in fields(self)}
        out["kafka"] = redact(self.kafka)
        if self.api_token:
            out["api_token"] = "***"
        return out


def is_loopback(host: str) -> bool:
    """True for a loopback address (``127.0.0.0/8``, ``::1``, ``localhost``) or an empty host.

    Other host names count as not loopback: they are not resolved here.
    """
    host = host.strip("[]")
    if host in ("", "localhost"):
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def parse_address(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (or ``:PORT``, meaning 127.0.0.1) -> (host, port); ValueError names the problem."""
    host, sep, port = text.rpartition(":")
    if not sep or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise ValueError(f"expected HOST:PORT with a port from 0 to 65535, got {text!r}")
    return host or "127.0.0.1", int(port)


def redact(props: dict[str, str]) -> dict[str, str]:
    """Copy of ``props`` with the values of secret-looking keys hidden."""
    return {k: ("***" if any(m in k.lower() for m in SECRET_MARKERS) else v) for k, v in props.items()}


_TYPES = {f.name: f.type for f in fields(ServiceConfig)}


def _coerce(name: str, value, where: str):
    kind = _TYPES[name]
    try:
        if kind == "bool":
            if isinstance(value, str):
                if value.lower() not in ("1", "0", "true", "false", "yes", "no"):
                    raise ValueError(value)
                return value.lower() in ("1", "true", "yes")
            return bool(value)
        if kind == "int":
            return int(value)
        if kind == "float":
            return float(value)
        if kind == "str":
            return str(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{where}: {name} = {value!r} is not a valid {kind}") from None
    return value


def load_config(path: Path | None = None, env: dict[str, str] | None = None, overrides: dict | None = None) -> ServiceConfig:
    """Build the configuration from a TOML file, the environment and overrides (in that order)."""
    cfg = ServiceConfig()
    if path is not None:
        _apply_file(cfg, Path(path))
    _apply_env(cfg, os.environ if env is None else env)
    for name, value in (overrides or {}).items():
        if value is not None:
            setattr(cfg, name, _coerce(name, value, "command line") if name in _TYPES and not isinstance(value, dict) else value)
    return cfg.validate()


def _apply_file(cfg: ServiceConfig, path: Path) -> None:
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read configuration: {exc.strerror or exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc
    for key, value in data.items():
        name = key.replace("-", "_")
        if name == "kafka":
            if not isinstance(value, dict):
                raise ConfigError(f"{path}: [kafka] must be a table of librdkafka properties")
            cfg.kafka.update({str(k): str(v) for k, v in value.items()})
        elif name == "personalizations":
            if not isinstance(value, dict):
                raise ConfigError(f"{path}: [personalizations] must map profile names to seeds files")
            cfg.personalizations.update({str(k): str(v) for k, v in value.items()})
        elif name in _TYPES:
            setattr(cfg, name, _coerce(name, value, str(path)))
        else:
            raise ConfigError(f"{path}: unknown setting {key!r}")


def _apply_env(cfg: ServiceConfig, env) -> None:
    for key, value in env.items():
        if not key.startswith("RANKTIDE_"):
            continue
        rest = key[len("RANKTIDE_"):]
        if rest.startswith("KAFKA_"):
            cfg.kafka[rest[len("KAFKA_"):].lower().replace("_", ".")] = value
        elif rest.lower() in _TYPES and rest.lower() not in ("kafka", "personalizations"):
            setattr(cfg, rest.lower(), _coerce(rest.lower(), value, f"environment {key}"))
