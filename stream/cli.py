"""The ``ranktide`` command line."""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import sys
from pathlib import Path

DESCRIPTION = """\
ranktide keeps PageRank scores of a changing graph fresh while edge events
stream in, publishes them with a certified error bound, and writes Parquet
snapshots. Events are JSON objects such as
  {"op": "insert", "src": "a", "dst": "b", "weight": 2.5}
  {"op": "delete", "src": "a", "dst": "b"}
  {"op": "seed", "profile": "trusted", "node": "a", "weight": 1.0}
"""


LOG_LEVELS = ("DEBUG", "INFO", "WARNING", "ERROR")
LOG_LEVEL_HELP = "logging level: DEBUG, INFO, WARNING or ERROR (default INFO)"


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line on stderr (exit 2), with a pointer to --help."""

    def error(self, message: str):  # noqa: D102 - argparse's hook
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


class _Version(argparse.Action):
    """``--version``: the installed version, looked up only when asked."""

    def __init__(self, option_strings, dest, **kwargs) -> None:
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None) -> None:
        from importlib.metadata import PackageNotFoundError, version

        try:
            text = version("ranktide")
        except PackageNotFoundError:
            text = "unknown (not installed)"
        print(f"ranktide {text}")
        parser.exit(0)


def _log_level(text: str) -> str:
    if text.upper() not in LOG_LEVELS:
        raise argparse.ArgumentTypeError(f"expected one of {', '.join(LOG_LEVELS)}, got {text!r}")
    return text.upper()


def _count(text: str) -> int:
    if not text.strip().lstrip("+").isdigit():
        raise argparse.ArgumentTypeError(f"must be a whole number >= 0, got {text!r}")
    return int(text)


def _address(text: str) -> str:
    from ranktide.stream.config import parse_address

    if text:
        try:
            parse_address(text)
        except ValueError as exc:
            raise argparse.ArgumentTypeError(f"{exc}; '' disables the endpoint") from None
    return text


def _until(text: str) -> int | float:
    """A line/row number (digits) or an ISO-8601 time (returned in ms since the epoch)."""
    if text.isdigit():
        return int(text)
    from ranktide.stream.events import ts_millis

    millis, reason = ts_millis(text)
    if reason:
        raise argparse.ArgumentTypeError(f"expected a line number or ISO-8601 time, got {text!r}")
    return float(millis)


def _pace(text: str) -> float:
    if text == "original":
        return 1.0
    value = _positive_float(text)
    return value


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (value > 0 and math.isfinite(value)):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0, got {text!r}")
    return value


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not (value >= 0 and math.isfinite(value)):
        raise argparse.ArgumentTypeError(f"must be a finite number >= 0, got {text}")
    return value


def _rtol(text: str) -> float:
    value = _non_negative_float(text)
    if value >= 1:
        raise argparse.ArgumentTypeError(f"must lie in [0, 1) (0: off), got {text}")
    return value


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {text}")
    return value


def _damping(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not 0 < value < 1:
        raise argparse.ArgumentTypeError(f"must lie strictly between 0 and 1, got {text!r}")
    return value


def _personalization(text: str) -> tuple[str, Path]:
    name, sep, path = text.partition("=")
    if not sep or not name or not path:
        raise argparse.ArgumentTypeError(f"expected NAME=SEEDS_FILE, got {text!r}")
    if name == "global":
        raise argparse.ArgumentTypeError("'global' is the uniform profile; name the personalization otherwise")
    return name, Path(path)


def add_engine_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rtol", type=_rtol, default=None,
                   help="per-node contract: every published score within this relative error of the exact "
                        "PageRank (default 0.001, i.e. 0.1 %%; 0 turns it off when --tolerance is set)")
    p.add_argument("--tolerance", type=_non_negative_float, default=None,
                   help="optional second target: certified bound on the normalised L1 error of every "
                        "profile's whole vector (default: off)")
    p.add_argument("--certified-top", type=_positive_int, default=None, metavar="K",
                   help="a personalization certifies its K best nodes to --rtol and the rest to --rtol "
                        "times the K-th score (default 100)")
    p.add_argument("--damping", type=_damping, default=None,
                   help="probability of following an edge rather than teleporting (default 0.85)")


def _targets(args: argparse.Namespace) -> dict | None:
    """``rtol``, ``tolerance`` and ``certified_top`` of replay (None and a message when both are off)."""
    rtol = 1e-3 if args.rtol is None else (args.rtol or None)
    tolerance = args.tolerance or None
    if rtol is None and tolerance is None:
        print("ranktide replay: error: --rtol 0 needs --tolerance: settling needs a target", file=sys.stderr)
        return None
    return {"rtol": rtol, "tolerance": tolerance, "certified_top": args.certified_top or 100}


def _cmd_replay(args: argparse.Namespace) -> int:
    from ranktide.stream.logs import LogError
    from ranktide.replay.replay import ReplayOptions, replay_log
    from ranktide.stream.snapshots import OutputError, SnapshotError, check_writable

    given = [args.damping, args.rtol, args.tolerance, args.certified_top]
    if args.from_snapshot is not None and any(x is not None for x in given):
        print("ranktide replay: error: --from keeps the snapshot's damping and targets; "
              "drop --damping/--rtol/--tolerance/--certified-top", file=sys.stderr)
        return 2
    targets = _targets(args)
    if targets is None:
        return 2
    try:
        start = None if args.from_snapshot is None else _resolve_from(args.from_snapshot)
    except SnapshotError as exc:
        print(f"ranktide replay: error: {exc}", file=sys.stderr)
        return 2
    options = ReplayOptions(
        damping=0.85 if args.damping is None else args.damping,
        **targets,
        personalizations=dict(args.personalization or []),
        micro_batch=args.micro_batch,
        progress=not args.quiet and sys.stderr.isatty(),
        from_snapshot=start,
        until=args.until,
        pace=args.pace,
        snapshot_every=args.snapshot_every,
    )
    try:
        check_writable(args.out, "snapshot root")  # before reading the log
        summary = replay_log(args.log, args.out, options)
    except OutputError as exc:
        print(f"ranktide replay: error: {exc}", file=sys.stderr)
        return 3
    except (LogError, SnapshotError) as exc:
        print(f"ranktide replay: error: {exc}", file=sys.stderr)
        return 2
    if not args.quiet:
        print("\n".join(summary.lines()))
        if len(summary.snapshots) > 1:
            print(f"series         {len(summary.snapshots)} snapshots under {args.out}")
    return 0


def _resolve_from(path: Path) -> Path:
    """``replay --from``: a snapshot folder, or the newest valid snapshot of a root (skips named on stderr)."""
    from ranktide.stream.snapshots import select_snapshot

    def say(name: str, reason: str) -> None:
        print(f"ranktide replay: skipping {name}: {reason}", file=sys.stderr)

    return select_snapshot(path, on_skip=say).path


class _JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry = {"time": self.formatTime(record), "level": record.levelname, "logger": record.name,
                 "message": record.getMessage()}
        if record.exc_info:
            entry["error"] = self.formatException(record.exc_info)
        return json.dumps(entry)


def _cmd_run(args: argparse.Namespace) -> int:
    from ranktide.stream.logs import LogError
    from ranktide.stream.config import ConfigError, load_config
    from ranktide.stream.service import Service
    from ranktide.stream.sources import SourceError
    from ranktide.stream.snapshots import OutputError, SnapshotError

    overrides = {
        "source": args.source, "out": args.out, "group": args.group, "owner_topic": args.owner_topic,
        "tolerance": args.tolerance, "rtol": args.rtol, "certified_top": args.certified_top,
        "damping": args.damping, "snapshot_interval": args.snapshot_interval,
        "keep_snapshots": args.keep_snapshots, "micro_batch": args.micro_batch,
        "rejects": f"kafka:{args.rejects_topic}" if args.rejects_topic else _rejects_target(args.rejects),
        "score_topic": args.score_topic, "metrics": args.metrics,
        "log_format": "json" if args.log_json else None, "stop_at_end": True if args.stop_at_end else None,
        "max_id_length": args.max_id_length, "max_message_bytes": args.max_message_bytes,
        "recompute_interval": args.recompute_interval, "recompute_engine": args.recompute_engine,
        "api_token": args.api_token, "api_allow_no_token": True if args.api_allow_no_token else None,
        "ready_max_lag": args.ready_max_lag,
        "connect_timeout": args.connect_timeout,
    }
    if args.personalization:
        overrides["personalizations"] = {k: str(v) for k, v in args.personalization}
    try:
        if not (args.source or args.config or "RANKTIDE_SOURCE" in os.environ):
            overrides.update(_embedded_default(args))
        cfg = load_config(args.config, overrides=overrides)
    except ConfigError as exc:
        print(f"ranktide run: error: {exc}", file=sys.stderr)
        return 2
    if cfg.log_format == "json":
        for handler in logging.getLogger().handlers:
            handler.setFormatter(_JsonFormatter())
    service = Service(cfg)
    service.install_signal_handlers()
    try:
        code = service.run()
    except OutputError as exc:
        print(f"ranktide run: error: {exc}", file=sys.stderr)
        return 3
    except (LogError, SnapshotError, SourceError) as exc:
        print(f"ranktide run: error: {exc}", file=sys.stderr)
        return 2
    if code == 0 and not args.quiet:
        from ranktide.replay.reading import describe_newest

        describe_newest(Path(cfg.out), command="run")
    return code


def _rejects_target(text: str | None) -> str | None:
    """``--rejects``: PATH, file:PATH or kafka:TOPIC, as the configuration key takes it."""
    if not text:
        return None
    return text if text.startswith(("file:", "kafka:")) else f"file:{text}"


def _embedded_default(args: argparse.Namespace) -> dict:
    """No source named: run the built-in scenario from a file source, to its end."""
    from ranktide.replay.scenario import write_scenario

    out = Path(args.out or "ranktide-out")
    log_path = out / "scenario" / "events.jsonl"
    if not log_path.exists():
        write_scenario(log_path.parent)
    print(f"ranktide run: no --source given: running the built-in scenario from file:{log_path}", file=sys.stderr)
    return {"source": f"file:{log_path}", "out": str(out), "stop_at_end": True}


def _cmd_status(args: argparse.Namespace) -> int:
    from ranktide.replay.reading import describe_newest

    return describe_newest(args.root, as_json=args.json, name=args.snapshot)


def _cmd_snapshots(args: argparse.Namespace) -> int:
    from ranktide.replay.reading import list_snapshots

    return list_snapshots(args.root, as_json=args.json)


def _cmd_top(args: argparse.Namespace) -> int:
    from ranktide.replay.reading import print_top

    return print_top(args.root, args.k, args.profile, as_json=args.json, name=args.snapshot)


def _cmd_score(args: argparse.Namespace) -> int:
    from ranktide.replay.reading import print_scores

    return print_scores(args.root, args.nodes, args.profile, as_json=args.json, name=args.snapshot)


def _at_least_one(text: str) -> int:
    """A count of at least 1 (argparse type)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {text}")
    return value


