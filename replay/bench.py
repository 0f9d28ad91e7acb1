"""Benchmarks (placeholder until the engine benchmark lands)."""
import argparse
def add_bench_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--size", choices=["small", "medium", "large"], default="medium")
def run_bench(args) -> int:
    raise SystemExit("not yet")
