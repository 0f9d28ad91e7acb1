"""The ``ranktide`` command line."""

from __future__ import annotations

import argparse
import json
import logging
import math
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


def _positive_float(text: str) -> float:
    value = float(text)
    if not (value > 0 and math.isfinite(value)):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0, got {text}")
    return value


def _damping(text: str) -> float:
    value = float(text)
    if not 0 < value < 1:
        raise argparse.ArgumentTypeError(f"damping must lie strictly between 0 and 1, got {text}")
    return value


def _personalization(text: str) -> tuple[str, Path]:
    name, sep, path = text.partition("=")
    if not sep or not name or not path:
        raise argparse.ArgumentTypeError(f"expected NAME=SEEDS_FILE, got {text!r}")
    if name == "global":
        raise argparse.ArgumentTypeError("'global' is the uniform profile; name the personalization otherwise")
    return name, Path(path)


def add_engine_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--tolerance", type=_positive_float, default=None,
                   help="certified bound on the normalised L1 error of every profile (default 1e-6)")
    p.add_argument("--damping", type=_damping, default=None,
                   help="probability of following an edge rather than teleporting (default 0.85)")


def _cmd_replay(args: argparse.Namespace) -> int:
    from replay.logs import LogError
    from replay.replay import ReplayOptions, replay_log
    from stream.snapshots import SnapshotError

    options = ReplayOptions(
        damping=0.85 if args.damping is None else args.damping,
        tolerance=1e-6 if args.tolerance is None else args.tolerance,
        personalizations=dict(args.personalization or []),
        micro_batch=args.micro_batch,
        progress=not args.quiet and sys.stderr.isatty(),
    )
    try:
        summary = replay_log(args.log, args.out, options)
    except (LogError, SnapshotError) as exc:
        print(f"ranktide replay: error: {exc}", file=sys.stderr)
        return 2
    if not args.quiet:
        print("\n".join(summary.lines()))
    return 0


def _cmd_status(args: argparse.Namespace) -> int:
    from replay.reading import describe_newest

    return describe_newest(args.root, as_json=args.json)


def _cmd_top(args: argparse.Namespace) -> int:
    from replay.reading import print_top

    return print_top(args.root, args.k, args.profile, as_json=args.json)


def _cmd_score(args: argparse.Namespace) -> int:
    from replay.reading import print_scores

    return print_scores(args.root, args.nodes, args.profile, as_json=args.json)


def _cmd_bench(args: argparse.Namespace) -> int:
    from replay.bench import run_bench

    return run_bench(args)


def _cmd_broker(args: argparse.Namespace) -> int:
    from stream import broker

    return broker.main(args.broker_args)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="ranktide", description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--log-level", default="WARNING", help="logging level (DEBUG, INFO, WARNING, ERROR)")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("replay", help="replay a recorded event log into a snapshot",
                       description="Replay a JSON Lines, CSV or Parquet event log from an empty graph and "
                                   "write one snapshot under ROOT. Malformed records go to ROOT/rejects.jsonl "
                                   "with their line and reason; they never stop the run.")
    p.add_argument("log", type=Path, help="event log (.jsonl, .csv or .parquet)")
    p.add_argument("--out", type=Path, required=True, metavar="ROOT", help="snapshot root folder")
    add_engine_options(p)
    p.add_argument("--personalization", action="append", type=_personalization, metavar="NAME=SEEDS_FILE",
                   help="add a personalized profile seeded from a file (one node per line, optionally "
                        "node,weight); may be repeated")
    p.add_argument("--micro-batch", type=int, default=50_000, help="events applied between settles (default 50000)")
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.set_defaults(func=_cmd_replay)

    p = sub.add_parser("status", help="describe the newest snapshot in words")
    p.add_argument("root", type=Path, help="snapshot root folder")
    p.add_argument("--json", action="store_true", help="print the manifest as JSON")
    p.set_defaults(func=_cmd_status)

    p = sub.add_parser("top", help="the best-scored nodes of the newest snapshot")
    p.add_argument("root", type=Path)
    p.add_argument("-k", type=int, default=20, help="how many nodes (default 20)")
    p.add_argument("--profile", default="global", help="profile name (default global)")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=_cmd_top)

    p = sub.add_parser("score", help="scores of named nodes in the newest snapshot")
    p.add_argument("root", type=Path)
    p.add_argument("nodes", nargs="+", metavar="NODE")
    p.add_argument("--profile", default="global")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=_cmd_score)

    p = sub.add_parser("bench", help="measure the engine against recomputing (prints figures)",
                       description="Benchmarks that print figures measured side by side in one run.")
    from replay.bench import add_bench_options

    add_bench_options(p)
    p.set_defaults(func=_cmd_bench)

    p = sub.add_parser("broker", help="fetch and run a local single-node Kafka broker (for trying the service)",
                       add_help=False)
    p.add_argument("broker_args", nargs=argparse.REMAINDER)
    p.set_defaults(func=_cmd_broker)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=getattr(logging, str(args.log_level).upper(), logging.WARNING),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