_ROOT_HELP = "snapshot root folder, or one snapshot folder itself"
_SNAPSHOT_HELP = "read this snapshot of ROOT (e.g. snap-00000003) instead of the newest valid one"
_JSON_HELP = "print one JSON object (see README, 'Reading commands and --json')"


def _add_reading_parsers(sub) -> None:
    """status, snapshots, top and score: the commands that read a snapshot root."""
    epilog = ("Only a snapshot whose files pass their sha256 checksums is read: by default the newest "
              "valid one, naming on stderr each newer one skipped and why. Exit 2 when none is valid.")
    p = sub.add_parser("status", help="describe the newest valid snapshot in words", epilog=epilog,
                       description="Describe a snapshot: sequence, time, graph size, events, certified bounds "
                                   "and source positions.")
    p.add_argument("root", type=Path, metavar="ROOT", help=_ROOT_HELP)
    p.add_argument("--snapshot", metavar="NAME", help=_SNAPSHOT_HELP)
    p.add_argument("--json", action="store_true", help=_JSON_HELP + "; the manifest is under 'manifest'")
    p.set_defaults(func=_cmd_status)

    p = sub.add_parser("snapshots", help="list every snapshot with its sequence, time, events, bounds and validity",
                       description="List every snapshot under ROOT, oldest first, checking each file against "
                                   "its sha256. Exit 0 when the list is printed (invalid snapshots included), "
                                   "2 when ROOT holds no snapshot.")
    p.add_argument("root", type=Path, metavar="ROOT", help=_ROOT_HELP)
    p.add_argument("--json", action="store_true", help=_JSON_HELP + "; rows under 'snapshots'")
    p.set_defaults(func=_cmd_snapshots)

    p = sub.add_parser("top", help="the best-scored nodes of the newest valid snapshot", epilog=epilog,
                       description="Print the k best-scored nodes of a profile: rank, node, score "
                                   "(ties in name order).")
    p.add_argument("root", type=Path, metavar="ROOT", help=_ROOT_HELP)
    p.add_argument("-k", type=_at_least_one, default=20, help="how many nodes, at least 1 (default 20)")
    p.add_argument("--profile", default="global", help="profile name (default global)")
    p.add_argument("--snapshot", metavar="NAME", help=_SNAPSHOT_HELP)
    p.add_argument("--json", action="store_true", help=_JSON_HELP + "; rows under 'nodes'")
    p.set_defaults(func=_cmd_top)

    p = sub.add_parser("score", help="scores of named nodes in the newest valid snapshot", epilog=epilog,
                       description="Print the score of each named node; exit 1 when one is unknown.")
    p.add_argument("root", type=Path, metavar="ROOT", help=_ROOT_HELP)
    p.add_argument("nodes", nargs="+", metavar="NODE", help="node ids to look up")
    p.add_argument("--profile", default="global", help="profile name (default global)")
    p.add_argument("--snapshot", metavar="NAME", help=_SNAPSHOT_HELP)
    p.add_argument("--json", action="store_true", help=_JSON_HELP + "; rows under 'nodes', unknown score null")
    p.set_defaults(func=_cmd_score)


