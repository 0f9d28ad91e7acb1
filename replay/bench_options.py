"""Options of ``ranktide bench``, apart from the benchmark itself.

The command line builds its parser from this module alone (standard library
only), so that starting any command does not import the benchmark and NumPy,
SciPy and numba with it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

#: Graph sizes (nodes, edges). ``tiny`` is for smoke tests.
SIZES = {
    "tiny": (2_000, 20_000),
    "small": (20_000, 200_000),
    "medium": (200_000, 2_000_000),
    "large": (1_000_000, 10_000_000),
}


def _batch_list(text: str) -> list[int]:
    try:
        sizes = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated batch sizes, got {text!r}") from None
    if not sizes or min(sizes) < 1:
        raise argparse.ArgumentTypeError(f"batch sizes must be integers >= 1, got {text!r}")
    return sorted(set(sizes))


def _positive_int(text: str) -> int:
    if not text.strip().lstrip("+").isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 1, got {text!r}")
    return int(text)


def _count(text: str) -> int:
    if not text.strip().lstrip("+").isdigit():
        raise argparse.ArgumentTypeError(f"must be a whole number >= 0, got {text!r}")
    return int(text)


def _seed(text: str) -> int:
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None


def add_bench_options(p: argparse.ArgumentParser) -> None:
    """Options of ``ranktide bench``."""
    p.add_argument("--size", choices=list(SIZES), default="medium",
                   help="generated graph: small ~20k nodes/200k edges, medium ~200k/2M (default), "
                        "large ~1M/10M; tiny ~2k/20k is for smoke tests")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of tables")
    p.add_argument("--plot", type=Path, metavar="FILE.png",
                   help="write a log-log plot of time per event against batch size")
    p.add_argument("--batches", type=_batch_list, default=[1, 10, 100, 1_000, 10_000],
                   help="update batch sizes, comma-separated (default 1,10,100,1000,10000)")
    p.add_argument("--repeats", type=_positive_int, default=3, help="batches measured per batch size (default 3)")
    p.add_argument("--seed", type=_seed, default=0, help="seed of the generated graph and events (default 0)")
    p.add_argument("--skip-e2e", action="store_true", help="skip the end-to-end run through a local Kafka broker")
    p.add_argument("--profiles", type=_count, default=2,
                   help="personalization profiles in the personalized stream (default 2; 0 skips it)")
