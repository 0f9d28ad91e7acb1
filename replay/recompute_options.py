"""Options of ``ranktide recompute`` (standard library only: ``ranktide --help`` stays fast).

The command itself is :func:`ranktide.replay.recompute.run_recompute`,
imported when it runs.
"""

from __future__ import annotations

import argparse

ENGINES = ("local", "spark")


def _run(args: argparse.Namespace) -> int:
    from ranktide.replay.recompute import run_recompute

    return run_recompute(args)


def add_parser(sub, engine_options, personalization_type) -> None:
    """Register ``ranktide recompute`` on the command line's subparsers."""
    p = sub.add_parser(
        "recompute", help="full recompute of every profile (in memory or on Apache Spark) into a snapshot",
        description="Solve every profile from scratch on INPUT's graph and write a complete snapshot into ROOT "
                    "(source: recompute), from which 'ranktide run' and 'replay --from' start. INPUT is a "
                    "snapshot folder or root, or an edge table: a Parquet file or folder of part files with "
                    "columns src, dst and optionally weight (with --engine spark any path Spark reads, such as "
                    "hdfs:// or s3a://). The iteration stops on a bound certified by its own residual: the "
                    "per-node contract (--rtol) and, if given, the L1 bound (--tolerance). Exit 2 on bad input, "
                    "3 when ROOT cannot be written.")
    p.add_argument("input", metavar="INPUT", help="snapshot folder or root, or edge table (file or folder)")
    p.add_argument("--out", required=True, metavar="ROOT", help="snapshot root to write the recomputed snapshot into")
    p.add_argument("--engine", choices=ENGINES, default="local",
                   help="local: SciPy in memory (default); spark: DataFrames on Apache Spark (needs ranktide[spark])")
    p.add_argument("--master", help="Spark master URL (default local[*]; e.g. yarn, k8s://https://HOST:PORT)")
    p.add_argument("--spark-conf", action="append", metavar="KEY=VALUE",
                   help="a Spark setting such as spark.driver.memory=8g; may be repeated")
    p.add_argument("--staging", metavar="URI",
                   help="with --engine spark on a cluster: a folder every executor and the driver reach "
                        "(hdfs://, s3a://) where Spark writes the files before they are copied into ROOT "
                        "(default: inside ROOT, right for local mode)")
    p.add_argument("--nodes", metavar="TABLE", help="node table (Parquet, column node) listing nodes without edges")
    engine_options(p)
    p.add_argument("--personalization", action="append", type=personalization_type, metavar="NAME=SEEDS_FILE",
                   help="a personalized profile seeded from a file (one node per line, optionally node,weight); "
                        "may be repeated")
    p.add_argument("--positions", metavar="JSON_OR_FILE",
                   help="source positions the table corresponds to, as in a snapshot manifest, e.g. "
                        '\'{"files": {"/data/events.jsonl": {"offset": 1234, "line": 10}}}\'; '
                        "run resumes from them (default: the input snapshot's, else none)")
    p.add_argument("--quiet", action="store_true", help="no progress lines, no summary")
    p.set_defaults(func=_run)