def _cmd_record(args: argparse.Namespace) -> int:
    from ranktide.replay.record import run_record

    return run_record(args)


def _cmd_audit(args: argparse.Namespace) -> int:
    from ranktide.replay.audit import run_audit, run_audit_against
    from ranktide.stream.snapshots import OutputError, check_writable

    if args.plot is not None:
        try:
            check_writable(args.plot.parent, "picture", args.plot)  # before the recompute
        except OutputError as exc:
            print(f"ranktide audit: error: {exc}", file=sys.stderr)
            return 3
    if args.against is not None or args.engine is not None:
        from ranktide.replay.recompute import RecomputeError, parse_spark_conf

        try:
            conf = parse_spark_conf(args.spark_conf)
        except RecomputeError as exc:
            print(f"ranktide audit: error: {exc}", file=sys.stderr)
            return 2
        options = {"rtol": args.rtol, "master": args.master, "spark_conf": conf, "out": args.recompute_out}
        return run_audit_against(args.root, args.snapshot, args.against, args.engine, args.json, options)
    return run_audit(args.root, args.snapshot, args.all, args.k, args.json, args.plot)


def _cmd_demo(args: argparse.Namespace) -> int:
    from ranktide.replay.demo import run_demo
    from ranktide.stream.snapshots import OutputError, check_writable

    try:
        check_writable(args.out, "demo folder")
        return run_demo(args.out)
    except OutputError as exc:
        print(f"ranktide demo: error: {exc}", file=sys.stderr)
        return 3
    except OSError as exc:  # everything the demo reads it has written itself
        print(f"ranktide demo: error: cannot write {exc.filename or args.out}: {exc.strerror or exc}", file=sys.stderr)
        return 3


def _cmd_bench(args: argparse.Namespace) -> int:
    from ranktide.replay.bench import run_bench

    return run_bench(args)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="ranktide", description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--log-level", type=_log_level, default="INFO", metavar="LEVEL",
                        help=LOG_LEVEL_HELP)
    parser.add_argument("--version", action=_Version, help="print the installed version and exit")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("replay", help="replay a recorded event log into a snapshot, or a series of them",
                       description="Replay a JSON Lines, CSV or Parquet event log from an empty graph (or from a "
                                   "snapshot, --from) and write a snapshot under ROOT at its end; with "
                                   "--snapshot-every N also one after every N records, leaving a series "
                                   "snap-00000001, snap-00000002, ... that audit --all and --plot read. Malformed "
                                   "records go to ROOT/rejects.jsonl with their line and reason; they never stop "
                                   "the run.")
    p.add_argument("log", type=Path, help="event log (.jsonl, .csv or .parquet)")
    p.add_argument("--out", type=Path, required=True, metavar="ROOT", help="snapshot root folder")
    add_engine_options(p)
    p.add_argument("--personalization", action="append", type=_personalization, metavar="NAME=SEEDS_FILE",
                   help="add a personalized profile seeded from a file (one node per line, optionally "
                        "node,weight); may be repeated")
    p.add_argument("--micro-batch", type=_positive_int, default=None, metavar="N",
                   help="settle after every N events, as the service does (default: settle only before "
                        "each snapshot, which is faster and gives the same snapshots within the tolerance)")
    p.add_argument("--from", dest="from_snapshot", type=Path, metavar="SNAPSHOT",
                   help="start from this snapshot folder (or the newest valid snapshot of a root) instead of an "
                        "empty graph; the log is read from the snapshot's position in it (a recording skips the "
                        "messages the snapshot covers). ROOT must be empty of snapshots or hold this one")
    p.add_argument("--until", type=_until, metavar="POSITION|TIME",
                   help="stop after this line (row, for Parquet and CSV) or before the first event later than "
                        "this ISO-8601 time")
    p.add_argument("--pace", type=_pace, metavar="original|N",
                   help="follow the events' timestamps: 'original' in real time, N times faster "
                        "(default: as fast as possible)")
    p.add_argument("--snapshot-every", type=_count, default=0, metavar="N",
                   help="also write a snapshot after every N records, leaving a series of snapshots in ROOT "
                        "(default 0: one snapshot, at the end)")
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.set_defaults(func=_cmd_replay)

    p = sub.add_parser("run", help="the long-lived consumer: Kafka or files in, fresh scores and snapshots out",
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       description="Consume edge events, keep every profile within the tolerance, write a snapshot "
                                   "every --snapshot-interval seconds and commit source positions after each durable "
                                   "snapshot. On restart it resumes from the newest good snapshot: every event is "
                                   "reflected exactly once. SIGTERM or SIGINT finish the batch, write a final "
                                   "snapshot and exit 0.",
                       epilog="SOURCE is kafka://HOST:PORT[,HOST:PORT...]/TOPIC[,TOPIC...] or file:PATH (a JSON "
                              "Lines file or a folder of them, followed as they grow). Without --source (and no "
                              "source in the configuration) it runs the built-in scenario from a file.\n"
                              "Settings come from --config FILE (TOML), then RANKTIDE_* environment variables, "
                              "then these options.")
    p.add_argument("--source", metavar="SOURCE", help="kafka://HOST:PORT/TOPIC or file:PATH")
    p.add_argument("--out", metavar="ROOT", help="snapshot root folder (default ranktide-out)")
    p.add_argument("--group", help="Kafka consumer group (default ranktide)")
    p.add_argument("--owner-topic", metavar="TOPIC",
                   help="one-partition Kafka topic whose holder owns the graph among the group's processes "
                        "(default GROUP.owner; created when missing)")
    add_engine_options(p)
    p.add_argument("--snapshot-interval", type=_positive_float, metavar="SECONDS",
                   help="seconds between snapshots (default 60)")
    p.add_argument("--keep-snapshots", type=_positive_int, metavar="N",
                   help="snapshots kept, older ones pruned (default 5)")
    p.add_argument("--config", type=Path, metavar="FILE",
                   help="TOML configuration file (a commented example: stream/ranktide.example.toml)")
    p.add_argument("--micro-batch", type=_positive_int, metavar="N",
                   help="most events handed to the engine at once (default 50000)")
    p.add_argument("--rejects", metavar="PATH|file:PATH|kafka:TOPIC",
                   help="where rejected records go (default ROOT/rejects.jsonl)")
    p.add_argument("--rejects-topic", metavar="TOPIC", help="send rejects to this Kafka topic instead of a file")
    p.add_argument("--score-topic", metavar="TOPIC",
                   help="Kafka topic for the score-change feed (log-compacted, keyed profile/node)")
    p.add_argument("--metrics", type=_address, metavar="HOST:PORT",
                   help="address of the Prometheus text endpoint and the read API (default 127.0.0.1:9464; "
                        "'' disables both)")
    p.add_argument("--api-token", metavar="TOKEN",
                   help="bearer token the read API's /v1/ paths require (prefer the RANKTIDE_API_TOKEN "
                        "variable: options show in process lists)")
    p.add_argument("--api-allow-no-token", action="store_true",
                   help="serve the read API on a non-loopback address without a token (refused otherwise)")
    p.add_argument("--ready-max-lag", type=int, metavar="N",
                   help="/readyz fails while the source lag is above N records (Kafka) or bytes (files) "
                        "(default 10000)")
    p.add_argument("--connect-timeout", type=_positive_float, metavar="SECONDS",
                   help="give up with an error when the Kafka brokers cannot be reached within this time "
                        "(default 30)")
    p.add_argument("--max-id-length", type=_positive_int, metavar="N",
                   help="longest node id accepted, in characters (default 1024)")
    p.add_argument("--max-message-bytes", type=_positive_int, metavar="N",
                   help="largest record accepted, in bytes (default 1048576)")
    p.add_argument("--personalization", action="append", type=_personalization, metavar="NAME=SEEDS_FILE",
                   help="personalized profile seeded from a file when starting without a snapshot; may be repeated")
    p.add_argument("--stop-at-end", action="store_true", help="stop with a final snapshot when the source has no more")
    p.add_argument("--recompute-interval", type=_non_negative_float, metavar="SECONDS",
                   help="every SECONDS, recompute the newest snapshot's graph in a separate process and audit the "
                        "scores against it (default 0: off)")
    p.add_argument("--recompute-engine", choices=("local", "spark"),
                   help="engine of the periodic recompute (default local; spark needs ranktide[spark])")
    p.add_argument("--log-json", action="store_true", help="structured logs, one JSON object per line")
    p.add_argument("--quiet", action="store_true", help="do not describe the final snapshot")
    p.set_defaults(func=_cmd_run)

    _add_reading_parsers(sub)

    p = sub.add_parser("record", help="copy a Kafka topic into a Parquet event log",
                       description="Copy every partition of a topic, from its start, into a Parquet log with "
                                   "topic, partition, offset, timestamp, content_type and value columns. "
                                   "ranktide replay reads it and decides every record as the service did.")
    p.add_argument("--source", required=True, help="kafka://HOST:PORT[,HOST:PORT...]/TOPIC[,TOPIC...]")
    p.add_argument("--out", type=Path, required=True, metavar="LOG.parquet", help="the Parquet log to write")
    p.add_argument("--until-end", action="store_true",
                   help="stop at the end offsets seen at start (default: follow until SIGINT/SIGTERM)")
    p.add_argument("--connect-timeout", type=_positive_float, metavar="SECONDS",
                   help="give up with an error when the brokers cannot be reached within this time "
                        "(default: RANKTIDE_CONNECT_TIMEOUT, else 30)")
    p.set_defaults(func=_cmd_record)

    p = sub.add_parser("audit", help="check a snapshot's scores against an exact recompute from scratch",
                       description="Recompute every profile's scores from scratch (cold, to 1e-12) on the "
                                   "snapshot's graph and report measured L1 and L-infinity errors, the certified "
                                   "bound and whether it holds, top-k overlap, Kendall tau on the top k, the largest "
                                   "relative errors and the residual drift. Exits 1 when a measured error exceeds "
                                   "the certified bound or a file fails its checksum.")
    p.add_argument("root", type=Path, metavar="ROOT", help=_ROOT_HELP)
    p.add_argument("--snapshot", metavar="NAME",
                   help="audit this snapshot (default: the newest valid one; newer ones failing their "
                        "checksums are named and fail the audit)")
    p.add_argument("--all", action="store_true", help="audit every snapshot in the root")
    p.add_argument("-k", type=_positive_int, default=100, help="size of the top set for overlap and Kendall tau (default 100)")
    p.add_argument("--json", action="store_true", help="print the results as JSON")
    p.add_argument("--plot", type=Path, metavar="FILE.png", help="plot measured error and bound against events applied")
    p.add_argument("--against", type=Path, metavar="RECOMPUTED",
                   help="compare node by node with this recomputed snapshot (folder or root, from 'ranktide "
                        "recompute'): every difference must lie within the two error_bounds together")
    p.add_argument("--engine", choices=("local", "spark"),
                   help="recompute the snapshot's graph with this engine first (spark: for graphs too large for "
                        "the in-memory audit), then compare as --against does")
    p.add_argument("--rtol", type=_rtol, default=None,
                   help="with --engine: the recompute's per-node contract (default 1e-6)")
    p.add_argument("--master", help="with --engine spark: the Spark master URL (default local[*])")
    p.add_argument("--spark-conf", action="append", metavar="KEY=VALUE", help="with --engine spark: a Spark setting")
    p.add_argument("--recompute-out", type=Path, metavar="ROOT",
                   help="with --engine: keep the recomputed snapshot under ROOT (default: a temporary folder)")
    p.set_defaults(func=_cmd_audit)

    from ranktide.replay.recompute_options import add_parser as add_recompute_parser

    add_recompute_parser(sub, add_engine_options, _personalization)

    p = sub.add_parser("demo", help="the built-in scenario end to end: consumer, snapshots, audit, pictures",
                       description="Generate a fictional package ecosystem whose dependencies change with releases "
                                   "(with a personalization seeded from one team's services), run the consumer on it "
                                   "through its file source, audit every snapshot and draw the top movers and the "
                                   "error against the bound. Needs no broker.")
    p.add_argument("--out", type=Path, default=Path("ranktide-demo"), help="output folder (default ranktide-demo)")
    p.set_defaults(func=_cmd_demo)

    p = sub.add_parser("bench", help="measure the engine against recomputing (prints figures)",
                       description="Benchmarks that print figures measured side by side in one run.")
    from ranktide.replay.bench_options import add_bench_options

    add_bench_options(p)
    p.set_defaults(func=_cmd_bench)

    # listed for --help; main() hands 'ranktide broker ...' to stream.broker before parsing
    sub.add_parser("broker", help="fetch and run a local single-node Kafka broker (for trying the service)")
    for command in sub.choices.values():
        # after the command too: 'ranktide run ... --log-level DEBUG'
        command.add_argument("--log-level", type=_log_level, default=argparse.SUPPRESS, metavar="LEVEL",
                             help=LOG_LEVEL_HELP)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command line; ``argv`` defaults to the program's arguments.

    Run as the program (no ``argv``), pyarrow is kept from importing pandas
    (:func:`_hide_pandas`) and a finished ``replay`` ends the process at once
    (:func:`_exit_now`).
    """
    code, command = _main(sys.argv[1:] if argv is None else argv, as_program=argv is None)
    if argv is None and command == "replay":
        _exit_now(code)
    return code


#: Commands whose work may go through pandas: pyspark converts through it.
_PANDAS_COMMANDS = frozenset({"recompute", "bench"})


def _hide_pandas(command: str) -> None:
    """Let pyarrow see no pandas in a process that will never hand it a pandas object.

    pyarrow imports pandas, when installed, the first time it converts a Python
    or NumPy object (to check whether it is a Series): 0.3 s of start-up that
    no ``ranktide`` command but those of :data:`_PANDAS_COMMANDS` has any use
    for. Only done when ``ranktide`` runs as the program, so that a caller's
    own process keeps its pandas.
    """
    if command not in _PANDAS_COMMANDS and "pandas" not in sys.modules:
        sys.meta_path.insert(0, _NoPandas())


class _NoPandas:
    """An import finder under which ``import pandas`` fails as if pandas were not installed.

    (Marking it None in ``sys.modules`` does not do: pyarrow's compiled import
    takes the None for the module.)
    """

    def find_spec(self, name: str, path=None, target=None):  # noqa: D102 - importlib's finder hook
        if name == "pandas" or name.startswith("pandas."):
            raise ModuleNotFoundError(f"No module named {name!r} (not used by this ranktide command)", name=name)
        return None


def _exit_now(code: int) -> None:
    """End the process without the interpreter's teardown, once every output is flushed.

    Freeing numba's compiler state and Arrow's buffers at exit takes 0.3-0.5 s,
    a fifth of a million-event replay; by now the replay has closed its
    rejects file, fsynced its snapshot and released its lock, and no thread is
    left.
    """
    logging.shutdown()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe or stream: nothing more to write there
            pass
    os._exit(code)


def _main(argv: list[str], as_program: bool = False) -> tuple[int, str]:
    """The exit code of the command ``argv`` names, and that command (``as_program``: see :func:`main`)."""
    if argv[:1] == ["broker"]:
        # everything after 'broker' belongs to the broker's own parser, --help included
        from ranktide.stream import broker

        return broker.main(argv[1:], prog="ranktide broker"), "broker"
    parser = build_parser()
    args = parser.parse_args(argv)
    if as_program:
        _hide_pandas(args.command)
    logging.basicConfig(level=getattr(logging, args.log_level),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    try:
        return int(args.func(args) or 0), args.command
    except KeyboardInterrupt:
        return 130, args.command
    except BrokenPipeError:
        return 0, args.command


if __name__ == "__main__":
    sys.exit(main())
